"""Checks of what the engine computes (moerun.verify and moerun.score, in jobs): bit-exactness of offloaded runs (verify), perplexity under a cap (score), and the PyTorch twin used for training and the reference logits. Offline."""

__all__ = ["jobs", "score", "torch_twin", "verify"]
