"""Counting a replay: hits and misses per layer, per quota or per shared pool; the time-shuffled and random baselines."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from moerun import policies
from moerun.errors import BadTrace
from moerun.files.trace import Trace
from moerun.policies import Policy
from moerun.sim.fast import layer_misses
from moerun.sim.steps import LayerPlan, layer_plans, prefill_tokens, shared_plan


@dataclass
class Counts:
    accesses: int = 0
    misses: int = 0
    prefill_loads: int = 0

    @property
    def hits(self) -> int:
        return self.accesses - self.misses

    @property
    def hit_rate(self) -> float | None:
        return self.hits / self.accesses if self.accesses else None

    def __add__(self, other: Counts) -> Counts:
        return Counts(self.accesses + other.accesses, self.misses + other.misses, self.prefill_loads + other.prefill_loads)


def count_layer(plan: LayerPlan, miss: np.ndarray) -> Counts:
    counted = plan.counted_per_access()
    return Counts(int(counted.sum()), int((miss & counted).sum()), int((miss & ~counted).sum()))


def count_shared(plan: LayerPlan, miss: np.ndarray, n_layers: int) -> list[Counts]:
    """One ``Counts`` per layer of a shared plan's miss flags."""
    counted = plan.counted_per_access()
    layer = plan.access_layers()

    def per_layer(flags: np.ndarray) -> list[int]:
        return np.bincount(layer[flags], minlength=n_layers).tolist()

    acc, mis, pre = per_layer(counted), per_layer(miss & counted), per_layer(miss & ~counted)
    return [Counts(acc[i], mis[i], pre[i]) for i in range(n_layers)]


def replay_counts(
    trace: Trace,
    policy: str | type[Policy],
    capacities: Sequence[int],
    fast: bool = True,
    plans: list[LayerPlan] | None = None,
    shared: bool = False,
) -> dict[int, list[Counts]]:
    """Per quota, one ``Counts`` per layer: each layer's own quota of that many slots, or with
    ``shared`` one pool of that many slots for all layers (``shared_counts``)."""
    if shared:
        return shared_counts(trace, policy, capacities, fast, plans[0] if plans else None)
    cls = policies.get(policy) if isinstance(policy, str) else policy
    plans = plans if plans is not None else layer_plans(trace)
    out: dict[int, list[Counts]] = {c: [] for c in capacities}
    for plan in plans:
        m = layer_misses(plan, cls, capacities, fast)
        for c in capacities:
            out[c].append(count_layer(plan, m[c]))
    return out


def shared_counts(
    trace: Trace, policy: str | type[Policy], totals: Sequence[int], fast: bool = True, plan: LayerPlan | None = None
) -> dict[int, list[Counts]]:
    """One pool of ``total`` slots shared by all layers, for each total: one ``Counts`` per layer
    (accesses, misses and prefill loads of that layer's experts in the shared pool).

    Accesses come in the live engine's order (``shared_plan``); the policy is made as the live pool
    makes it (``n_layers * n_experts`` keys, ``shared_experts = n_experts``), so with prefetch off the
    counts equal a live run's with ``split="shared"``.  ``plan`` reuses a ``shared_plan(trace)``.
    """
    cls = policies.get(policy) if isinstance(policy, str) else policy
    plan = plan if plan is not None else shared_plan(trace)
    m = layer_misses(plan, cls, totals, fast)
    return {c: count_shared(plan, m[c], trace.n_layers) for c in totals}


# ---------------------------------------------------------------------------- baselines


def shuffled_trace(trace: Trace, seed: int = 0) -> Trace:
    """The decode tokens in a seeded random order (each expert keeps its popularity)."""
    P = prefill_tokens(trace)
    rng = np.random.default_rng(seed)
    perm = P + rng.permutation(trace.n_tokens - P)
    experts = np.concatenate([trace.experts[:P], trace.experts[perm]])
    probs = np.concatenate([trace.probs[:P], trace.probs[perm]]) if trace.probs is not None else None
    return Trace(experts, meta=dict(trace.meta), probs=probs)


# Above this many experts per layer the random baseline draws each row's experts by ``Generator.choice``
# (work per row by its top_k, not by the expert count a trace may declare); at or below it, one random key per
# expert, as always (the same draws, so the same baseline figures as before).
RANDOM_BY_CHOICE = 4096


def random_routing_trace(trace: Trace, n_experts: int, seed: int = 0) -> Trace:
    """Each decode token and layer picks as many distinct experts as the trace, uniformly (seeded)."""
    P = prefill_tokens(trace)
    rng = np.random.default_rng(seed)
    experts = trace.experts.copy()
    dec = experts[P:]
    T, L, k = dec.shape
    rows = dec.reshape(-1, k)  # (token, layer) rows, in the order the draws were always made
    if rows.shape[0] and k > n_experts:
        raise BadTrace(f"top_k {k} exceeds n_experts {n_experts}")
    n_valid = (rows >= 0).sum(axis=-1)
    keep = np.arange(k)[None, :] < n_valid[:, None]
    if n_experts > RANDOM_BY_CHOICE:
        picks = np.array([np.sort(rng.choice(n_experts, size=k, replace=False)) for _ in range(rows.shape[0])],
                         np.int64).reshape(-1, k)
        rows[:] = np.where(keep, picks, -1)
        return Trace(experts, meta=dict(trace.meta))
    chunk = max(1, (1 << 22) // max(1, n_experts))
    for r0 in range(0, rows.shape[0], chunk):
        r1 = min(rows.shape[0], r0 + chunk)
        # the k smallest of the keys, as a set (their order is sorted away): the first k of an argsort
        picks = np.argpartition(rng.random((r1 - r0, n_experts)), k - 1, axis=-1)[:, :k]
        picks = np.sort(picks, axis=-1)
        rows[r0:r1] = np.where(keep[r0:r1], picks, -1)
    return Trace(experts, meta=dict(trace.meta))
