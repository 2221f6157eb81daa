"""Checks of a model and of what the engine computes (moerun.inspect, moerun.verify and moerun.score, in jobs): what a model directory holds (contents), bit-exactness of offloaded runs (verify), perplexity under a cap (score), and the PyTorch twin used for training and the reference logits. Offline."""

__all__ = ["contents", "jobs", "score", "torch_twin", "verify"]
