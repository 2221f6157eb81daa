"""File formats and I/O: the safetensors header, the opened model (store) and its page-ins, page-cache residency, expert codecs and the packed low-bit format, routing traces, and the rules every output follows (fileio)."""

__all__ = ["bitpack", "checkpoint", "ckpt_config", "ckpt_tensors", "codec", "fileio", "modelfile", "packed", "pagecache", "store", "trace"]
