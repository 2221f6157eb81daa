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


class MemWatch:
    """Baseline RSS at creation; ``peak_growth()`` is the highest RSS since then, minus it."""

    def __init__(self):
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
