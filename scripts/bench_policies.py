#!/usr/bin/env python3
"""What an eviction policy costs per expert access in the live pool (moerun/runtime/pool.py), measured.

The pool is driven with the routing of a recorded trace exactly as the model drives it
(begin_layer, routed, compute_order, weights, end_layer per layer and decode token), with
every read replaced by nothing, so what is timed is the pool's bookkeeping and the policy's.
The same loop over a source that does no bookkeeping is timed too and taken off.  CPU time of
this thread, best of ``--repeats``, policies interleaved.  Replay hit rates of the same trace
are printed beside the costs, with the time-shuffled baseline, so a cost can be weighed against
what it buys.

``--breakdown`` shows where the time of an access goes instead, per policy: the model's calls alone
(the driver), the pool's own bookkeeping (events, slot states, counters, compute_order, weights,
end_layer), the decision core and the residency (pinning, the access loop, candidate lists, the calls
into the policy's hooks), and the policy's own work per hook.  Each part is measured by subtraction
over whole runs (the pool; the core alone with the policy; the core alone with a policy that replays
the same victims and does nothing else), and the policy's work by replaying its recorded calls on a
fresh policy, each call timed (the timer's own cost taken off).

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


class Scripted(policies.Policy):
    """Makes the victims another policy made, and nothing else: what is left is the core's own cost."""

    name = "scripted"

    def __init__(self, victims):
        self._next = iter(victims).__next__

    def victim(self, candidates, now):
        return self._next()

    def pick(self, resident, pinned, busy, now):  # where the interface has it: no candidate list either
        return self._next()


class ScriptedRouted(Scripted):
    """As Scripted, for a policy that listens to ``routed`` (the core then calls it)."""

    def routed(self, layer, chosen, probs, now):
        pass


HOOKS = ("routed", "hit", "inserted", "evicted", "victim")


def record_calls(policy, log: list) -> None:
    """Log every hook call of ``policy`` (its own methods, shadowed on the instance) as (hook, args, result).
    The victim hook is ``pick`` where the policy interface has it (what the residency calls), else ``victim``."""
    for hook in HOOKS:
        if hook == "routed" and type(policy).routed is policies.Policy.routed:
            continue
        attr = "pick" if hook == "victim" and hasattr(policy, "pick") else hook
        f = getattr(policy, attr)

        def logged(*args, _f=f, _hook=hook, _attr=attr):
            out = _f(*args)
            if _attr == "pick":
                log.append((_hook, (list(args[0]), tuple(args[1]), set(args[2]), args[3]), out))
            elif _hook == "victim":
                log.append((_hook, (list(args[0]), args[1]), out))
            elif _hook == "routed":
                log.append((_hook, (args[0], list(args[1]), args[2].copy() if args[2] is not None else None, args[3]), out))
            else:
                log.append((_hook, args, out))
            return out

        setattr(policy, attr, logged)


def distinct_policies(core) -> list:
    """The policies of a core's residencies, each once (a shared pool has one), in layer order."""
    out = []
    for r in core.res_of:
        if all(p is not r.policy for p in out):
            out.append(r.policy)
    return out


def drive_core(core, experts: np.ndarray, probs: np.ndarray, P: int) -> float:
    """CPU seconds of the decision core alone (route + serve, as the pool calls it) over the decode tokens."""
    T, L, _ = experts.shape
    rows = [[experts[t, layer].tolist() for layer in range(L)] for t in range(P, T)]
    prow = [[probs[t, layer] for layer in range(L)] for t in range(P, T)]
    step = core.step
    t0 = time.thread_time()
    for row, pr in zip(rows, prow):
        for layer in range(L):
            step(layer, row[layer], pr[layer])
            core.pinned = ()
    return time.thread_time() - t0


def replay_calls(policy, log: list) -> dict[str, float]:
    """The calls of ``log`` on a fresh ``policy``: ns per hook, each call timed (the timer's cost taken
    off).  Checks each victim is the recorded one."""
    calls = [(hook, getattr(policy, "pick" if hook == "victim" and len(args) == 4 else hook), args, out) for hook, args, out in log]
    pc = time.perf_counter_ns

    def nothing(*args):
        return None

    over = []
    for _ in range(3):
        t0 = pc()
        for _hook, _f, args, _ in calls:
            a = pc()
            nothing(*args)
            b = pc()
        over.append((pc() - t0) / max(len(calls), 1))
    del a, b
    # the timer pair and the empty call of each timed call: measured as the untimed loop's cost subtracted
    t0 = pc()
    for _hook, _f, args, _ in calls:
        nothing(*args)
    bare = (pc() - t0) / max(len(calls), 1)
    timer = min(over) - bare
    per = dict.fromkeys(HOOKS, 0.0)
    for hook, f, args, out in calls:
        a = pc()
        got = f(*args)
        b = pc()
        per[hook] += b - a - timer
        if hook == "victim" and got != out:
            raise SystemExit(f"{policy.name}: replayed victim {got} differs from the recorded {out}")
    return per


def make_pool(store, c, q, n, shared):
    if shared:
        fixed = sum(fixed_bytes(c, store.dense_nbytes, store.codec.scratch_bytes()))
        budget = plan_budget(c, store.dense_nbytes, store.expert_nbytes, fixed + q * slot_bytes(store.expert_nbytes), "shared",
                             store.codec.scratch_bytes())
    else:
        budget = plan_budget(c, store.dense_nbytes, store.expert_nbytes, 1 << 40, [q] * c.n_layers)
    return ExpertPool(store, budget, n)


def scripted(core, logs: list) -> None:
    """Give ``core`` policies that replay the victims of ``logs`` (one log per distinct policy)."""
    cls = ScriptedRouted if core.signals else Scripted
    swap = {id(pol): cls([got for hook, _, got in log if hook == "victim"]) for pol, log in zip(distinct_policies(core), logs)}
    for r in {id(r): r for r in core.res_of}.values():
        r.policy = swap[id(r.policy)]


def breakdown(store, experts, probs, P, names, q, shared, repeats) -> list[dict]:
    """Where an access's time goes, per policy (ns per access; best of ``repeats`` for each run).

    pool own = (the pool with a scripted policy) - driver - (the core alone with the scripted policy);
    core = the core alone with the scripted policy (what is left of it: pinning, the access loop, the
    candidate lists, calls into hooks that do nothing); policy = the pool with the policy - the pool with
    the scripted policy; and the policy's hooks replayed alone, each call timed."""
    c = store.config
    T, L, k = experts.shape
    acc = (T - P) * L * k
    out = []
    for n in names:
        # the policy's calls, logged in a first run of the core alone
        core = make_pool(store, c, q, n, shared).core
        logs = []
        for pol in distinct_policies(core):
            logs.append([])
            record_calls(pol, logs[-1])
        drive_core(core, experts, probs, P)
        best = dict.fromkeys(("driver", "pool", "pool_scripted", "core_scripted"), float("inf"))
        hooks: dict[str, float] = {}
        for _ in range(repeats):
            best["driver"] = min(best["driver"], drive(NoBookkeeping(None), experts, probs, P)[0])
            pool = make_pool(store, c, q, n, shared)
            best["pool"] = min(best["pool"], drive(pool, experts, probs, P)[0])
            pool = make_pool(store, c, q, n, shared)
            scripted(pool.core, logs)
            best["pool_scripted"] = min(best["pool_scripted"], drive(pool, experts, probs, P)[0])
            core = make_pool(store, c, q, n, shared).core
            scripted(core, logs)
            best["core_scripted"] = min(best["core_scripted"], drive_core(core, experts, probs, P))
            per = dict.fromkeys(HOOKS, 0.0)
            for pol, log in zip(distinct_policies(make_pool(store, c, q, n, shared).core), logs):
                got = replay_calls(pol, log)
                for h in HOOKS:
                    per[h] += got[h]
            for h in HOOKS:
                hooks[h] = min(hooks.get(h, float("inf")), per[h])
        ns = {key: v / acc * 1e9 for key, v in best.items()}
        row = {"policy": n, "slots_per_layer": q, "driver_ns": ns["driver"],
               "pool_own_ns": ns["pool_scripted"] - ns["driver"] - ns["core_scripted"], "core_ns": ns["core_scripted"],
               "policy_ns": ns["pool"] - ns["pool_scripted"], "total_ns": ns["pool"] - ns["driver"]}
        row.update({f"{h}_ns": hooks[h] / acc for h in HOOKS})
        row["hooks_ns"] = sum(hooks.values()) / acc
        out.append(row)
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--model", default=None)
    ap.add_argument("--trace", default=None, help="a routing trace of the model (default: recorded now from 4 generations)")
    ap.add_argument("--slots-per-layer", default="3,4", help="per-layer quotas to time (default 3,4)")
    ap.add_argument("--shared-pool", action="store_true",
                    help="one pool shared by all layers: --slots-per-layer are then the pool's sizes (total slots)")
    ap.add_argument("--evict", default=",".join(policies.names(online_only=True)))
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--breakdown", action="store_true",
                    help="where an access's time goes (driver, pool, core, policy by hook) instead of the cost table")
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
    if a.breakdown:
        rows = [r for q in quotas for r in breakdown(store, experts, probs, P, names, q, a.shared_pool, a.repeats)]
        doc = {"model": str(model), "pool": "shared" if a.shared_pool else "per-layer", "decode_tokens": int(trace.n_tokens - P),
               "repeats": a.repeats, "rows": rows,
               "note": "ns per access, CPU time, best of repeats; pool_own = pool - driver - core with the policy; core = the "
                       "core with a policy replaying the victims; policy = core with the policy - that; hooks: the policy's "
                       "recorded calls replayed alone, each timed"}
        if a.json:
            print(json.dumps(doc, indent=2))
            return 0
        print(f"model {model}; {doc['decode_tokens']} decode tokens; ns per access, CPU time, best of {a.repeats}")
        print(f"{'policy':<8}{'pool' if a.shared_pool else 'slots':>6}{'driver':>8}{'pool own':>10}{'core':>7}{'policy':>8}"
              + f"{'total':>8} | alone:" + "".join(f"{h:>9}" for h in HOOKS) + f"{'hooks':>7}")
        for r in rows:
            print(f"{r['policy']:<8}{r['slots_per_layer']:>6}{r['driver_ns']:>8.0f}{r['pool_own_ns']:>10.0f}{r['core_ns']:>7.0f}"
                  f"{r['policy_ns']:>8.0f}{r['total_ns']:>8.0f} |       " + "".join(f"{r[h + '_ns']:>9.0f}" for h in HOOKS)
                  + f"{r['hooks_ns']:>7.0f}")
        return 0
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
