"""File formats and I/O: config.json's fields (config), the safetensors header (modelfile), the opened
model (store) and its page-ins, page-cache residency, expert codecs and the packed low-bit format, routing
traces, the open checkpoint layout (checkpoint, ckpt_config, ckpt_tensors) and its store (ckpt_store), the bundled models by name,
and the rules every output follows (fileio)."""

__all__ = ["bitpack", "bundled", "checkpoint", "ckpt_config", "ckpt_store", "ckpt_tensors", "codec", "config", "fileio",
           "modelfile", "packed", "pagecache", "store", "trace"]
