"""Replay's fast path for score rules (``Policy.history_scores``: lrfu, markov, orbit): one pass of the
policy for every pool size, then a lean loop per pool size.

Such a rule evicts the first candidate with the smallest score, and a key's score depends only on the
routing and the accesses so far, not on what is resident.  So one policy object, driven through the
plan's notifications once (``routed`` at each decode step, an access for each key, nothing ever
evicted), sees every score the reference path's policy would see at any pool size; ``build`` writes
them down (a *tape*) where they change:

- after a step routes: the scores of its layer's keys (every key, with a pool per layer);
- after each step: its keys' scores;
- after an access that moved ``Policy.epoch``: every key's score.

``misses`` then replays one pool size from the tape: the pool's pinning and its order of residents
(the order ties are broken in) as ``Residency`` keeps them, a victim being the smallest score among
the candidates.  Nothing of the policy is restated here: its scores come from its own ``scores``,
and its decisions from the same minimum ``victim`` takes.  tests/sim/test_replay.py checks the
counts against the reference path (``steps.generic_misses``) for every such policy and both pool
kinds, on random traces and across a rescale of the counts.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from moerun.policies import Policy
from moerun.sim.steps import LayerPlan, plan_policy


def dense(keys: np.ndarray) -> tuple[np.ndarray, int]:
    """Keys renumbered 0..U-1 in ascending order (the order ties and pinning read is kept), and U."""
    if keys.size == 0:
        return keys.astype(np.int64), 0
    top = int(keys.max())
    if top < 256:
        return keys, top + 1
    present = np.zeros(top + 1, bool)
    present[keys] = True
    remap = np.cumsum(present) - 1
    return remap[keys], int(remap[-1]) + 1


@dataclass
class Tape:
    keys: list  # dense key of each access
    starts: list  # step offsets
    n_keys: int  # U
    routes: list  # per step: None, a full score list (every key), or (dense keys, scores) after it routes
    after: list  # per access: the accessed key's score after it
    rescored: dict  # step -> {access index: (dense keys, scores)} where the epoch moved
    alone_exact: bool = True  # False: ``misses`` is not exact for a pool smaller than some step (see ``build``)


def build(plan: LayerPlan, cls: type[Policy]) -> Tape:
    """The scores of a ``history_scores`` policy along ``plan``, one pass for every pool size.  A tape models no
    warm start (its one policy object would see the fill of every pool size at once): ``fast.layer_misses``
    replays a warm plan on the reference path instead, and a warm plan given here is refused."""
    if plan.warm:
        raise ValueError("a tape models no warm start; replay a warm plan on the reference path (fast.layer_misses)")
    pol = plan_policy(cls, plan)
    keys = plan.keys.tolist()
    dk, U = dense(plan.keys)
    dk = dk.tolist()
    starts = plan.starts.tolist()
    counted, token = plan.counted.tolist(), plan.token.tolist()
    layers = plan.layers.tolist() if plan.layers is not None else None
    E = plan.shared_experts
    probs = plan.probs
    signals = type(pol).routed is not Policy.routed  # as the decision core asks (Decisions.signals)
    listens = signals and probs is not None
    seen = bytearray(U)
    groups: dict[int, tuple[list, list]] = {}  # layer -> (its keys seen, their dense keys)
    every: tuple[list, list] = ([], [])  # every key seen, and its dense key
    n_steps = len(starts) - 1
    routes: list = [None] * n_steps
    after = [0.0] * len(keys)
    rescored: dict = {}
    alone_exact = True
    scores = pol.scores
    epoch = pol.epoch
    now = 0
    for s in range(n_steps):
        a, b = starts[s], starts[s + 1]
        layer = layers[s] if layers is not None else plan.layer
        if counted[s] and signals:
            p = None
            if listens:
                p = probs[token[s], layer] if layers is not None else probs[token[s]]
            base = layer * E if layers is not None else 0
            pol.routed(layer, [k - base for k in keys[a:b]], p, now)
            group = groups.get(layer)
            if group is not None:
                vs = scores(group[0], now)
                if layers is None:  # a pool per layer: every key seen, as one list
                    full = [0.0] * U
                    for d, v in zip(group[1], vs):
                        full[d] = v
                    routes[s] = full
                else:
                    routes[s] = (group[1], vs)
        for i in range(a, b):
            k, d = keys[i], dk[i]
            if seen[d]:
                pol.hit(k, now)
            else:
                pol.inserted(k, now)
                seen[d] = 1
                group = groups.get(layer)
                if group is None:
                    group = groups[layer] = ([], [])
                group[0].append(k)
                group[1].append(d)
                every[0].append(k)
                every[1].append(d)
            now += 1
            if pol.epoch != epoch:
                epoch = pol.epoch
                rescored.setdefault(s, {})[i] = (list(every[1]), scores(every[0], now))
                if b - a > 1:
                    alone_exact = False
        # the step's keys scored once, after it: the same as after each one's access unless the epoch moved
        # in between, which only a pool too small for the step (each key pinned alone) can see
        after[a:b] = scores(keys[a:b], now)
    return Tape(dk, starts, U, routes, after, rescored, alone_exact)


def misses(tape: Tape, capacity: int) -> np.ndarray:
    """Miss flag per access for a pool of ``capacity`` slots, from the tape (see the module docstring)."""
    kl, st, routes, after, rescored = tape.keys, tape.starts, tape.routes, tape.after, tape.rescored
    n = len(kl)
    miss = bytearray(n)
    resident = bytearray(tape.n_keys)
    score = [0.0] * tape.n_keys
    res: list[int] = []  # residents in the order they came in (Residency.slot_of's order: ties go to the first)
    C = capacity
    get = score.__getitem__
    for s in range(len(st) - 1):
        a, b = st[s], st[s + 1]
        r = routes[s]
        if r is not None:
            if type(r) is list:
                score[:] = r
            else:
                for d, v in zip(*r):
                    score[d] = v
        alone = b - a > C  # more keys than slots: each pinned alone (Decisions.serve)
        again = rescored.get(s)
        cand = None
        for i in range(a, b):
            x = kl[i]
            if not resident[x]:
                miss[i] = 1
                if len(res) >= C:
                    if alone:
                        v = min(res, key=get)
                    else:
                        if cand is None:
                            step = kl[a:b]  # pinned: never candidates
                            cand = [y for y in res if y not in step]
                        v = min(cand, key=get)
                        cand.remove(v)
                    res.remove(v)
                    resident[v] = 0
                res.append(x)
                resident[x] = 1
            score[x] = after[i]
            if again is not None and i in again:
                for d, v in zip(*again[i]):
                    score[d] = v
    return np.frombuffer(bytes(miss), np.uint8).astype(bool)


def depths(tape: Tape) -> np.ndarray | None:
    """Every pool size at once, for pool sizes no smaller than the largest step: per access, the
    smallest pool in which it hits, less one (``n_keys`` for a first use), so it misses in a pool of C
    slots iff its depth >= C.  None when two candidates tie on their score (the order ties are
    broken in differs between pool sizes): then ``misses`` replays each size on its own.

    A rule that evicts the smallest score, with scores that do not depend on the pool, keeps
    every smaller pool's residents inside every larger one's (the rule's pinned keys, the step's,
    count as the largest score).  So one list orders the keys such that the first C of it are a pool
    of C slots: an access at position d hits for C > d; for the pools it misses in, the victim of a
    pool of j + 1 slots is the smaller of the victim of j slots and the key at position j, so one
    pass down to position d moves every pool's victim (the key that ends at d).
    """
    kl, st, routes, after, rescored = tape.keys, tape.starts, tape.routes, tape.after, tape.rescored
    U = tape.n_keys
    depth = [U] * len(kl)
    inf = float("inf")
    score = [0.0] * U
    eff = [0.0] * U  # the score, or inf while the key is pinned (a key of the current step)
    stack: list[int] = []
    where = bytearray(U)  # in the list
    for s in range(len(st) - 1):
        a, b = st[s], st[s + 1]
        r = routes[s]
        if r is not None:
            if type(r) is list:
                score[:] = r
                eff[:] = r
            else:
                for d, v in zip(*r):
                    score[d] = v
                    eff[d] = v
        step = kl[a:b]
        for x in step:
            eff[x] = inf
        again = rescored.get(s)
        for i in range(a, b):
            x = kl[i]
            if where[x]:
                d = stack.index(x)
                depth[i] = d
                end = d
            else:
                d = end = len(stack)
                where[x] = 1
                stack.append(x)
            if d:
                carry = stack[0]
                stack[0] = x
                c = eff[carry]
                for j in range(1, end):
                    y = stack[j]
                    e = eff[y]
                    if e < c:
                        stack[j] = carry
                        carry, c = y, e
                    elif e == c and c != inf:
                        return None
                stack[end] = carry
            score[x] = after[i]
            if again is not None and i in again:
                for d, v in zip(*again[i]):
                    score[d] = v
                    eff[d] = v
                for y in step:
                    eff[y] = inf
        for x in step:
            eff[x] = score[x]
    return np.array(depth, np.int64)
