"""Replay speed: the fast LRU and optimum against the reference path and a plain OrderedDict LRU.

The trace is a recorded one (default: ``moerun record`` over the bundled model's heldout.txt,
written to a temporary file), repeated end to end until it holds at least ``--min-accesses``
expert accesses; repeating keeps its routing statistics, and the copies join like one long text.
Every figure comes from this run: wall time of each replay (best of ``--repeat``), including
building the access schedule from the trace arrays, divided into the number of decode accesses.

- fast LRU, one quota: ``replay.replay_counts(trace, "lru", [slots])``
- fast LRU, every quota 1..n_experts in one call (reported as accesses x quotas per second)
- fast optimum (Belady's MIN with the pool's pinning), one quota
- reference path (Residency + policy objects) for LRU, on a prefix of the trace
- reference path for each policy in ``--evict`` (default ``markov``), on the same prefix, with its
  cost in ns per access (router probabilities from the trace, when it has them, reach the policy)
- baseline: one ``collections.OrderedDict`` per layer, plain LRU without pinning, over the same
  token rows (``move_to_end`` on a hit, ``popitem(last=False)`` when over the quota)

Usage: python scripts/bench_replay.py [--trace FILE] [--min-accesses N] [--slots N] [--repeat N] [--evict P,P] [--json]

It imports ``_bench`` first, before numpy and moerun: one BLAS thread, and the helpers the
benchmarks share.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import platform
import sys
import tempfile
from collections import OrderedDict
from pathlib import Path

import _bench  # first: one BLAS thread before numpy is imported; the shared helpers
import numpy as np

from moerun.cli import main as cli
from moerun.files.trace import Trace, read_trace
from moerun.sim import report as replay


def ordered_dict_lru(experts: np.ndarray, slots: int) -> tuple[int, int]:
    """Plain LRU per layer with an OrderedDict: (accesses, misses)."""
    L = experts.shape[1]
    caches = [OrderedDict() for _ in range(L)]
    misses = accesses = 0
    for token in experts.tolist():
        for layer, row in enumerate(token):
            od = caches[layer]
            for e in row:
                if e < 0:
                    continue
                accesses += 1
                if e in od:
                    od.move_to_end(e)
                else:
                    misses += 1
                    od[e] = None
                    if len(od) > slots:
                        od.popitem(last=False)
    return accesses, misses


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--trace", help="trace to repeat (default: record the bundled model's heldout.txt)")
    ap.add_argument("--min-accesses", type=int, default=2_000_000)
    ap.add_argument("--slots", type=int, default=4, help="quota per layer for the one-quota runs (default 4)")
    ap.add_argument("--repeat", type=int, default=3, help="best of N runs per figure (default 3)")
    ap.add_argument("--reference-accesses", type=int, default=200_000, help="prefix replayed by the reference path")
    ap.add_argument("--evict", default="markov", help="policies also timed on the reference path, e.g. markov,lrfu (default markov)")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()

    if args.trace:
        source_path = Path(args.trace)
        source = f"{source_path}"
    else:
        source_path = Path(tempfile.mkdtemp()) / "heldout.npz"
        with contextlib.redirect_stdout(io.StringIO()):  # keep stdout for this script's own output
            code = cli.main(["record", "--trace", str(source_path), "--json"])
        if code != 0:
            return code
        source = "moerun record over tiny_models/pebble/heldout.txt"
    base = read_trace(source_path)
    per_copy = int((base.experts >= 0).sum())
    copies = -(-args.min_accesses // per_copy)
    experts = np.concatenate([base.experts] * copies)
    probs = np.concatenate([base.probs] * copies) if base.probs is not None else None
    trace = Trace(experts, meta={"n_experts": base.n_experts, "prefill_tokens": 0}, probs=probs)
    n = int((experts >= 0).sum())
    E = trace.n_experts
    C = args.slots

    # interleaved, so that the fast path and the baseline see the same load on a shared machine
    t_lru = t_all = t_base = float("inf")
    for _ in range(args.repeat):
        t, lru = _bench.best_of(lambda: replay.replay_counts(trace, "lru", [C]), 1)
        t_lru = min(t_lru, t)
        t, (n_base, base_misses) = _bench.best_of(lambda: ordered_dict_lru(experts, C), 1)
        t_base = min(t_base, t)
        t, _ = _bench.best_of(lambda: replay.replay_counts(trace, "lru", list(range(1, E + 1))), 1)
        t_all = min(t_all, t)
    t_opt, opt = _bench.best_of(lambda: replay.replay_counts(trace, "optimal", [C]), max(1, args.repeat - 1))

    tokens_ref = max(1, args.reference_accesses * trace.n_tokens // n)
    ref_trace = Trace(experts[:tokens_ref], meta=trace.meta, probs=probs[:tokens_ref] if probs is not None else None)
    n_ref = int((ref_trace.experts >= 0).sum())
    t_ref, ref = _bench.best_of(lambda: replay.replay_counts(ref_trace, "lru", [C], fast=False), 1)
    fast_prefix = replay.replay_counts(ref_trace, "lru", [C])
    same_prefix = [c.misses for c in ref[C]] == [c.misses for c in fast_prefix[C]]

    extra = [name for name in replay.parse_policies(args.evict) if name != "lru"]
    t_pol = dict.fromkeys(extra, float("inf"))
    for _ in range(max(1, args.repeat - 1)):  # interleaved with the lru reference path, same load on a shared machine
        t, _ = _bench.best_of(lambda: replay.replay_counts(ref_trace, "lru", [C], fast=False), 1)
        t_ref = min(t_ref, t)
        for name in extra:
            t, _ = _bench.best_of(lambda name=name: replay.replay_counts(ref_trace, name, [C], fast=False), 1)
            t_pol[name] = min(t_pol[name], t)
    ns_per_access = {"lru": 1e9 * t_ref / n_ref, **{name: 1e9 * t / n_ref for name, t in t_pol.items()}}

    lru_misses = sum(c.misses for c in lru[C])
    rows = {
        "fast lru, one quota": n / t_lru,
        f"fast lru, quotas 1..{E} in one call": n * E / t_all,
        "fast optimum, one quota": n / t_opt,
        "reference path (Residency + LRU)": n_ref / t_ref,
        **{f"reference path (Residency + {name})": n_ref / t for name, t in t_pol.items()},
        "OrderedDict lru (plain, no pinning)": n_base / t_base,
    }
    doc = {
        "trace": source,
        "copies": copies,
        "tokens": trace.n_tokens,
        "layers": trace.n_layers,
        "top_k": trace.top_k,
        "n_experts": E,
        "accesses": n,
        "slots": C,
        "accesses_per_s": rows,
        "seconds": {"fast_lru": t_lru, "fast_lru_all_quotas": t_all, "fast_optimal": t_opt, "reference_lru_prefix": t_ref, "ordered_dict_lru": t_base},
        "reference_prefix_accesses": n_ref,
        "reference_ns_per_access": ns_per_access,
        "policy_ns_per_access_over_lru": {name: v - ns_per_access["lru"] for name, v in ns_per_access.items() if name != "lru"},
        "trace_has_probs": probs is not None,
        "speedup_fast_lru_over_ordered_dict": t_base / t_lru,
        "misses": {
            "fast_lru": lru_misses,
            "fast_optimal": sum(c.misses for c in opt[C]),
            "ordered_dict_lru_no_pinning": base_misses,
        },
        "fast_equals_reference_on_prefix": same_prefix,
        "python": platform.python_version(),
        "numpy": np.__version__,
        "note": "wall time, best of runs (fast lru and the baseline interleaved), schedule building included; one BLAS thread",
    }
    if args.json:
        json.dump(doc, sys.stdout, indent=2)
        sys.stdout.write("\n")
        return 0
    print(f"trace: {source}, repeated {copies}x: {trace.n_tokens} tokens x {trace.n_layers} layers, top-{trace.top_k} of {E}; {n} accesses")
    print(f"quota {C} slots per layer; best of {args.repeat} interleaved runs; Python {doc['python']}, numpy {doc['numpy']}")
    w = max(len(k) for k in rows)
    for k, v in rows.items():
        print(f"  {k:<{w}}  {v / 1e6:8.2f} M accesses/s")
    print(f"fast lru is {t_base / t_lru:.1f}x the OrderedDict baseline")
    for name, v in ns_per_access.items():
        over = f" ({v - ns_per_access['lru']:+.0f} ns over lru)" if name != "lru" else ""
        print(f"reference path with {name}: {v:.0f} ns per access{over}")
    print(
        f"misses at {C} slots: fast lru {lru_misses}, optimum {doc['misses']['fast_optimal']}, "
        f"OrderedDict lru without pinning {base_misses}; fast = reference on the {n_ref}-access prefix: {same_prefix}"
    )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
