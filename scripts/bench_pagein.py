#!/usr/bin/env python3
"""Which page-in mechanism keeps copied file pages out of the resident set, and how fast each is.

For each mechanism, every expert of the model is paged into one preallocated,
page-aligned slot (warm: the file is in the OS page cache), and the process's
resident-set growth (psutil) and copy bandwidth are measured side by side:

  pread          os.preadv into the slot (the engine's default: ModelStore.page_in)
  mmap+madvise   the engine's mmap mechanism: copy from a read-only map, then release the
                 copied range, widened to the kernel's fault-around window (ModelStore.page_in)
  mmap           copy from a read-only map and leave it (for contrast)

It imports ``_bench`` first, before numpy and moerun: one BLAS thread, and the helpers the
benchmarks share.
"""

from __future__ import annotations

import argparse
import json
import mmap
import time

import _bench  # noqa: F401  (first: one BLAS thread before numpy is imported)
import numpy as np
import psutil

import moerun
from moerun.files.store import ModelStore
from moerun.runtime.sources import aligned_block


def run(store: ModelStore, mechanism: str, rounds: int) -> dict:
    """Page every expert into one slot ``rounds`` times; the first two mechanisms are the engine's own page_in."""
    proc = psutil.Process()
    slot, _raw = aligned_block(store.expert_nbytes)
    ranges = [(r.layer, r.expert, r.start, r.nbytes) for row in store.ranges for r in row]
    plain = None
    if mechanism == "mmap":  # for contrast only: copy from a map and never release it
        plain = mmap.mmap(store._fd, 0, prot=mmap.PROT_READ)
    else:
        store.set_mechanism("pread" if mechanism == "pread" else "mmap")
    for layer, e, _, _ in ranges:  # warm the page cache
        store._read(store.ranges[layer][e].start, store.expert_nbytes)
    base = proc.memory_info().rss
    peak = base
    t0 = time.perf_counter()
    for _ in range(rounds):
        for layer, e, start, nbytes in ranges:
            if plain is None:
                store.page_in(layer, e, slot)
            else:
                np.copyto(slot[:nbytes], np.frombuffer(plain, np.uint8, nbytes, start))
        peak = max(peak, proc.memory_info().rss)
    dt = time.perf_counter() - t0
    if plain is not None:
        plain.close()
    moved = rounds * len(ranges) * store.expert_nbytes
    return {"mechanism": mechanism, "rss_growth_bytes": peak - base, "gb_s": moved / dt / 1e9,
            "expert_bytes": store.expert_nbytes, "pageins": rounds * len(ranges)}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--model", default=None)
    ap.add_argument("--rounds", type=int, default=20)
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args()
    store = ModelStore.open(a.model or moerun.default_model_dir())
    rows = [run(store, mech, a.rounds) for mech in ("pread", "mmap+madvise", "mmap")]
    file_bytes = store.expert_total_nbytes
    store.close()
    if a.json:
        print(json.dumps({"experts_total_bytes": file_bytes, "results": rows}, indent=2))
        return 0
    print(f"every expert paged into one slot, {a.rounds} rounds, warm page cache; experts total {file_bytes / 2**20:.1f} MiB")
    print(f"{'mechanism':<14}{'RSS growth':>12}{'GB/s':>8}")
    for r in rows:
        print(f"{r['mechanism']:<14}{r['rss_growth_bytes'] / 2**20:>8.1f} MiB{r['gb_s']:>8.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
