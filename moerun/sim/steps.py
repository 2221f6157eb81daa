"""The access schedule of a replay and its one step loop: per-layer plans, the shared plan, ``walk``.

What a replay does (docs/guide/traces.md has the long form):

- Every layer has its own quota of ``slots`` experts and starts empty, as the
  live pool does under a cap with per-layer quotas; or (``shared_plan``) one
  pool serves every layer, in the order the live engine accesses it.
- The first ``prefill_tokens`` tokens (trace meta, default 0) are one prefill
  block: per layer, each distinct expert of those tokens is accessed once, in
  ascending id, pinned alone.  These loads are counted as ``prefill_loads``,
  not as accesses or misses (the live pool counts them the same way).
- Every later token is a decode step: per layer, its chosen experts are
  accessed in ascending id with all of them pinned, so none of them can evict
  another.  When the quota is smaller than the number of chosen experts (the
  live pool refuses that), they are accessed one after another, each pinned
  alone.

A replay is a list of *steps* per pool (``LayerPlan``): the accesses of one
step share one pinned set.  The source of truth is ``generic_misses``, which
drives the live pool's decision core (``moerun.runtime.decisions``) with a
policy object from ``moerun.policies``, exactly the objects the live pool
uses, through ``walk``.  The fast paths of
``moerun.sim.fast`` give the same hits and misses.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from moerun.errors import BadTrace
from moerun.files.trace import Trace
from moerun.policies import Policy, make_policy
from moerun.runtime.decisions import Decisions
from moerun.runtime.residency import Residency


@dataclass
class LayerPlan:
    """The accesses of one pool in order, grouped into steps that share a pinned set: one layer's
    quota (keys are expert ids), or the pool shared by all layers (``shared_plan``: keys are
    ``layer * shared_experts + expert`` and ``layers`` says whose step each one is)."""

    keys: np.ndarray  # int [n] keys in access order
    sizes: np.ndarray  # int [n_steps] accesses per step
    counted: np.ndarray  # bool [n_steps]: a decode access (counted) or a prefill load (not counted)
    token: np.ndarray  # int [n_steps] token index of each step
    layer: int = 0  # the layer these accesses belong to (for ``Policy.routed``); unused in a shared plan
    # the router probabilities, if the trace has them: float32 [tokens, n_experts] of ``layer``, or
    # [tokens, layers, n_experts] in a shared plan
    probs: np.ndarray | None = None
    layers: np.ndarray | None = None  # int [n_steps] the layer of each step (a shared plan), None: ``layer``
    shared_experts: int = 0  # a shared plan: experts per layer (key = layer * shared_experts + expert); 0 otherwise
    n_experts: int = 0  # a layer's plan: the experts of its layer, guesses included (0: not known)
    # a warm start (``warm_plans``): the (layer, expert) pairs of a profile, hottest first, that this pool is filled
    # from before its first step (``Decisions.warm``); None: it starts empty
    warm: list | None = None

    @property
    def n(self) -> int:
        return int(self.keys.shape[0])

    @property
    def n_steps(self) -> int:
        return int(self.sizes.shape[0])

    @functools.cached_property
    def starts(self) -> np.ndarray:
        """int64 [n_steps + 1] offsets of the steps in ``keys``."""
        starts = np.zeros(self.n_steps + 1, np.int64)
        np.cumsum(self.sizes, out=starts[1:])
        return starts

    @functools.cached_property
    def uniform(self) -> int:
        """m when every step has m > 0 accesses, else 0."""
        if self.n_steps == 0 or self.sizes[0] <= 0:
            return 0
        return int(self.sizes[0]) if (self.sizes == self.sizes[0]).all() else 0

    def counted_per_access(self) -> np.ndarray:
        return np.repeat(self.counted, self.sizes)

    def split(self, capacity: int) -> LayerPlan:
        """The same accesses with every step larger than ``capacity`` split into single accesses."""
        big = self.sizes > capacity
        if not big.any():
            return self
        n_each = np.where(big, self.sizes, 1)
        sizes = np.where(np.repeat(big, n_each), 1, np.repeat(self.sizes, n_each))
        layers = np.repeat(self.layers, n_each) if self.layers is not None else None
        return LayerPlan(self.keys, sizes, np.repeat(self.counted, n_each), np.repeat(self.token, n_each), self.layer, self.probs,
                         layers, self.shared_experts, self.n_experts, self.warm)

    @property
    def n_keys(self) -> int:
        """Size of the key space (a policy's per-key lists)."""
        if self.shared_experts:
            return (int(self.layers.max(initial=0)) + 1) * self.shared_experts  # every layer has a step per token
        return max(int(self.keys.max(initial=-1)), max((e for _, e in self.warm or ()), default=-1)) + 1

    @property
    def key_space(self) -> int | None:
        """Keys its pool can ever hold, guesses included (None: not known): a pool of more slots never evicts."""
        if self.shared_experts:
            return self.n_keys
        return max(self.n_keys, self.n_experts) if self.n_experts else None

    def access_layers(self) -> np.ndarray:
        """int [n] the layer of each access."""
        if self.layers is None:
            return np.full(self.n, self.layer, np.int64)
        return np.repeat(self.layers, self.sizes)


def prefill_tokens(trace: Trace) -> int:
    """The trace's prefill block length (meta ``prefill_tokens``, default 0), validated."""
    p = trace.meta.get("prefill_tokens", 0)
    if p is None:
        return 0
    if isinstance(p, bool) or not isinstance(p, int) or not 0 <= p <= trace.n_tokens:
        raise BadTrace(f"meta prefill_tokens must be a whole number from 0 to the trace's {trace.n_tokens} tokens, got {p!r}")
    return p


def used_ids(trace: Trace) -> np.ndarray:
    """The expert ids a trace routes to or guesses, ascending."""
    parts = [trace.experts[trace.experts >= 0]]
    if trace.guesses is not None:
        parts.append(trace.guesses[trace.guesses >= 0])
    return np.unique(np.concatenate(parts))


def compact(trace: Trace, keep: np.ndarray | None = None) -> Trace:
    """The trace with its expert ids renumbered 0..U-1 in ascending order, U the ids it routes to or guesses
    (``meta.n_experts`` becomes U; ``probs`` keeps those columns); the trace itself when it uses every id.

    A replay's state is then sized by what the trace holds, never by the expert count it declares (a trace of
    8 KB may declare 2**20 experts).  The counts are unchanged: the renumbering keeps the order of the ids,
    which is all that a policy's tie-breaks and the access order read (``orbit`` buckets its decisions by
    labels of first use, not by id), tests/sim/test_replay.py checks it for every policy and both pool kinds.
    ``keep``: more ids to keep (a warm start's), whether the trace uses them or not.
    """
    ex = trace.experts
    used = used_ids(trace)
    if keep is not None and keep.size:
        used = np.union1d(used, keep)
    if used.size == trace.n_experts and (used.size == 0 or used[-1] == used.size - 1):
        return trace
    lut = np.full(int(used[-1]) + 2 if used.size else 1, -1, np.int64)  # lut[-1]: the padding stays -1
    lut[used] = np.arange(used.size)

    def relabel(a):
        return None if a is None else np.where(a >= 0, lut[a], -1)

    probs = trace.probs[:, :, used] if trace.probs is not None else None
    meta = dict(trace.meta, n_experts=max(int(used.size), 1))
    return Trace(relabel(ex), trace.weights, relabel(trace.guesses), meta, trace.events, probs)


def _key_dtype(experts: np.ndarray):
    top = int(experts.max(initial=0))
    return np.int16 if top < 2**15 else np.int32 if top < 2**31 else np.int64


def _rows(experts: np.ndarray, dt) -> tuple[np.ndarray, np.ndarray]:
    """Rows sorted ascending with padding dropped: (keys in row order, count per row)."""
    T, k = experts.shape
    if k == 1 or (experts[:, 1:] > experts[:, :-1]).all():
        if T == 0 or experts[:, 0].min() >= 0:  # ascending and unpadded already (every live trace)
            return experts.astype(dt).reshape(-1), np.full(T, k, np.int32)
    rows = np.sort(experts, axis=-1)
    valid = rows >= 0
    return rows[valid].astype(dt), valid.sum(axis=-1).astype(np.int32)


def _layer_plan(experts: np.ndarray, P: int, dt=np.int64) -> LayerPlan:
    """The steps of one layer: experts [tokens, top_k] of that layer, P prefill tokens."""
    T = experts.shape[0]
    parts_keys, parts_sizes, parts_counted, parts_token = [], [], [], []
    if P >= 1:
        needed = np.unique(experts[:P])
        needed = needed[needed >= 0].astype(dt)
        parts_keys.append(needed)
        parts_sizes.append(np.ones(needed.shape[0], np.int32))
        parts_counted.append(np.zeros(needed.shape[0], bool))
        parts_token.append(np.full(needed.shape[0], P - 1, np.int64))
    keys, sizes = _rows(experts[P:], dt)
    parts_keys.append(keys)
    parts_sizes.append(sizes)
    parts_counted.append(np.ones(T - P, bool))
    parts_token.append(np.arange(P, T, dtype=np.int64))

    def cat(parts):
        return parts[0] if len(parts) == 1 else np.concatenate(parts)

    return LayerPlan(cat(parts_keys), cat(parts_sizes), cat(parts_counted), cat(parts_token))


def shared_plan(trace: Trace) -> LayerPlan:
    """The accesses of one pool shared by all layers, in the order the live engine makes them.

    Keys are ``layer * n_experts + expert``.  Prefill (``prefill_tokens`` > 0): layer by layer, each
    distinct expert of the prefill tokens once, in ascending id, pinned alone (as ``ExpertPool``'s
    prefill path, which the model calls per layer and distinct expert).  Then token by token, layer
    by layer, one step per layer: its chosen experts in ascending id, all pinned.
    """
    P = prefill_tokens(trace)
    T, L, k = trace.experts.shape
    E = trace.n_experts
    dt = np.int16 if L * E < 2**15 else np.int32 if L * E < 2**31 else np.int64
    keys, sizes, counted, token, layers = [], [], [], [], []
    if P >= 1:
        for layer in range(L):
            needed = np.unique(trace.experts[:P, layer])
            needed = needed[needed >= 0].astype(dt) + dt(layer * E)
            keys.append(needed)
            n = needed.shape[0]
            sizes.append(np.ones(n, np.int32))
            counted.append(np.zeros(n, bool))
            token.append(np.full(n, P - 1, np.int64))
            layers.append(np.full(n, layer, np.int64))
    rows, n_each = _rows(trace.experts[P:].reshape(-1, k), dt)  # rows in (token, layer) order
    row_layer = np.tile(np.arange(L, dtype=np.int64), T - P)
    keys.append((rows + np.repeat(row_layer * E, n_each)).astype(dt))
    sizes.append(n_each)
    counted.append(np.ones(row_layer.shape[0], bool))
    token.append(np.repeat(np.arange(P, T, dtype=np.int64), L))
    layers.append(row_layer)
    cat = np.concatenate
    return LayerPlan(cat(keys), cat(sizes), cat(counted), cat(token), 0, trace.probs, cat(layers), E)


def warm_plans(plans: list[LayerPlan], ranked: list[tuple[int, int]] | None) -> list[LayerPlan]:
    """Give each plan its warm start: ``ranked`` (``decisions.hottest`` of a profile, ids as the plans' trace
    numbers them) whole for a shared plan, a layer's own pairs for that layer's plan; None: every pool starts empty."""
    for plan in plans:
        if ranked is None:
            plan.warm = None
        elif plan.layers is not None:
            plan.warm = list(ranked)
        else:
            plan.warm = [(layer, e) for layer, e in ranked if layer == plan.layer]
    return plans


def layer_plans(trace: Trace) -> list[LayerPlan]:
    P = prefill_tokens(trace)
    dt = _key_dtype(trace.experts)
    plans = [_layer_plan(trace.experts[:, layer, :], P, dt) for layer in range(trace.n_layers)]
    for layer, plan in enumerate(plans):
        plan.layer = layer
        plan.n_experts = trace.n_experts
        plan.probs = trace.probs[:, layer, :] if trace.probs is not None else None
    return plans


# ---------------------------------------------------------------------------- the generic path (source of truth)


def plan_policy(cls: type[Policy], plan: LayerPlan) -> Policy:
    """A policy object for replaying one pool: keys are a layer's expert ids, or a shared plan's
    ``layer * n_experts + expert``, as the live pool's; an offline one gets the access sequence."""
    return make_policy(cls, plan.n_keys, plan.shared_experts, plan.keys.tolist())


def walk(plan: LayerPlan, core: Decisions | Residency, before: Callable[[int], None] | None = None,
         after: Callable[[int], None] | None = None):
    """Serve ``plan``'s steps through the decision core as the live pool does; yields ``(s, a, b, served)``.

    The one step loop of every replay on the reference path (misses, prefetch, pictures; per-layer
    quotas and the shared pool alike).  For step s, accesses a..b-1: ``before(s)`` if given, then a
    prefill load (``Decisions.prefill``, pinned alone) or a decode step (``Decisions.route``, which
    tells ``Policy.routed`` the layer, its expert ids and the token's router probabilities, None when
    the trace holds none; then ``serve``).  ``served`` is ``[(hit, slot, evicted key or None), ...]``
    per access; after the caller has seen it, ``after(s)`` (the step's prefetch point), then the layer
    is done.  ``core`` may be a bare ``Residency`` (the plan's pool kind is built around it).
    """
    if isinstance(core, Residency):
        core = decisions_over(plan, core)
    keys = plan.keys.tolist()
    starts = plan.starts.tolist()
    counted, token, probs = plan.counted.tolist(), plan.token.tolist(), plan.probs
    layers = plan.layers.tolist() if plan.layers is not None else None
    E = plan.shared_experts
    listens = core.signals and probs is not None
    for s in range(len(starts) - 1):
        a, b = starts[s], starts[s + 1]
        layer = layers[s] if layers is not None else plan.layer
        if before is not None:
            before(s)
        if counted[s]:
            p = None
            if listens:
                p = probs[token[s], layer] if layers is not None else probs[token[s]]
            core.route(layer, None, p, tuple(keys[a:b]))
            served = core.serve(layer)
        else:
            base = layer * E if layers is not None else 0
            served = [core.prefill(layer, k - base) for k in keys[a:b]]
        yield s, a, b, served
        if after is not None:
            after(s)
        core.done()


def plan_decisions(plan: LayerPlan, policy_cls: type[Policy], capacity: int) -> Decisions:
    """The decision core replaying one plan: a shared plan's pool, or one layer's quota.  A pool of more
    slots than keys it can hold is made with as many as it can hold: it never evicts either way.  With a
    warm start (``plan.warm``) the pool is filled first (``Decisions.warm``); an offline policy's access
    sequence then starts with the keys filled, in the order they are filled."""
    space = plan.key_space
    if space is not None:
        capacity = min(capacity, max(space, 1))
    core = decisions_over(plan, Residency(capacity, plan_policy(policy_cls, plan)))
    if plan.warm:
        if not getattr(policy_cls, "online", True):
            fill = [core.key(layer, e) for layer, e in core.warm_keys(plan.warm)]
            core.res_of[0].policy = make_policy(policy_cls, plan.n_keys, plan.shared_experts, fill + plan.keys.tolist())
        core.warm(plan.warm)
    return core


def decisions_over(plan: LayerPlan, res: Residency) -> Decisions:
    """The decision core of ``plan``'s pool kind over ``res`` (the shared pool, or the plan's layer's quota)."""
    if plan.layers is not None:
        n_layers = int(plan.layers.max(initial=0)) + 1
        return Decisions([res] * n_layers, [layer * plan.shared_experts for layer in range(n_layers)], shared=True)
    return Decisions([res] * (plan.layer + 1), [0] * (plan.layer + 1))


def generic_misses(plan: LayerPlan, policy_cls: type[Policy], capacity: int) -> np.ndarray:
    """Miss flag per access, from ``Residency`` and a policy object (the live pool's code path)."""
    miss = bytearray(plan.n)
    for _, a, _, served in walk(plan, plan_decisions(plan, policy_cls, capacity)):
        for i, (hit, _, _) in enumerate(served, a):
            if not hit:
                miss[i] = 1
    return np.frombuffer(bytes(miss), np.uint8).astype(bool)
