"""Peak resident-set growth of this process, measured with psutil (and the kernel's VmHWM)."""

from __future__ import annotations

import os

import psutil


def _reset_peak() -> bool:
    """Reset the kernel's peak RSS counter (Linux >= 4.0: write 5 to clear_refs)."""
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
        return True
    except OSError:
        return False


def _peak_rss() -> int | None:
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        return None
    return None


def warm_runtime() -> None:
    """Load what every run needs regardless of the model (tokenizer library, BLAS buffers).

    Called before the baseline is taken, so that the reported growth is the
    engine's own memory and not the interpreter's one-off start-up cost.
    """
    import numpy as np

    try:
        import tokenizers  # noqa: F401
    except ImportError:
        pass
    a = np.ones((64, 64), np.float32)
    (a @ a).sum()
    # first calls of these load code pages and module state of a few MiB
    np.unique(np.argsort(-a[0], kind="stable"))
    np.nonzero(a[:2] == 1)
    np.random.default_rng(0).choice(4, p=np.full(4, 0.25))


class MemWatch:
    """Baseline RSS at creation; ``peak_growth()`` is the highest RSS since then, minus it."""

    def __init__(self):
        import gc

        gc.collect()  # earlier engines' garbage must not be freed mid-run and hide growth
        warm_runtime()
        self.proc = psutil.Process(os.getpid())
        self.kernel_peak = _reset_peak()
        self.baseline = self.proc.memory_info().rss
        self.sampled_peak = self.baseline

    def sample(self) -> int:
        rss = self.proc.memory_info().rss
        if rss > self.sampled_peak:
            self.sampled_peak = rss
        return rss

    def peak_growth(self) -> int:
        self.sample()
        peak = self.sampled_peak
        if self.kernel_peak:
            hwm = _peak_rss()
            if hwm is not None:
                peak = max(peak, hwm)
        return max(0, peak - self.baseline)
