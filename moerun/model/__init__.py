"""The model and its math: the transformer of docs/design/architecture.md section 3, the tokenizer,
sampling, and routing replayed from a trace.  (config.json's fields are a file format: moerun.files.config.)"""

__all__ = ["routing", "sampling", "tokenizer", "transformer"]
