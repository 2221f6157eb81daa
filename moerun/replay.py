"""Replay routing traces through the eviction policies: hit rates, bounds, baselines, prefetch.

What a replay does (docs/traces.md has the long form):

- Every layer has its own quota of ``slots`` experts and starts empty, as the
  live pool does under a cap with per-layer quotas.
- The first ``prefill_tokens`` tokens (trace meta, default 0) are one prefill
  block: per layer, each distinct expert of those tokens is accessed once, in
  ascending id, pinned alone.  These loads are counted as ``prefill_loads``,
  not as accesses or misses (the live pool counts them the same way).
- Every later token is a decode step: per layer, its chosen experts are
  accessed in ascending id with all of them pinned, so none of them can evict
  another.  When the quota is smaller than the number of chosen experts (the
  live pool refuses that), they are accessed one after another, each pinned
  alone.

A replay is a list of *steps* per layer (``LayerPlan``): the accesses of one
step share one pinned set.  The source of truth is ``generic_misses``, which
drives ``residency.Residency`` with a policy object from ``moerun.policies``,
exactly the objects the live pool uses.  For the built-in policies there are
fast paths that give the same hits and misses (tests/test_replay.py checks
that on random and recorded traces):

- LRU, numpy-vectorised.  With every step's experts pinned and steps no
  larger than the quota, the resident set before a step is exactly the
  ``slots`` most recently used experts (proof in ``_lru_misses``), so an
  access hits iff fewer than ``slots`` distinct experts were used between its
  previous use and the start of its step.  That count serves every quota at
  once.  (Pinning does change LRU's choices compared with plain LRU: a step's
  later expert may be the least recently used one, and pinning keeps it.)
- FIFO, LFU and the optimum: one tight loop each over plain lists, choosing
  the same victim as the policy object (ties included).
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from . import policies
from .errors import BadOption, BadTrace
from .policies import FIFO, LFU, LRU, Optimal, Policy, make_policy
from .residency import NoVictim, Residency
from .trace import Trace

DEFAULT_POLICIES = ["lru", "lfu", "fifo", "optimal"]
RECALL_GUESSES = 4
RECALL_LOOKAHEAD = 3


# ---------------------------------------------------------------------------- the access schedule


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
                         layers, self.shared_experts)

    @property
    def n_keys(self) -> int:
        """Size of the key space (a policy's per-key lists)."""
        if self.shared_experts:
            return (int(self.layers.max(initial=0)) + 1) * self.shared_experts  # every layer has a step per token
        return int(self.keys.max(initial=-1)) + 1

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


def layer_plans(trace: Trace) -> list[LayerPlan]:
    P = prefill_tokens(trace)
    dt = _key_dtype(trace.experts)
    plans = [_layer_plan(trace.experts[:, layer, :], P, dt) for layer in range(trace.n_layers)]
    for layer, plan in enumerate(plans):
        plan.layer = layer
        plan.probs = trace.probs[:, layer, :] if trace.probs is not None else None
    return plans


# ---------------------------------------------------------------------------- the generic path (source of truth)


def plan_policy(cls: type[Policy], plan: LayerPlan) -> Policy:
    """A policy object for replaying one pool: keys are a layer's expert ids, or a shared plan's
    ``layer * n_experts + expert``, as the live pool's; an offline one gets the access sequence."""
    return make_policy(cls, plan.n_keys, plan.shared_experts, plan.keys.tolist())


def routed_hook(policy: Policy, plan: LayerPlan) -> Callable[[int, int, int, int], None] | None:
    """``hook(s, a, b, now)`` telling ``policy.routed`` about decode step s (accesses a..b-1), or None.

    None when the policy does not override ``Policy.routed`` (nothing to tell).  As in the live
    pool, only decode steps are signalled, before their accesses, with the step's layer, its expert
    ids and the token's router probabilities for that layer (None when the trace holds no ``probs``).
    """
    if type(policy).routed is Policy.routed:
        return None
    keys, counted, token, probs = plan.keys, plan.counted, plan.token, plan.probs
    if plan.layers is None:
        layer = plan.layer

        def hook(s: int, a: int, b: int, now: int) -> None:
            if counted[s]:
                policy.routed(layer, keys[a:b].tolist(), probs[token[s]] if probs is not None else None, now)

        return hook
    layers, E = plan.layers.tolist(), plan.shared_experts

    def shared_hook(s: int, a: int, b: int, now: int) -> None:
        if counted[s]:
            layer = layers[s]
            chosen = (keys[a:b] - layer * E).tolist()
            policy.routed(layer, chosen, probs[token[s], layer] if probs is not None else None, now)

    return shared_hook


def walk(plan: LayerPlan, res: Residency, before: Callable[[int], None] | None = None):
    """Serve ``plan``'s steps through ``res`` as the live pool does; yields ``(s, a, b, served)`` after each.

    The one step loop of every replay on the reference path (misses, prefetch, pictures; per-layer
    quotas and the shared pool alike).  For step s, accesses a..b-1: ``before(s)`` if given (a
    prefetch's inserts), then ``Policy.routed`` for a decode step, then the accesses in order with
    the whole step pinned, or each pinned alone when the step is larger than the pool (the live pool
    refuses such quotas).  ``served`` is ``[(hit, slot, evicted key or None), ...]`` per access.
    """
    keys = plan.keys.tolist()
    starts = plan.starts.tolist()
    hook = routed_hook(res.policy, plan)
    capacity = res.capacity
    for s in range(len(starts) - 1):
        a, b = starts[s], starts[s + 1]
        if before is not None:
            before(s)
        if hook is not None:
            hook(s, a, b, res.now)
        step = keys[a:b]
        if b - a <= capacity:
            served = res.access_step(step, step)
        else:
            served = [res.access(k, (k,)) for k in step]
        yield s, a, b, served


def generic_misses(plan: LayerPlan, policy_cls: type[Policy], capacity: int) -> np.ndarray:
    """Miss flag per access, from ``Residency`` and a policy object (the live pool's code path)."""
    res = Residency(capacity, plan_policy(policy_cls, plan))
    miss = bytearray(plan.n)
    for _, a, _, served in walk(plan, res):
        for i, (hit, _, _) in enumerate(served, a):
            if not hit:
                miss[i] = 1
    return np.frombuffer(bytes(miss), np.uint8).astype(bool)


# ---------------------------------------------------------------------------- fast paths


def _dense(keys: np.ndarray) -> tuple[np.ndarray, int]:
    """Expert ids renumbered 0..U-1 (keeping their order), and U; ids below 256 are kept as they are."""
    if keys.size == 0:
        return keys.astype(np.int64), 0
    top = int(keys.max())
    if top < 256:
        return keys, top + 1
    present = np.zeros(top + 1, bool)
    present[keys] = True
    remap = np.cumsum(present) - 1
    return remap[keys], int(remap[-1]) + 1


def _lru_misses(plan: LayerPlan, capacities: Sequence[int]) -> dict[int, np.ndarray]:
    """LRU with pinning for several quotas at once, vectorised.

    Claim: if every step has at most C accesses, all pinned, the resident set
    before each step is the C most recently used experts (or every expert
    used so far, if fewer).  Induction over steps: with R the C most recent
    before step S, the step's hits are S & R (pinned, never evicted during
    the step), and each miss evicts the least recently used of R - S (pinned
    experts are never candidates, and the step touches only S, so the order
    of R - S does not change).  So afterwards R' = S + the most recent
    C - |S| of R - S, and R - S holds the most recent experts outside S, so
    R' is the C most recent.  Hence access i of expert x hits iff x was used
    before and fewer than C distinct experts were used after x's previous use
    and before the start of i's step: that count is the rank of x in the
    "last use" row at the step start, computed here for all steps at once.
    """
    out: dict[int, np.ndarray] = {}
    maxstep = int(plan.sizes.max(initial=0))
    groups: dict[int, list[int]] = {}
    for c in capacities:
        groups.setdefault(min(c, max(maxstep, 1)), []).append(c)
    for split_at, caps in groups.items():
        p = plan.split(split_at)
        seen, rank = _lru_ranks(p)
        for c in caps:
            out[c] = ~(seen & (rank < c))
    return out


def _lru_ranks(plan: LayerPlan, chunk: int = 1 << 17) -> tuple[np.ndarray, np.ndarray]:
    """Per access: whether its expert was used before, and its LRU rank at the start of its step.

    Works through the steps in chunks that stay in cache.  ``last[e, r]`` is the
    last use of expert e before local step r (column 0: before the chunk), one
    row per expert; the rank of an access is the number of experts whose last use
    is later than its own previous use.
    """
    keys, U = _dense(plan.keys)
    n = keys.shape[0]
    seen = np.zeros(n, bool)
    rank = np.zeros(n, np.int32)
    if n == 0:
        return seen, rank
    dt = np.int32 if n < 2**31 - 1 else np.int64
    cnt_dt = np.uint8 if U < 256 else np.int32
    sizes, starts, m = plan.sizes, plan.starts, plan.uniform
    carry = np.full(U, -1, dt)
    steps_per_chunk = max(1, chunk // U)
    s0 = 0
    while s0 < plan.n_steps:
        s1 = min(plan.n_steps, s0 + steps_per_chunk)
        ns = s1 - s0
        a0, a1 = int(starts[s0]), int(starts[s1])
        k = keys[a0:a1].astype(np.intp)
        local = np.arange(a1 - a0) // m if m else np.repeat(np.arange(ns), sizes[s0:s1])
        last = np.full((U, ns + 1), -1, dt)
        last[:, 0] = carry
        flat = last.reshape(-1)
        where = k * (ns + 1) + local
        flat[where + 1] = np.arange(a0, a1, dtype=dt)
        np.maximum.accumulate(last, axis=1, out=last)
        carry = last[:, -1].copy()
        before = last[:, :-1]
        pk = flat[where]  # the previous use of each access's expert
        seen[a0:a1] = pk >= 0
        if m:  # every step has m accesses: compare whole rows, no gather of columns
            for j in range(m):
                rank[a0 + j : a1 : m] = np.add.reduce((before > pk[j::m]).view(np.uint8), axis=0, dtype=cnt_dt)
        else:
            rank[a0:a1] = np.add.reduce((before[:, local] > pk).view(np.uint8), axis=0, dtype=cnt_dt)
        s0 = s1
    return seen, rank


def _next_use(keys: np.ndarray) -> np.ndarray:
    """For each access, the index of the next access to the same key; n + 1 if none (as ``Optimal``)."""
    n = keys.shape[0]
    nxt = np.full(n, n + 1, np.int64)
    if n:
        order = np.argsort(keys, kind="stable")
        same = keys[order[1:]] == keys[order[:-1]]
        nxt[order[:-1][same]] = order[1:][same]
    return nxt


def _loop_misses(plan: LayerPlan, capacity: int, mode: str) -> np.ndarray:
    """FIFO, LFU or the optimum in one plain loop; the same victims as the policy objects.

    Residents are kept in insertion order (the order of ``Residency.slot_of``),
    so ties pick the same victim as ``min``/``max`` over the candidates there.
    Scores (lowest is evicted): FIFO load time; LFU count * (n + 2) + last use;
    optimum minus the next use (the policy's ``n + 1`` for never again).
    """
    plan = plan.split(capacity)
    keys, U = _dense(plan.keys)
    n = keys.shape[0]
    kl = keys.tolist()
    st = plan.starts.tolist()
    miss = bytearray(n)
    score = [0] * U
    count = [0] * U
    resident = bytearray(U)
    res: list[int] = []
    C = capacity
    is_opt = mode == "optimal"
    is_lfu = mode == "lfu"
    nl = (-_next_use(keys)).tolist() if is_opt else None
    big = n + 2
    for s in range(len(st) - 1):
        a = st[s]
        b = st[s + 1]
        cand = None
        for i in range(a, b):
            x = kl[i]
            if resident[x]:
                if is_opt:
                    score[x] = nl[i]
                elif is_lfu:
                    c = count[x] + 1
                    count[x] = c
                    score[x] = c * big + i
                continue
            miss[i] = 1
            if len(res) >= C:
                if cand is None:
                    step = kl[a:b]  # pinned: never candidates
                    cand = [y for y in res if y not in step]
                v = min(cand, key=score.__getitem__)
                cand.remove(v)
                res.remove(v)
                resident[v] = 0
            res.append(x)
            resident[x] = 1
            if is_opt:
                score[x] = nl[i]
            elif is_lfu:
                count[x] = 1
                score[x] = big + i
            else:
                score[x] = i
    return np.frombuffer(bytes(miss), np.uint8).astype(bool)


def _fast_fifo(plan, capacities):
    return {c: _loop_misses(plan, c, "fifo") for c in capacities}


def _fast_lfu(plan, capacities):
    return {c: _loop_misses(plan, c, "lfu") for c in capacities}


def _fast_optimal(plan, capacities):
    return {c: _loop_misses(plan, c, "optimal") for c in capacities}


# Fast paths by exact class: a subclass may change behaviour, so it takes the generic path.
FAST_PATHS: dict[type, Callable[[LayerPlan, Sequence[int]], dict[int, np.ndarray]]] = {
    LRU: _lru_misses,
    FIFO: _fast_fifo,
    LFU: _fast_lfu,
    Optimal: _fast_optimal,
}


def layer_misses(plan: LayerPlan, policy_cls: type[Policy], capacities: Sequence[int], fast: bool = True) -> dict[int, np.ndarray]:
    """Miss flag per access of one layer for each quota, by the fast path when there is one."""
    f = FAST_PATHS.get(policy_cls) if fast else None
    if f is not None:
        return f(plan, capacities)
    return {c: generic_misses(plan, policy_cls, c) for c in capacities}


# ---------------------------------------------------------------------------- counting


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


def random_routing_trace(trace: Trace, n_experts: int, seed: int = 0) -> Trace:
    """Each decode token and layer picks as many distinct experts as the trace, uniformly (seeded)."""
    P = prefill_tokens(trace)
    rng = np.random.default_rng(seed)
    experts = trace.experts.copy()
    dec = experts[P:]
    T, L, k = dec.shape
    n_valid = (dec >= 0).sum(axis=-1)
    chunk = max(1, (1 << 22) // max(1, L * n_experts))
    for t0 in range(0, T, chunk):
        t1 = min(T, t0 + chunk)
        picks = np.argsort(rng.random((t1 - t0, L, n_experts)), axis=-1)[..., :k]
        if k > n_experts:
            raise BadTrace(f"top_k {k} exceeds n_experts {n_experts}")
        picks = np.sort(picks, axis=-1)
        keep = np.arange(k)[None, None, :] < n_valid[t0:t1, :, None]
        dec[t0:t1] = np.where(keep, picks, -1)
    return Trace(experts, meta=dict(trace.meta))


# ---------------------------------------------------------------------------- prefetch


def prefetch_recall(trace: Trace, max_guesses: int = RECALL_GUESSES, max_lookahead: int = RECALL_LOOKAHEAD) -> list[dict]:
    """Share of each layer's chosen experts found among the top-n guesses made j layers earlier."""
    g = trace.guesses
    if g is None:
        return []
    E = trace.n_experts
    experts = trace.experts
    out = []
    for j in range(1, min(max_lookahead, g.shape[2], trace.n_layers - 1) + 1):  # j layers ahead must exist
        for n in range(1, min(max_guesses, g.shape[3]) + 1):
            found = chosen = 0
            per_layer = []
            for m in range(j, trace.n_layers):
                ch = experts[:, m, :]
                gs = g[:, m - j, j - 1, :n]
                valid = ch >= 0
                hit = (ch[:, :, None] == gs[:, None, :]).any(axis=-1) & valid
                f, c = int(hit.sum()), int(valid.sum())
                found += f
                chosen += c
                per_layer.append({"layer": m, "recall": f / c if c else None})
            out.append(
                {
                    "lookahead": j,
                    "guesses": n,
                    "recall": found / chosen if chosen else None,
                    "chance": min(1.0, n / E) if E else None,
                    "chosen": chosen,
                    "per_layer": per_layer,
                }
            )
    return out


@dataclass
class PrefetchCounts(Counts):
    prefetch_hits: int = 0  # hits on an expert a guess brought in and nothing used since
    guesses: int = 0  # guesses made
    loads: int = 0  # guesses that needed a load
    wasted: int = 0  # loaded guesses evicted, or left at the end, without any use

    def __add__(self, other):
        return PrefetchCounts(
            *(getattr(self, f) + getattr(other, f) for f in ("accesses", "misses", "prefill_loads", "prefetch_hits", "guesses", "loads", "wasted"))
        )


def simulate_prefetch(
    trace: Trace,
    policy_cls: type[Policy],
    capacity: int,
    n_guesses: int,
    lookahead: int,
    plans: list[LayerPlan] | None = None,
    shared: bool = False,
) -> list[PrefetchCounts]:
    """Replay with speculative loads, by the generic path, one ``PrefetchCounts`` per layer.

    Guesses are placed where the live pool places them, and loaded at once, as if the link had no
    delay: a guess already resident is skipped, one that finds no evictable slot or that the policy
    declines (``Policy.admits``) is dropped, and a guess never evicts another guess of its round.

    - Per-layer quotas: before each decode step of layer m, the guesses made for layer m at the
      prefetch points of layers m-lookahead .. m-1 of the same token, furthest lookahead first,
      each layer's in rank order (layer m's quota is not touched in between, so this is when they
      were made, as far as that quota can tell).
    - ``shared`` (one pool of ``capacity`` slots for all layers): right after the step of layer l
      (its prefetch point), the guesses made there for layers l+1 .. l+lookahead, nearest first,
      with layer l's chosen experts pinned too, as in ``ExpertPool.prefetch``.  A guess's loads and
      waste count for the layer it was made for.
    """
    g = trace.guesses
    if g is None:
        raise BadTrace("this trace holds no guesses, so prefetch cannot be simulated")
    if not 1 <= lookahead <= g.shape[2]:
        raise BadOption(f"--lookahead must be 1..{g.shape[2]} for this trace (it holds guesses for {g.shape[2]} layers ahead)")
    if not 1 <= n_guesses <= g.shape[3]:
        raise BadOption(f"--prefetch must be 1..{g.shape[3]} for this trace (it holds {g.shape[3]} guesses per layer)")
    if not getattr(policy_cls, "online", True):
        raise BadOption(f"policy {policy_cls.name!r} reads the future; prefetch is simulated for online policies only")
    gl = g[:, :, :, :n_guesses].tolist()
    L = trace.n_layers
    if shared:
        plan = plans[0] if plans else shared_plan(trace)
        E = plan.shared_experts
        layers, tokens, counted, keys, starts = plan.layers.tolist(), plan.token.tolist(), plan.counted.tolist(), plan.keys.tolist(), plan.starts.tolist()

        def shared_rounds(s: int):
            src = layers[s] - 1  # the step before is layer src's of the same token
            if counted[s] and src >= 0:
                t, pinned = tokens[s], keys[starts[s - 1] : starts[s]]
                for j in range(1, min(lookahead, L - 1 - src) + 1):
                    ks = [(src + j) * E + e for e in gl[t][src][j - 1] if e >= 0]
                    yield ks, set(ks).union(pinned)

        return _prefetch_walk(plan, policy_cls, capacity, shared_rounds, L, E)
    out = []
    for m, plan in enumerate(plans if plans is not None else layer_plans(trace)):
        counted, tokens = plan.counted.tolist(), plan.token.tolist()

        def rounds(s: int, m=m, counted=counted, tokens=tokens):
            if counted[s]:
                t = tokens[s]
                for j in range(min(lookahead, m), 0, -1):
                    ks = [e for e in gl[t][m - j][j - 1] if e >= 0]
                    yield ks, set(ks)

        out.append(_prefetch_walk(plan, policy_cls, capacity, rounds, L, trace.n_experts)[m])
    return out


def _prefetch_walk(plan: LayerPlan, policy_cls: type[Policy], capacity: int, rounds, n_layers: int, n_experts: int) -> list[PrefetchCounts]:
    """``walk`` with the guess rounds ``rounds(s)`` (``(keys, protected)`` pairs) placed before step s."""
    res = Residency(capacity, plan_policy(policy_cls, plan))
    policy = res.policy
    out = [PrefetchCounts() for _ in range(n_layers)]
    E, layer = plan.shared_experts, plan.layer
    # key -> the layer it counts for (a per-layer plan's guesses may name experts its trace never chose)
    owner = [k // E for k in range(plan.n_keys)] if E else [layer] * max(plan.n_keys, n_experts)
    fresh: set = set()  # loaded by a guess, not used yet

    def place(s: int) -> None:
        for ks, protect in rounds(s):
            for key in ks:
                pc = out[owner[key]]
                pc.guesses += 1
                if key in res:
                    continue
                try:
                    victim = res.victim(protect)
                except NoVictim:
                    continue
                if victim is not None and not policy.admits(key, victim, res.now):
                    continue
                _, victim = res.place(key, victim)
                pc.loads += 1
                fresh.add(key)
                if victim in fresh:
                    fresh.discard(victim)
                    out[owner[victim]].wasted += 1

    keys, counted = plan.keys.tolist(), plan.counted.tolist()
    for s, a, b, served in walk(plan, res, place):
        c = counted[s]
        for x, (hit, _, victim) in zip(keys[a:b], served):
            pc = out[owner[x]]
            if c:
                pc.accesses += 1
            if hit:
                if x in fresh:
                    fresh.discard(x)
                    if c:
                        pc.prefetch_hits += 1
            else:
                if c:
                    pc.misses += 1
                else:
                    pc.prefill_loads += 1
                if victim in fresh:
                    fresh.discard(victim)
                    out[owner[victim]].wasted += 1
    for key in fresh:
        out[owner[key]].wasted += 1
    return out


# ---------------------------------------------------------------------------- the whole report


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
) -> dict:
    """Everything ``moerun replay`` reports, as one JSON-ready document."""
    if trace.n_tokens == 0:
        raise BadTrace("the trace holds no tokens")
    E = trace.n_experts
    slots = list(slots) if slots else default_slots(E)
    if expert_bytes is None:
        eb = trace.meta.get("expert_bytes")
        expert_bytes = eb if isinstance(eb, int) and not isinstance(eb, bool) and eb > 0 else None
    plans = layer_plans(trace)
    units = len(policy_names) + (2 if baselines else 0) + (len([p for p in policy_names if getattr(policies.get(p), "online", True)]) * len(slots) if prefetch else 0)
    done = 0

    def tick(label: str) -> None:
        nonlocal done
        done += 1
        if progress is not None:
            progress(done, units, label)

    results = []
    for name in policy_names:
        results += _records(name, replay_counts(trace, name, slots, fast, plans), expert_bytes)
        tick(name)
    doc: dict = {
        "trace": describe(trace),
        "slots": slots,
        "policies": list(policy_names),
        "expert_bytes": expert_bytes,
        "results": results,
    }
    if baselines:
        base = []
        for label, make in (
            ("shuffled", lambda: shuffled_trace(trace, seed)),
            ("random", lambda: random_routing_trace(trace, E, seed)),
        ):
            recs = _records("lru", replay_counts(make(), "lru", slots, fast), expert_bytes)
            for r in recs:
                r["baseline"] = label
            base += recs
            tick(label)
        doc["baselines"] = base
        doc["baseline_seed"] = seed
    doc["prefetch_recall"] = prefetch_recall(trace)
    if prefetch is not None:
        n, la = prefetch
        pf = []
        for name in policy_names:
            cls = policies.get(name)
            if not getattr(cls, "online", True):
                continue
            for c in slots:
                per_layer = simulate_prefetch(trace, cls, c, n, la, plans)
                pf += _records(name, {c: per_layer}, expert_bytes)
                tick(f"{name} prefetch")
        doc["prefetch"] = {"guesses": n, "lookahead": la, "results": pf}
    return doc


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
    plan = shared_plan(trace) if shared else layer_plans(trace)[layer]
    res = Residency(capacity, plan_policy(policies.get(policy), plan))
    keys, tokens, counted = plan.keys.tolist(), plan.token.tolist(), plan.counted.tolist()
    step_layer = plan.layers.tolist() if shared else None
    E = trace.n_experts
    base = layer * E if shared else 0
    pic = np.zeros((E, t1 - t0), np.int8)
    for s, a, b, served in walk(plan, res):
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
    return pic
