"""Fast paths of the replay: the same hits and misses as the reference path (``replay_plan.generic_misses``).

For the built-in policies (tests/test_replay.py checks equality on random and recorded traces):

- LRU, numpy-vectorised.  With every step's experts pinned and steps no
  larger than the quota, the resident set before a step is exactly the
  ``slots`` most recently used experts (proof in ``_lru_misses``), so an
  access hits iff fewer than ``slots`` distinct experts were used between its
  previous use and the start of its step.  That count serves every quota at
  once.  (Pinning does change LRU's choices compared with plain LRU: a step's
  later expert may be the least recently used one, and pinning keeps it.)
- FIFO, LFU and the optimum: one tight loop each over plain lists, choosing
  the same victim as the policy object (ties included); FIFO's is the first
  resident that is not pinned.
- LRFU, markov and orbit (``Policy.history_scores``): the policy object runs once along the plan and
  its scores are written down; one pass over them serves every quota no smaller than a step, as
  LRU's ranks do (the rule keeps a smaller pool inside a larger one), unless two candidates tie;
  otherwise a lean loop per quota reads them (``moerun.sim.tape``).
- A pool with a slot for every key the plan holds never evicts, whatever the policy: its misses are
  the first use of each key.

A warm start (``LayerPlan.warm``, filled by ``Decisions.warm``) is written as uncounted accesses before the
plan's first step (``_warm_misses``), and the counters above run on that plan: one prefix for every quota
(LRU, FIFO, LFU) or one per quota (the optimum); the score rules take the reference path for it.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from moerun.policies import FIFO, LFU, LRFU, LRU, Markov, Optimal, Orbit, Policy
from moerun.runtime.residency import Residency
from moerun.sim import tape
from moerun.sim.steps import LayerPlan, decisions_over, generic_misses

_dense = tape.dense


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
    if plan.warm:
        raise ValueError("a warm plan goes through layer_misses (its fill as a prefix of accesses)")
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


def _fifo_loop(plan: LayerPlan, capacity: int) -> np.ndarray:
    """FIFO: the residents kept in the order they came in, which is the order of their load times, so the
    policy's victim (the smallest load time among the candidates) is the first candidate in that order."""
    plan = plan.split(capacity)
    keys, U = _dense(plan.keys)
    kl = keys.tolist()
    st = plan.starts.tolist()
    miss = bytearray(len(kl))
    resident = bytearray(U)
    res: list[int] = []
    C = capacity
    for s in range(len(st) - 1):
        a, b = st[s], st[s + 1]
        for i in range(a, b):
            x = kl[i]
            if resident[x]:
                continue
            miss[i] = 1
            if len(res) >= C:
                step = kl[a:b]  # pinned: never candidates
                j = 0
                while res[j] in step:
                    j += 1
                resident[res.pop(j)] = 0
            res.append(x)
            resident[x] = 1
    return np.frombuffer(bytes(miss), np.uint8).astype(bool)


def _fast_fifo(plan, capacities):
    return {c: _fifo_loop(plan, c) for c in capacities}


def _lfu_loop(plan: LayerPlan, capacity: int) -> np.ndarray:
    """LFU alone (``_loop_misses``'s "lfu" without the other modes' tests): score count * (n + 2) + last use."""
    plan = plan.split(capacity)
    keys, U = _dense(plan.keys)
    kl = keys.tolist()
    st = plan.starts.tolist()
    n = len(kl)
    miss = bytearray(n)
    resident = bytearray(U)
    score = [0] * U
    res: list[int] = []
    C = capacity
    big = n + 2
    get = score.__getitem__
    for s in range(len(st) - 1):
        a, b = st[s], st[s + 1]
        cand = None
        for i in range(a, b):
            x = kl[i]
            if resident[x]:
                score[x] += big - (score[x] % big) + i  # one more use, last use now
                continue
            miss[i] = 1
            if len(res) >= C:
                if cand is None:
                    step = kl[a:b]  # pinned: never candidates
                    cand = [y for y in res if y not in step]
                v = min(cand, key=get)
                cand.remove(v)
                res.remove(v)
                resident[v] = 0
            res.append(x)
            resident[x] = 1
            score[x] = big + i
    return np.frombuffer(bytes(miss), np.uint8).astype(bool)


def _fast_lfu(plan, capacities):
    return {c: _lfu_loop(plan, c) for c in capacities}


def _fast_optimal(plan, capacities):
    return {c: _loop_misses(plan, c, "optimal") for c in capacities}


def _by_tape(cls: type[Policy]) -> Callable[[LayerPlan, Sequence[int]], dict[int, np.ndarray]]:
    def fast(plan, capacities):
        t = tape.build(plan, cls)
        out = {}
        big = [c for c in capacities if c >= int(plan.sizes.max(initial=1))]  # no step is split
        if len(big) > 1:
            d = tape.depths(t)
            if d is not None:  # None: a tie among candidates; each quota is replayed on its own
                out = {c: d >= c for c in big}
        for c in capacities:
            if c not in out:
                out[c] = tape.misses(t, c) if t.alone_exact or c in big else generic_misses(plan, cls, c)
        return out

    fast.__name__ = f"_fast_{cls.name}"
    return fast


# Fast paths by exact class: a subclass may change behaviour, so it takes the generic path.
FAST_PATHS: dict[type, Callable[[LayerPlan, Sequence[int]], dict[int, np.ndarray]]] = {
    LRU: _lru_misses,
    FIFO: _fast_fifo,
    LFU: _fast_lfu,
    Optimal: _fast_optimal,
    LRFU: _by_tape(LRFU),
    Markov: _by_tape(Markov),
    Orbit: _by_tape(Orbit),
}


def first_uses(plan: LayerPlan) -> np.ndarray:
    """Miss flag per access of a pool that never evicts: the first access of each key."""
    first = np.zeros(plan.n, bool)
    if plan.n:
        first[np.unique(plan.keys, return_index=True)[1]] = True
    return first


def _warm_prefix(plan: LayerPlan, pairs: list) -> LayerPlan:
    """The plan with ``pairs`` (``(layer, expert)``, in order) accessed before its first step, each a step of its
    own, not counted, and no warm start left to make."""
    E = plan.shared_experts  # 0 for a layer's plan: its keys are the expert ids
    n = len(pairs)
    keys = np.array([layer * E + e for layer, e in pairs], np.int64)
    layers = None
    if plan.layers is not None:
        layers = np.concatenate([np.array([layer for layer, _ in pairs], np.int64), plan.layers])
    return LayerPlan(np.concatenate([keys, plan.keys.astype(np.int64)]), np.concatenate([np.ones(n, plan.sizes.dtype), plan.sizes]),
                     np.concatenate([np.zeros(n, bool), plan.counted]), np.concatenate([np.zeros(n, plan.token.dtype), plan.token]),
                     plan.layer, plan.probs, layers, plan.shared_experts, plan.n_experts)


# For these rules one prefix serves every quota: every key the profile used, coldest first.  During it each key is
# accessed once and never again, so each evicts the key that came in first (LRU: used last longest ago; FIFO:
# loaded first; LFU: one use each, the tie to the least recent): a quota of C holds the last C afterwards, the C
# hottest, which is what ``Decisions.warm`` fills, with the same order of last uses and loads and one use each;
# a key evicted during the prefix leaves nothing these rules read (its time and count are set anew when it returns).
PREFIX_EXACT = (LRU, FIFO, LFU)


def _warm_misses(plan: LayerPlan, policy_cls: type[Policy], capacities: Sequence[int]) -> dict[int, np.ndarray]:
    """A warm plan's misses by the fast paths: its fill written as accesses before its first step.  A fill is
    accesses of distinct keys, nothing pinned, into an empty pool with room for them (``Decisions.warm``), so a
    prefix of exactly those keys, each a step of its own and not counted (no ``Policy.routed``, as the fill), is
    the same fill for any policy; the offline optimum's access sequence begins with them too, as
    ``steps.plan_decisions`` makes it.  LRU, FIFO and LFU take one prefix for every quota (``PREFIX_EXACT``);
    the optimum one prefix per quota, its keys chosen by the decision core (``Decisions.warm_keys``).  The score
    rules take the reference path: a tape per quota (one pass of the policy each, and the tape's replay) measured
    slower than the reference path's one pass per quota (docs/research/measurements.md, "Warm starts")."""
    if getattr(policy_cls, "history_scores", False):
        return {c: generic_misses(plan, policy_cls, c) for c in capacities}
    if policy_cls in PREFIX_EXACT:
        pairs = list(reversed(plan.warm))
        return {c: m[len(pairs):] for c, m in layer_misses(_warm_prefix(plan, pairs), policy_cls, capacities).items()}
    space = plan.key_space
    out = {}
    for c in capacities:
        cap = min(c, max(space, 1)) if space is not None else c  # as plan_decisions sizes the pool
        pairs = decisions_over(plan, Residency(cap, LRU())).warm_keys(plan.warm)  # which keys: not the policy's choice
        out[c] = layer_misses(_warm_prefix(plan, pairs), policy_cls, [c])[c][len(pairs):]
    return out


def layer_misses(plan: LayerPlan, policy_cls: type[Policy], capacities: Sequence[int], fast: bool = True) -> dict[int, np.ndarray]:
    """Miss flag per access of one pool for each quota, by the fast path when there is one."""
    if plan.warm and fast and policy_cls in FAST_PATHS:
        return _warm_misses(plan, policy_cls, capacities)
    f = FAST_PATHS.get(policy_cls) if fast and not plan.warm else None
    if f is None:
        return {c: generic_misses(plan, policy_cls, c) for c in capacities}
    n_keys = int(np.unique(plan.keys).size) if plan.n else 0
    roomy = [c for c in capacities if c >= n_keys]  # never evicts: any policy's misses are the first uses
    out = f(plan, [c for c in capacities if c < n_keys]) if len(roomy) < len(capacities) else {}
    if roomy:
        first = first_uses(plan)
        first.flags.writeable = False  # one array for every such quota
        out.update({c: first for c in roomy})
    return {c: out[c] for c in capacities}
