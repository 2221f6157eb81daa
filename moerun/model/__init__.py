"""The model and its math: config.json's fields, the transformer of docs/design/architecture.md section 3, the tokenizer, sampling, and routing replayed from a trace."""

__all__ = ["config", "routing", "sampling", "tokenizer", "transformer"]
