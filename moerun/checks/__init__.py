"""Checks of what the engine computes: bit-exactness of offloaded runs (verify), perplexity under a cap (score), and the PyTorch twin used for training and the reference logits. Offline."""

__all__ = ["score", "torch_twin", "verify"]
