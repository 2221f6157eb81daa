"""Tools that write model directories (moerun.synth and moerun.quantize, in jobs): low-bit experts (quantize, with its card) and random weights of any shape (synthetic; open checkpoints of random weights: synth_open). Offline."""

__all__ = ["jobs", "quantize", "synth_open", "synthetic"]
