"""The model and its math: the transformer of docs/design/architecture.md section 3, the tokenizer,
sampling, routing replayed from a trace, and dense matrices kept as stored (operands).  (config.json's fields are a file format: moerun.files.config.)"""

__all__ = ["operands", "routing", "sampling", "tokenizer", "transformer"]
