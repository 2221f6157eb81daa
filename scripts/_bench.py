"""Shared set-up for the benchmark scripts: one BLAS thread, the repo on sys.path."""

from __future__ import annotations

import os
import sys

# Pin BLAS (and torch's intra-op pool) to one thread before numpy is imported: two-thread
# BLAS swings about 10x between runs for these small matrices on a shared 2-core machine.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

BLAS_NOTE = "BLAS pinned to one thread for every configuration"


def memcpy_bandwidth(nbytes: int = 64 << 20, repeats: int = 5) -> float:
    """This machine's plain memory-copy bandwidth in bytes/s (best of a few 64 MiB copies)."""
    import time

    import numpy as np

    src = np.ones(nbytes, np.uint8)
    dst = np.empty_like(src)
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        np.copyto(dst, src)
        best = min(best, time.perf_counter() - t0)
    return nbytes / best
