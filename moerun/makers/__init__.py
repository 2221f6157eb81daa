"""Tools that write model directories: low-bit experts (quantize, with its card) and random weights of any shape (synthetic). Offline."""

__all__ = ["quantize", "synthetic"]
