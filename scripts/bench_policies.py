#!/usr/bin/env python3
"""What an eviction policy costs per expert access in the live pool (moerun/runtime/pool.py), measured.

The pool is driven with the routing of a recorded trace exactly as the model drives it
(begin_layer, routed, compute_order, weights, end_layer per layer and decode token), with
every read replaced by nothing, so what is timed is the pool's bookkeeping and the policy's.
The same loop over a source that does no bookkeeping is timed too and taken off.  CPU time of
this thread, best of ``--repeats``, policies interleaved.  Replay hit rates of the same trace
are printed beside the costs, with the time-shuffled baseline, so a cost can be weighed against
what it buys.

It imports ``_bench`` first, before numpy and moerun: one BLAS thread, and the helpers the
benchmarks share.
"""

from __future__ import annotations

import argparse
import json
import time

import _bench  # noqa: F401  (first: one BLAS thread before numpy is imported)
import numpy as np

import moerun
from moerun import policies
from moerun.files.store import ModelStore
from moerun.files.trace import read_trace
from moerun.model.sampling import Sampling
from moerun.runtime.budget import fixed_bytes, plan_budget, slot_bytes
from moerun.runtime.pool import ExpertPool
from moerun.sim import report as replay


class NoBookkeeping:
    """The driver's own cost: the same calls, nothing done."""

    def __init__(self, weights):
        self.w = weights

    def begin_step(self, step):
        pass

    def begin_layer(self, layer):
        pass

    def routed(self, layer, chosen, weights, probs):
        pass

    def compute_order(self, layer, ids):
        return range(len(ids))

    def weights(self, layer, expert):
        return self.w

    def end_layer(self, layer):
        pass


def drive(source, experts: np.ndarray, probs: np.ndarray, P: int) -> tuple[float, int]:
    """CPU seconds and accesses for the decode tokens of a trace."""
    T, L, k = experts.shape
    w = np.ones((1, k), np.float32)
    rows = [[experts[t, layer][None, :] for layer in range(L)] for t in range(P, T)]
    prow = [[probs[t, layer][None, :] for layer in range(L)] for t in range(P, T)]
    n = 0
    t0 = time.thread_time()
    for step, (row, pr) in enumerate(zip(rows, prow)):
        source.begin_step(step)
        for layer in range(L):
            chosen = row[layer]
            source.begin_layer(layer)
            source.routed(layer, chosen, w, pr[layer])
            ids = chosen[0].tolist()
            for j in source.compute_order(layer, ids):
                source.weights(layer, ids[j])
            source.end_layer(layer)
            n += len(ids)
    return time.thread_time() - t0, n


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--model", default=None)
    ap.add_argument("--trace", default=None, help="a routing trace of the model (default: recorded now from 4 generations)")
    ap.add_argument("--slots-per-layer", default="3,4", help="per-layer quotas to time (default 3,4)")
    ap.add_argument("--shared-pool", action="store_true",
                    help="one pool shared by all layers: --slots-per-layer are then the pool's sizes (total slots)")
    ap.add_argument("--evict", default=",".join(policies.names(online_only=True)))
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args()
    model = a.model or moerun.default_model_dir()
    if a.trace:
        trace = read_trace(a.trace)
    else:
        with moerun.load(model) as eng:
            eng.start_trace()
            for i in range(4):
                eng.generate(prompt_ids=[i], max_new=240, sampling=Sampling(temperature=0.8, seed=i))
            trace = eng.finish_trace()
    P = replay.prefill_tokens(trace)
    experts = trace.experts.astype(np.int64)
    probs = trace.probs if trace.probs is not None else np.zeros((*experts.shape[:2], trace.n_experts), np.float32)
    names = [n for n in a.evict.split(",") if n]
    quotas = [int(x) for x in a.slots_per_layer.split(",")]
    store = ModelStore.open(model)
    store.copy_in = lambda layer, expert, dst: 0  # no reads: bookkeeping only
    c = store.config
    base_ns: list[float] = []
    cost: dict = {(n, q): [] for n in names for q in quotas}
    for _ in range(a.repeats):
        secs, acc = drive(NoBookkeeping(None), experts, probs, P)
        base_ns.append(secs / acc * 1e9)
        for q in quotas:
            for n in names:
                if a.shared_pool:
                    fixed = sum(fixed_bytes(c, store.dense_nbytes, store.codec.scratch_bytes()))
                    budget = plan_budget(c, store.dense_nbytes, store.expert_nbytes, fixed + q * slot_bytes(store.expert_nbytes), "shared",
                                         store.codec.scratch_bytes())
                else:
                    budget = plan_budget(c, store.dense_nbytes, store.expert_nbytes, 1 << 40, [q] * c.n_layers)
                pool = ExpertPool(store, budget, n)
                secs, acc = drive(pool, experts, probs, P)
                cost[(n, q)].append(secs / acc * 1e9)
    base = min(base_ns)
    hit = {}
    for q in quotas:
        for n in names:
            counts = replay.replay_counts(trace, n, [q], fast=False, shared=a.shared_pool)[q]
            a_ = sum(x.accesses for x in counts)
            hit[(n, q)] = sum(x.hits for x in counts) / a_ if a_ else None
        counts = replay.replay_counts(replay.shuffled_trace(trace), "lru", [q], shared=a.shared_pool)[q]
        hit[("shuffled", q)] = sum(x.hits for x in counts) / sum(x.accesses for x in counts)
    rows = []
    for q in quotas:
        lru = min(cost[("lru", q)]) - base if ("lru", q) in cost else None
        for n in names:
            us = (min(cost[(n, q)]) - base) / 1e3
            rows.append({"policy": n, "slots_per_layer": q, "us_per_access": us,
                         "over_lru_us": us - lru / 1e3 if lru is not None else None, "hit_rate": hit[(n, q)],
                         "shuffled_lru_hit_rate": hit[("shuffled", q)]})
    doc = {"model": str(model), "pool": "shared" if a.shared_pool else "per-layer", "tokens": int(trace.n_tokens), "decode_tokens": int(trace.n_tokens - P),
           "driver_ns_per_access": base, "repeats": a.repeats, "rows": rows,
           "note": "pool + policy bookkeeping per access, reads replaced by nothing; CPU time of the driving thread"}
    if a.json:
        print(json.dumps(doc, indent=2))
        return 0
    print(f"model {model}; {doc['decode_tokens']} decode tokens of routing; reads replaced by nothing; the driver's own "
          f"{base:.0f} ns per access taken off; best of {a.repeats}, CPU time")
    print(f"{'policy':<8}{'pool' if a.shared_pool else 'slots':>6}{'us/access':>11}{'over lru':>10}{'hit rate':>10}{'shuffled lru':>14}")
    for r in rows:
        print(f"{r['policy']:<8}{r['slots_per_layer']:>6}{r['us_per_access']:>11.2f}{r['over_lru_us']:>+10.2f}"
              f"{100 * r['hit_rate']:>9.1f}%{100 * r['shuffled_lru_hit_rate']:>13.1f}%")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
