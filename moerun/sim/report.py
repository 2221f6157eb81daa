"""Replay routing traces through the eviction policies: the report of ``moerun replay``.

The work is split by concern: ``replay_plan`` (the access schedule, the shared plan and ``walk``,
the one step loop), ``replay_fast`` (the fast miss counters), ``replay_counts`` (counts and
baselines) and ``replay_prefetch`` (prefetch replay).  This module holds the options' parsers and
the whole report; the names below are imported here for callers of the report's building blocks.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from moerun import policies
from moerun.errors import BadInput, BadOption, BadTrace
from moerun.files.trace import Trace
from moerun.runtime.decisions import hottest
from moerun.sim.counts import (
    Counts,
    count_layer,
    count_shared,
    random_routing_trace,
    replay_counts,
    shared_counts,
    shuffled_trace,
)
from moerun.sim.fast import FAST_PATHS, layer_misses
from moerun.sim.prefetch import RECALL_GUESSES, RECALL_LOOKAHEAD, PrefetchCounts, prefetch_recall, simulate_prefetch
from moerun.sim.steps import (
    LayerPlan,
    compact,
    generic_misses,
    layer_plans,
    plan_decisions,
    plan_policy,
    prefill_tokens,
    shared_plan,
    used_ids,
    walk,
    warm_plans,
)

__all__ = ["DEFAULT_POLICIES", "FAST_PATHS", "RECALL_GUESSES", "RECALL_LOOKAHEAD", "Counts", "LayerPlan", "PrefetchCounts", "compact", "count_layer",
           "count_shared", "default_slots", "describe", "generic_misses", "layer_misses", "layer_plans", "overall", "parse_policies",
           "parse_slots", "plan_policy", "prefetch_recall", "prefill_tokens", "random_routing_trace", "replay_counts",
           "residency_picture", "run_replay", "shared_counts", "shared_slots", "shared_plan", "shuffled_trace", "simulate_prefetch", "used_ids",
           "walk"]

DEFAULT_POLICIES = ["lru", "lfu", "fifo", "optimal"]


MAX_QUOTAS = 4096


def parse_slots(text: str) -> list[int]:
    """``1,2,4`` or ``1-8`` (or a mix) into a sorted list of quotas (at most MAX_QUOTAS of them)."""
    out: set[int] = set()
    for part in str(text).split(","):
        part = part.strip()
        if not part:
            continue
        try:
            if "-" in part:
                lo, hi = (int(x) for x in part.split("-", 1))
                if lo > hi:
                    raise ValueError
                if hi - lo >= MAX_QUOTAS:  # refused before a range of 10^8 quotas is ever built
                    raise BadOption(f"--slots range {part} holds {hi - lo + 1} quotas; at most {MAX_QUOTAS} can be replayed")
                out.update(range(lo, hi + 1))
            else:
                out.add(int(part))
        except ValueError:
            raise BadOption(f"--slots takes whole numbers and ranges like 1,2,4 or 1-8, got {text!r}") from None
        if len(out) > MAX_QUOTAS:
            break
    if not out:
        raise BadOption("--slots is empty")
    if min(out) < 1:
        raise BadOption("--slots must be 1 or more per layer")
    if len(out) > MAX_QUOTAS:
        raise BadOption(f"--slots lists more than {MAX_QUOTAS} quotas")
    return sorted(out)


def default_slots(n_experts: int) -> list[int]:
    if n_experts <= 16:
        return list(range(1, n_experts + 1))
    out, c = [], 1
    while c < n_experts:
        out.append(c)
        c *= 2
    return out + [n_experts]


def shared_slots(n_keys: int) -> list[int]:
    """Default sizes of a pool shared by all layers: 10%, 25%, 50% and all of its ``n_keys`` experts."""
    return sorted({max(1, round(f * n_keys)) for f in (0.1, 0.25, 0.5)} | {n_keys})


def parse_policies(text: str) -> list[str]:
    out = []
    for name in str(text).split(","):
        name = name.strip()
        if name:
            policies.get(name)
            if name not in out:
                out.append(name)
    if not out:
        raise BadOption("--evict is empty")
    return out


def _record(layer, policy: str, slots: int, c: Counts, expert_bytes: int | None) -> dict:
    d = {
        "layer": layer,
        "policy": policy,
        "slots": slots,
        "accesses": c.accesses,
        "hits": c.hits,
        "misses": c.misses,
        "hit_rate": c.hit_rate,
        "prefill_loads": c.prefill_loads,
        "bytes_moved": (c.misses + c.prefill_loads) * expert_bytes if expert_bytes is not None else None,
    }
    if isinstance(c, PrefetchCounts):
        d.update(
            {
                "prefetch_hits": c.prefetch_hits,
                "guesses": c.guesses,
                "prefetch_loads": c.loads,
                "wasted": c.wasted,
                "bytes_moved": (c.misses + c.prefill_loads + c.loads) * expert_bytes if expert_bytes is not None else None,
            }
        )
    return d


def _records(policy: str, per_c: dict[int, list[Counts]], expert_bytes: int | None) -> list[dict]:
    out = []
    for c, layers in per_c.items():
        for layer, cnt in enumerate(layers):
            out.append(_record(layer, policy, c, cnt, expert_bytes))
        total = layers[0]
        for cnt in layers[1:]:
            total = total + cnt
        out.append(_record("all", policy, c, total, expert_bytes))
    return out


def describe(trace: Trace) -> dict:
    P = prefill_tokens(trace)
    valid = trace.experts >= 0
    return {
        "tokens": trace.n_tokens,
        "layers": trace.n_layers,
        "top_k": trace.top_k,
        "n_experts": trace.n_experts,
        "prefill_tokens": P,
        "decode_accesses": int(valid[P:].sum()),
        "source": trace.meta.get("source"),
        "partial": bool(trace.meta.get("partial", False)),
        "has_guesses": trace.guesses is not None,
    }


def run_replay(
    trace: Trace,
    policy_names: Sequence[str] = DEFAULT_POLICIES,
    slots: Sequence[int] | None = None,
    expert_bytes: int | None = None,
    seed: int = 0,
    prefetch: tuple[int, int] | None = None,
    baselines: bool = True,
    fast: bool = True,
    progress: Callable[[int, int, str], None] | None = None,
    shared: bool = False,
    warm=None,
) -> dict:
    """Everything ``moerun replay`` reports, as one JSON-ready document.

    ``shared``: one pool shared by all layers, ``slots`` its sizes (default: 10%, 25%, 50% and all of
    the experts), replayed in the live engine's order; otherwise ``slots`` are per-layer quotas.
    ``warm``: a routing profile (moerun.files.profile.Profile): every pool of the policies replayed (with
    prefetch too) is filled from it first (``Decisions.warm``); the baselines start empty."""
    if trace.n_tokens == 0:
        raise BadTrace("the trace holds no tokens")
    E = trace.n_experts
    slots = list(slots) if slots else shared_slots(trace.n_layers * E) if shared else default_slots(E)
    if shared and max(slots) > trace.n_layers * E:
        raise BadOption(f"--slots of a shared pool must be at most the trace's {trace.n_layers * E} experts")
    if not shared and max(slots) > E:
        raise BadOption(f"--slots {max(slots)} is more than the {E} experts a layer of this trace has; "
                        f"a layer holds at most {E} (try --slots 1-{E})")
    if expert_bytes is None:
        eb = trace.meta.get("expert_bytes")
        expert_bytes = eb if isinstance(eb, int) and not isinstance(eb, bool) and eb > 0 else None
    full = trace
    keep = warm_ids(warm, trace) if warm is not None else None
    trace = compact(trace, keep)  # the state of every policy and pool is sized by the experts the trace uses
    plans = [shared_plan(trace)] if shared else layer_plans(trace)
    if warm is not None:
        used = used_ids(full) if keep is None else np.union1d(used_ids(full), keep)  # compact's renumbering
        warm_plans(plans, hottest(warm.counts[:, used] if used.size else warm.counts[:, :0]))
    units = len(policy_names) + (2 if baselines else 0) + (len([p for p in policy_names if getattr(policies.get(p), "online", True)]) * len(slots) if prefetch else 0)
    done = 0

    def tick(label: str) -> None:
        nonlocal done
        done += 1
        if progress is not None:
            progress(done, units, label)

    results = []
    for name in policy_names:
        results += _records(name, replay_counts(trace, name, slots, fast, plans, shared), expert_bytes)
        tick(name)
    doc: dict = {
        "trace": describe(full),
        "slots": slots,
        "split": "shared" if shared else "even",  # as the engine's budget says it (quotas: the same slots per layer)
        "policies": list(policy_names),
        "expert_bytes": expert_bytes,
        "results": results,
    }
    if warm is not None:
        doc["warm_from"] = warm_json(warm)
    if baselines:
        base = []
        for label, make in (
            ("shuffled", lambda: shuffled_trace(trace, seed)),
            ("random", lambda: compact(random_routing_trace(full, E, seed))),
        ):
            recs = _records("lru", replay_counts(make(), "lru", slots, fast, shared=shared), expert_bytes)
            for r in recs:
                r["baseline"] = label
            base += recs
            tick(label)
        doc["baselines"] = base
        doc["baseline_seed"] = seed
    doc["prefetch_recall"] = prefetch_recall(full)
    doc["prefetch"], doc["lookahead"] = prefetch if prefetch is not None else (0, 1)  # the engine's options' spelling
    if prefetch is not None:
        n, la = prefetch
        pf = []
        for name in policy_names:
            cls = policies.get(name)
            if not getattr(cls, "online", True):
                continue
            for c in slots:
                per_layer = simulate_prefetch(trace, cls, c, n, la, plans, shared)
                pf += _records(name, {c: per_layer}, expert_bytes)
                tick(f"{name} prefetch")
        doc["prefetch_results"] = pf
    return doc


def warm_ids(warm, trace: Trace) -> np.ndarray:
    """The expert ids a warm start can fill (used at all in the profile), once the profile is checked against the
    trace: the same layers and top_k, and at least the experts the trace names (BadInput otherwise)."""
    m = warm.model
    if warm.layers != trace.n_layers or m.get("top_k") != trace.top_k or warm.experts < trace.n_experts:
        raise BadInput(f"{warm.where()}: a profile of another model ({warm.layers} layers, top_{m.get('top_k')} of "
                       f"{warm.experts}; the trace: {trace.n_layers} layers, top_{trace.top_k} of {trace.n_experts})")
    return np.nonzero(warm.counts.sum(axis=0) > 0)[0]


def warm_json(warm) -> dict:
    """What a result says of the profile a warm start came from."""
    return {"file": warm.path, "source": warm.source.get("kind"), "text": warm.source.get("file"),
            "tokens": warm.source.get("tokens"), "used": int((warm.counts > 0).sum())}


def overall(records: list[dict], policy: str | None = None, baseline: str | None = None) -> dict[int, dict]:
    """The ``layer == "all"`` records of one policy (or baseline) by quota."""
    return {
        r["slots"]: r
        for r in records
        if r["layer"] == "all" and (policy is None or r["policy"] == policy) and (baseline is None or r.get("baseline") == baseline)
    }


def residency_picture(trace: Trace, layer: int, policy: str, capacity: int, t0: int, t1: int, shared: bool = False) -> np.ndarray:
    """[n_experts, t1 - t0] codes for tokens t0..t1-1 of one layer after each of its steps, by the generic
    path (``shared``: the layer's experts in one pool of ``capacity`` slots for all layers):
    0 absent, 1 resident, 2 used and resident before (hit), 3 used and loaded (miss)."""
    full_E = trace.n_experts
    dense = compact(trace)  # the policy's state sized by the experts the trace uses; rows put back below
    used = used_ids(trace) if dense is not trace else None
    trace = dense
    plan = shared_plan(trace) if shared else layer_plans(trace)[layer]
    core = plan_decisions(plan, policies.get(policy), capacity)
    res = core.res_of[0]
    keys, tokens, counted = plan.keys.tolist(), plan.token.tolist(), plan.counted.tolist()
    step_layer = plan.layers.tolist() if shared else None
    E = trace.n_experts
    base = layer * E if shared else 0
    pic = np.zeros((E, t1 - t0), np.int8)
    for s, a, b, served in walk(plan, core):
        t = tokens[s]
        if t >= t1:
            break
        if counted[s] and t >= t0 and (step_layer is None or step_layer[s] == layer):
            col = pic[:, t - t0]
            col[:] = 0
            for k in res.slot_of:
                if 0 <= k - base < E:
                    col[k - base] = 1
            for k, (hit, _, _) in zip(keys[a:b], served):
                if 0 <= k - base < E:
                    col[k - base] = 2 if hit else 3
    if used is None:
        return pic
    out = np.zeros((full_E, t1 - t0), np.int8)
    out[used] = pic[: used.size]
    return out
