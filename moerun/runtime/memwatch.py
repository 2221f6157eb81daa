"""Peak resident-set growth of this process, measured with psutil (and the kernel's VmHWM)."""

from __future__ import annotations

import json
import os

import psutil

# A command that can run a model whole or part by part (verify's reference, plan's calibration) runs it whole
# only when that takes at most this share of the memory available now.
RESIDENT_SHARE = 0.8


def available_memory() -> int:
    """Bytes of memory available now (psutil)."""
    return int(psutil.virtual_memory().available)


def fits_whole(nbytes: int) -> bool:
    """Whether ``nbytes`` (a model run whole) fit in RESIDENT_SHARE of the memory available now."""
    return nbytes <= RESIDENT_SHARE * available_memory()


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


_TINY_TOKENIZER = json.dumps({
    "version": "1.0", "truncation": None, "padding": None, "added_tokens": [], "normalizer": None,
    "pre_tokenizer": {"type": "ByteLevel", "add_prefix_space": False, "trim_offsets": True, "use_regex": True},
    "post_processor": None, "decoder": {"type": "ByteLevel", "add_prefix_space": True, "trim_offsets": True, "use_regex": True},
    "model": {"type": "BPE", "dropout": None, "unk_token": None, "continuing_subword_prefix": None, "end_of_word_suffix": None,
              "fuse_unk": False, "byte_fallback": False, "ignore_merges": False, "vocab": {"a": 0, "b": 1, "ab": 2},
              "merges": [["a", "b"]]},
})


def warm_runtime() -> None:
    """Load what every run needs regardless of the model (tokenizer library, BLAS buffers).

    Called before the baseline is taken, so that the reported growth is the
    engine's own memory and not the interpreter's one-off start-up cost.
    """
    import numpy as np

    try:
        from tokenizers import Tokenizer

        # the library's first tokenizer and first encode set up its regex engine and thread pool (about
        # 2.5 MiB here, 2026-12-03), the same for every model: part of the runtime, not of the engine
        tok = Tokenizer.from_str(_TINY_TOKENIZER)
        tok.decode(tok.encode("ab ba, 12").ids)
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
