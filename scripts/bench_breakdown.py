#!/usr/bin/env python3
"""Where each microsecond of a decode step goes: compute, guess, placement, hand-over, policy, wait.

The engine's own methods are wrapped with timers (exclusive time: a wrapped call
inside another is not counted twice), and each wrapper's own cost, measured at
start, is taken off.  Per decode token:

  compute    everything not listed below: attention, routing, experts, head, sampling
  guess      the guess rule at the prefetch points (GuessRule.top)
  placement  deciding where guesses go (ExpertPool.prefetch, without the hand-over)
  policy     residency bookkeeping and the eviction policy (Residency methods, Policy calls)
  pool       the rest of the pool's expert-source work (routed, compute_order, weights, end_layer)
  hand-over  requests and results between the compute thread and the reader (Reader.submit/poll/promote/...)
  wait       stalls: waiting for an expert's bytes (page-in on this thread, the reader, an emulated link)

Every configuration runs the same prompt and seed; configurations are interleaved and the
best of ``--repeats`` is kept.  The timers add a few per cent, so read this next to
bench_offload.py's untimed tok/s, not instead of it.

It imports ``_bench`` first, before numpy and moerun: one BLAS thread, and the helpers the
benchmarks share.
"""

from __future__ import annotations

import argparse
import functools
import json
import time

import _bench  # first: one BLAS thread before numpy is imported; the shared helpers

import moerun
from moerun import policies
from moerun.model.sampling import Sampling
from moerun.runtime.budget import fixed_bytes, slot_bytes
from moerun.runtime.pool import ExpertPool
from moerun.runtime.prefetch import GuessRule
from moerun.runtime.reader import Reader
from moerun.runtime.residency import Residency

PARTS = ("compute", "guess", "placement", "policy", "pool", "hand-over", "wait")


class Timers:
    """Exclusive time per part, for wrapped methods; a stack keeps nested calls apart."""

    def __init__(self):
        self.ns = dict.fromkeys(PARTS, 0)
        self.calls = dict.fromkeys(PARTS, 0)
        self.stack: list[list] = []
        self.overhead = 0.0

    def wrap(self, part: str, fn):
        @functools.wraps(fn)
        def timed(*a, **k):
            t0 = time.perf_counter_ns()
            self.stack.append([part, 0])
            try:
                return fn(*a, **k)
            finally:
                el = time.perf_counter_ns() - t0
                _, inner = self.stack.pop()
                self.ns[part] += el - inner
                self.calls[part] += 1
                if self.stack:
                    self.stack[-1][1] += el

        return timed

    def reset(self):
        self.ns = dict.fromkeys(PARTS, 0)
        self.calls = dict.fromkeys(PARTS, 0)


TIMERS = Timers()
WRAPPED = {
    "guess": [(GuessRule, "top")],
    "placement": [(ExpertPool, "prefetch")],
    "policy": [(Residency, "access"), (Residency, "victim"), (Residency, "place"), (Residency, "remove")],
    "pool": [(ExpertPool, "routed"), (ExpertPool, "compute_order"), (ExpertPool, "weights"), (ExpertPool, "end_layer"),
             (ExpertPool, "begin_layer")],
    # Reader.wait and wait_any block: their time is a stall, counted in wait
    "hand-over": [(Reader, "submit"), (Reader, "poll"), (Reader, "promote"), (Reader, "cancel"), (Reader, "published")],
}


def install() -> None:
    for part, items in WRAPPED.items():
        for cls, name in items:
            setattr(cls, name, TIMERS.wrap(part, getattr(cls, name)))
    for name in policies.names():  # routed signals and victims of every registered policy
        cls = policies.get(name)
        for meth in ("routed", "victim", "hit", "inserted", "evicted", "admits"):
            if meth in cls.__dict__:
                setattr(cls, meth, TIMERS.wrap("policy", cls.__dict__[meth]))
    # one wrapper's own cost, taken off each counted call
    probe = TIMERS.wrap("compute", lambda: None)
    t0 = time.perf_counter_ns()
    for _ in range(20000):
        probe()
    TIMERS.overhead = (time.perf_counter_ns() - t0) / 20000
    TIMERS.reset()


def run(model, max_new: int, seed: int, **kw) -> dict:
    TIMERS.reset()
    with moerun.load(model, tokenizer=False, **kw) as eng:
        TIMERS.reset()
        gen = eng.generate(prompt_ids=[0], max_new=max_new, sampling=Sampling(temperature=0.8, seed=seed))
        stats = eng.stats
    steps = max(1, gen.decode_steps)
    pool = stats.get("pool", {})
    ns = dict(TIMERS.ns)
    wait = pool.get("stall_s", 0) * 1e9
    calls = sum(TIMERS.calls.values())
    ns["pool"] -= wait  # stalls happen inside weights()
    per = {p: max(0.0, (ns.get(p, 0) - TIMERS.overhead * TIMERS.calls.get(p, 0)) / steps / 1e3) for p in PARTS if p not in ("compute", "wait")}
    per["wait"] = wait / steps / 1e3
    total = gen.decode_ns / steps / 1e3
    per["compute"] = max(0.0, total - sum(per.values()) - TIMERS.overhead * calls / steps / 1e3)
    return {"us_per_token": per, "total_us": total, "timer_us": TIMERS.overhead * calls / steps / 1e3, "hit_rate": pool.get("hit_rate"),
            "tokens": gen.new_ids}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--model", default=None)
    ap.add_argument("--max-new", type=int, default=240)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--link-speed", default=None, help="emulated link (default: the rate where LRU stalls about half the time)")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args()
    model = a.model or moerun.default_model_dir()
    with moerun.load(model, tokenizer=False) as eng:
        st = eng.store
        c = st.config
        d, kv, s = fixed_bytes(c, st.dense_nbytes, st.codec.scratch_bytes())
        per = slot_bytes(st.expert_nbytes)
    n_slots = max(c.n_layers * c.top_k, round(st.expert_total_nbytes / 3 / per))
    cap = d + kv + s + n_slots * per
    if a.link_speed:
        from moerun.units import parse_rate

        rate = parse_rate(a.link_speed)
    else:
        with moerun.load(model, tokenizer=False, mem_cap=cap) as eng:
            gen = eng.generate(prompt_ids=[0], max_new=a.max_new, sampling=Sampling(temperature=0.8, seed=a.seed))
            pool = eng.stats["pool"]
            rate = pool["misses"] * st.expert_nbytes / max(1e-6, (gen.decode_ns - pool["stall_s"] * 1e9) / 1e9)
    install()
    configs = {
        "resident": {},
        "resident+prefetch": {"prefetch": 2},
        "lru": {"mem_cap": cap, "link_speed": rate},
        "lru+prefetch": {"mem_cap": cap, "link_speed": rate, "prefetch": 2},
        "markov": {"mem_cap": cap, "link_speed": rate, "evict": "markov"},
    }
    best: dict = {}
    for _ in range(a.repeats):
        for name, kw in configs.items():
            r = run(model, a.max_new, a.seed, **kw)
            if name not in best or r["total_us"] < best[name]["total_us"]:
                best[name] = r
    doc = {"model": str(model), "cap_bytes": cap, "slots": n_slots, "link_speed_bytes_s": rate, "link_emulated": True,
           "max_new": a.max_new, "repeats": a.repeats, "timer_overhead_ns_per_call": TIMERS.overhead,
           "configurations": {k: {kk: vv for kk, vv in v.items() if kk != "tokens"} for k, v in best.items()}}
    if a.json:
        print(json.dumps(doc, indent=2))
        return 0
    print(f"us per decode token, best of {a.repeats} interleaved; cap {n_slots} slots, link {rate / 1e9:.2f} GB/s (emulated); "
          f"{a.max_new} tokens; {_bench.BLAS_NOTE}; timer cost {TIMERS.overhead:.0f} ns per call, taken off")
    print(f"{'configuration':<19}" + "".join(f"{p:>10}" for p in PARTS) + f"{'timers':>9}{'total':>9}{'hit rate':>10}")
    for name, r in best.items():
        u = r["us_per_token"]
        hr = r["hit_rate"]
        print(f"{name:<19}" + "".join(f"{u[p]:>10.1f}" for p in PARTS) + f"{r['timer_us']:>9.1f}{r['total_us']:>9.1f}"
              + (f"{100 * hr:>9.1f}%" if hr is not None else f"{'':>10}"))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
