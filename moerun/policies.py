"""Eviction policies, shared by the live pool and the trace replay simulator.

A policy sees the keys of one pool as small integers: the expert ids of a
layer (one pool per layer), or ``layer * n_experts + expert`` (one pool shared
by all layers), and a clock ``now`` that counts accesses.  The pool tells it
what was inserted, hit and evicted, and asks it to pick a victim among the
resident keys that may be evicted (never the experts pinned by the layer being
computed).  See docs/policies.md.

State lives in plain lists indexed by key, so a notification is a list store
and a victim is one ``min`` over the candidates: no per-access allocation.
Lists grow on insertion (a hit is always on an inserted key), so a policy made
without ``n_keys`` works for any small non-negative keys.

Writing a policy::

    class MostRecent(Policy):
        name = "mru"
        def __init__(self, n_keys=0, shared_experts=0):
            super().__init__(n_keys, shared_experts)
            self.last = [0] * n_keys
        def inserted(self, key, now):
            grow(self.last, key)
            self.last[key] = now
        def hit(self, key, now):
            self.last[key] = now
        def victim(self, candidates, now):
            return max(candidates, key=self.last.__getitem__)

    register(MostRecent)
"""

from __future__ import annotations

import array
import inspect
import math
from collections.abc import Callable, Sequence

import numpy as np

Key = int
LN2 = math.log(2.0)


def grow(values: list, key: int, fill=0) -> None:
    """Extend ``values`` with ``fill`` so that ``values[key]`` exists (the policies' per-key lists)."""
    if key >= len(values):
        values.extend([fill] * (key + 1 - len(values)))


class Policy:
    """Base class: override ``victim`` and whichever notifications you need.

    ``n_keys`` is the size of the key space when known (0: keys are small ints, lists grow as they
    come).  ``shared_experts`` is set for a pool shared by all layers: the experts per layer, so a
    key splits into ``divmod(key, shared_experts)`` = (layer, expert); 0 for a pool of one layer.
    """

    name = "base"
    online = True  # False only for policies that read the future (the offline optimum)

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        self.n_keys = n_keys
        self.shared_experts = shared_experts

    def inserted(self, key: Key, now: int) -> None:
        """``key`` was just loaded into the pool (by demand or by prefetch)."""

    def hit(self, key: Key, now: int) -> None:
        """``key`` was accessed while resident."""

    def evicted(self, key: Key) -> None:
        """``key`` left the pool."""

    def victim(self, candidates: Sequence[Key], now: int) -> Key:
        """Pick one of ``candidates`` (resident, evictable; never empty) to evict."""
        raise NotImplementedError

    def routed(self, layer: int, chosen: Sequence[int], probs: np.ndarray | None, now: int) -> None:
        """Optional per-step signal, before a decode step's accesses: the layer, its chosen expert ids
        (ascending) and the router probabilities of the current token for that layer (float32
        [n_experts]; None when a replayed trace holds no ``probs``).  ``now`` is the clock of the
        step's first access.  The live pool and the replay both call it; prefill is not signalled.
        The arrays belong to the caller: copy what you keep."""

    def admits(self, key: Key, victim: Key, now: int) -> bool:
        """Would the policy rather hold ``key`` (a guess about to be prefetched) than ``victim`` (the
        resident it would evict for it)?  The pool asks before every prefetch that evicts.  The
        default says yes: a guess is for the coming step, sooner than any other use."""
        return True


def make_policy(cls: type[Policy], n_keys: int = 0, shared_experts: int = 0, future: Sequence[Key] | None = None) -> Policy:
    """A policy object for a pool of ``n_keys`` keys; an offline one (``online = False``) gets the access sequence.

    Policies written before keys were counted (an ``__init__`` without parameters) still work."""
    if not getattr(cls, "online", True):
        return cls(future if future is not None else [])
    try:
        params = inspect.signature(cls).parameters
    except (TypeError, ValueError):
        params = {"n_keys": None}
    return cls(n_keys, shared_experts) if len(params) >= 2 else cls(n_keys) if params else cls()


class LRU(Policy):
    """Least recently used: evict the key whose last access is oldest."""

    name = "lru"

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        super().__init__(n_keys, shared_experts)
        self.last = [0] * n_keys

    def inserted(self, key, now):
        grow(self.last, key)
        self.last[key] = now

    def hit(self, key, now):
        self.last[key] = now

    def victim(self, candidates, now):
        return min(candidates, key=self.last.__getitem__)


class FIFO(Policy):
    """First in, first out: evict the key loaded longest ago, whatever its use."""

    name = "fifo"

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        super().__init__(n_keys, shared_experts)
        self.loaded = [0] * n_keys

    def inserted(self, key, now):
        grow(self.loaded, key)
        self.loaded[key] = now

    def victim(self, candidates, now):
        return min(candidates, key=self.loaded.__getitem__)


class LFU(Policy):
    """Least frequently used since loaded; ties go to the least recently used."""

    name = "lfu"

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        super().__init__(n_keys, shared_experts)
        self.count = [0] * n_keys
        self.last = [0] * n_keys

    def inserted(self, key, now):
        grow(self.count, key)
        grow(self.last, key)
        self.count[key] = 1
        self.last[key] = now

    def hit(self, key, now):
        self.count[key] += 1
        self.last[key] = now

    def victim(self, candidates, now):
        count, last = self.count, self.last
        return min(candidates, key=lambda k: (count[k], last[k]))


class Optimal(Policy):
    """The offline optimum (Belady's MIN): evict the key used furthest in the future.

    It needs the whole access sequence in advance, so it exists for replay only.
    ``future`` is the list of keys in access order; ``now`` is the index of the
    access being served.
    """

    name = "optimal"
    online = False

    def __init__(self, future: Sequence[Key]):
        super().__init__(0, 0)
        n = len(future)
        self.next_use = [n] * n  # next_use[i] = index of the next access to future[i] after i
        seen: dict[Key, int] = {}
        for i in range(n - 1, -1, -1):
            self.next_use[i] = seen.get(future[i], n + 1)
            seen[future[i]] = i
        self.upcoming = [0] * (max(future, default=-1) + 1)
        self.n = n

    def inserted(self, key, now):
        self.upcoming[key] = self.next_use[now]

    hit = inserted

    def victim(self, candidates, now):
        return max(candidates, key=self.upcoming.__getitem__)


class LRFU(Policy):
    """Least recently/frequently used: evict the key with the smallest decayed access count.

    Each access adds 1 to a key's count, and counts halve every ``1 / lam`` accesses, so
    ``lam`` slides from LFU (0) towards LRU (1).  Unlike ``lfu``, a key's history survives its
    eviction, so an expert that is used often but was pushed out is recognised when it returns.
    Source: Lee, Choi, Kim, Noh, Min, Cho and Kim, "LRFU: a spectrum of policies that subsumes the
    least recently used and least frequently used policies", IEEE Transactions on Computers
    50(12), 2001 (the combined recency and frequency value, CRF, with F(x) = (1/2)^(lam x)).

    Kept cheaply: ``count[key]`` is the key's CRF times ``2 ** (lam * (now - origin))``, the same
    factor for every key, so an access adds ``2 ** (lam * (now - origin))`` (one power per clock
    tick, shared by the tick's accesses) and the victim is the smallest ``count``.  With lam 0
    it is the plain count.  The origin moves forward before the factor can overflow.
    """

    name = "lrfu"
    lam = 0.01  # per access; chosen on tuning traces (docs/policy_research.md)

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        super().__init__(n_keys, shared_experts)
        self.count = [0.0] * n_keys  # CRF * 2 ** (lam * (now - origin)); 0: never seen
        self.origin = 0
        self._tick = -1
        self._add = 1.0

    def _weight(self, now: int) -> float:
        """2 ** (lam * (now - origin)), computed once per clock tick."""
        if now != self._tick:
            x = self.lam * (now - self.origin)
            if x > 512.0:  # rescale everything before the factor overflows a float
                scale = 2.0**-x
                self.count = [c * scale for c in self.count]
                self.origin = now
                x = 0.0
            self._tick = now
            self._add = 2.0**x
        return self._add

    def inserted(self, key, now):
        count = self.count
        if key >= len(count):
            grow(count, key, 0.0)
        count[key] += self._weight(now)

    hit = inserted

    def log_crf(self, key: Key, now: int) -> float:
        """log2 of the key's decayed count at ``now`` (its combined recency and frequency value)."""
        return math.log2(self.count[key]) - self.lam * (now - self.origin)

    def victim(self, candidates, now):
        return min(candidates, key=self.count.__getitem__)


class _RoutingModel:
    """One layer's online predictor of its next routing decisions (used by ``Markov``).

    A context of order o is the layer's last o routing decisions (the sets of chosen experts).
    The *follow-up* of a past step gives expert e the sum of gamma**(d-1) over the steps
    d = 1..horizon after it (those seen so far) that chose e.  For every context the model
    remembers where its last ``memory`` (1 or 2) occurrences ended; the estimate for e comes from
    the longest current context that occurred before: the follow-ups of those occurrences,
    pulled towards e's overall rate by ``kappa`` pseudo-counts (prediction by the longest match,
    as in Cleary and Witten's PPM, IEEE Transactions on Communications 32(4), 1984).  Everything
    comes from steps already seen.

    Memory is fixed: a direct-mapped table of ``2**table_bits`` contexts (a newer context takes the
    bucket of an older one with the same hash bits) and a ring of the last ``2**ring_bits``
    decisions, 4-byte integers (about 270 KiB per layer with the defaults and ``memory`` 2);
    occurrences older than the ring are forgotten.  Work per step: about ``order`` integer hash
    and table operations; per step that asks for an estimate, about ``memory * horizon`` more
    (the follow-up is summed per decision, then spread over the decision's experts).
    """

    __slots__ = ("order", "horizon", "kappa", "weights", "mask", "ring_mask", "keys", "end0", "end1", "ring", "ids", "sets",
                 "steps", "seen", "current", "follow", "total", "cache")

    def __init__(self, order: int, gamma: float, horizon: int, kappa: float, memory: int, table_bits: int = 14, ring_bits: int = 14):
        if memory not in (1, 2):
            raise ValueError(f"memory must be 1 or 2, got {memory}")
        self.order = order
        self.horizon = horizon
        self.kappa = kappa
        self.weights = [gamma**d for d in range(horizon)]
        self.mask = (1 << table_bits) - 1
        self.ring_mask = (1 << ring_bits) - 1
        n = 1 << table_bits
        self.keys = array.array("i", bytes(4 * n))  # 31 bits of the context hash per bucket (0: empty)
        self.end0 = array.array("i", [-1]) * n  # step where the context last ended (-1: never)
        self.end1 = array.array("i", [-1]) * n if memory == 2 else None  # ... and the time before
        self.ring = array.array("i", bytes(4 << ring_bits))  # decision id of each recent step
        self.ids: dict[tuple, int] = {}  # decision -> small int
        self.sets: list[tuple] = []  # small int -> decision
        self.steps = 0
        self.seen: list[int] = []  # expert -> steps that chose it
        self.current: list[int] = []  # hashes of the contexts ending at the last step, short to long
        self.follow: dict | None = None  # see _follow (None: not looked up yet at this step)
        self.total = 0.0
        self.cache: dict[int, float] = {}

    def step(self, chosen: tuple) -> None:
        """The layer chose ``chosen`` at a new step."""
        t = self.steps
        keys, end0, end1, mask = self.keys, self.end0, self.end1, self.mask
        for key in self.current:  # the contexts ending at the previous step occurred there
            b = key & mask
            if keys[b] == key:
                if end1 is not None:
                    end1[b] = end0[b]
            else:
                keys[b] = key
                if end1 is not None:
                    end1[b] = -1
            end0[b] = t - 1
        d = self.ids.get(chosen)
        if d is None:
            d = self.ids[chosen] = len(self.sets)
            self.sets.append(chosen)
        self.ring[t & self.ring_mask] = d
        # context hashes: order 1 from d alone, order o + 1 from d and the order-o context of the step before
        mix = (d + 1) * 0x9E3779B1
        cur = [mix & 0x7FFFFFFF | 1]
        for k in self.current[: self.order - 1]:
            cur.append(((k * 0x85EBCA6B) ^ mix) & 0x7FFFFFFF | 1)
        self.current = cur
        self.steps = t + 1
        seen = self.seen
        for e in chosen:
            if e >= len(seen):
                grow(seen, e)
            seen[e] += 1
        self.follow = None
        self.cache = {}

    def _follow(self) -> dict:
        """Follow-up weight per expert of the longest current context seen before, summed over its
        remembered occurrences; its weight total goes to ``self.total`` ({} when no context was seen)."""
        keys, mask, t = self.keys, self.mask, self.steps - 1
        oldest = max(0, t - self.ring_mask)  # earlier steps have left the ring (and -1 means never)
        ring, rm, weights, horizon = self.ring, self.ring_mask, self.weights, self.horizon
        per_decision: dict = {}
        total = 0.0
        for key in reversed(self.current):  # longest first
            b = key & mask
            if keys[b] != key:
                continue
            for ends in (self.end0, self.end1):
                if ends is None:
                    break
                p = ends[b]
                if p < oldest:
                    break
                for i in range(min(horizon, t - p)):  # p < t: contexts are registered one step late
                    wt = weights[i]
                    total += wt
                    d = ring[(p + 1 + i) & rm]
                    per_decision[d] = per_decision.get(d, 0.0) + wt
            if total > 0.0:
                break
        follow: dict = {}
        sets = self.sets
        for d, wt in per_decision.items():
            for e in sets[d]:
                follow[e] = follow.get(e, 0.0) + wt
        self.follow = follow
        self.total = total
        return follow

    def p(self, e: int) -> float:
        """Estimated (discounted) rate at which the coming steps choose expert ``e``."""
        p = self.cache.get(e)
        if p is None:
            follow = self.follow if self.follow is not None else self._follow()
            seen = self.seen
            p = ((seen[e] if e < len(seen) else 0) + 1.0) / (self.steps + 2.0)
            if follow:
                p = (follow.get(e, 0.0) + self.kappa * p) / (self.total + self.kappa)
            self.cache[e] = p
        return p


class Markov(LRFU):
    """Evict the expert least likely to be needed soon, by an online model of the layer's routing.

    The chance that an expert is chosen in the next few steps is estimated from what followed
    the last times the layer's recent routing decisions occurred (``_RoutingModel``, learned
    online from this run alone), and combined with the expert's decayed access count
    (``LRFU``): evict the candidate with the smallest ``log p + w * ln crf``.  It reads the
    chosen experts of each step through ``routed`` (the live pool and the replay both call it);
    without those calls (or in prefill) the model has no context and the rule reduces to LRFU.

    Keys are expert ids (one policy per layer) or ``layer * shared_experts + expert`` (one pool
    shared by all layers: one routing model per layer).  Parameters were chosen on tuning traces
    and checked on traces never used for tuning (docs/policy_research.md, scripts/tune_policy.py).
    """

    name = "markov"
    # chosen by scripts/tune_policy.py on traces of training text (docs/policy_research.md)
    order = 4  # context length, in steps
    gamma = 0.5  # weight of an outcome d steps after its context: gamma ** (d - 1)
    horizon = 8  # outcomes are counted up to this many steps after the context
    kappa = 0.5  # pseudo-counts pulling the context's estimate towards the expert's overall rate
    memory = 2  # occurrences remembered per context: 1 or 2
    lam = 0.01  # LRFU decay per access
    w = 0.5  # weight of the frequency term

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        super().__init__(n_keys, shared_experts)
        self.models: dict = {}
        self.layer = None  # the layer of a per-layer pool's keys: the last one routed

    def _model(self, layer) -> _RoutingModel:
        m = self.models.get(layer)
        if m is None:
            m = self.models[layer] = _RoutingModel(self.order, self.gamma, self.horizon, self.kappa, self.memory)
        return m

    def routed(self, layer, chosen, probs, now):
        self.layer = layer
        m = self.models.get(layer)
        if m is None:
            m = self._model(layer)
        m.step(tuple(chosen))

    def score(self, key: Key, now: int) -> float:
        """log p(key needed soon) + w * ln crf(key); the smallest is evicted."""
        layer, e = divmod(key, self.shared_experts) if self.shared_experts else (self.layer, key)
        return math.log(self._model(layer).p(e)) + self.w * LN2 * self.log_crf(key, now)

    def victim(self, candidates, now):
        if len(candidates) == 1:
            return candidates[0]
        # score() up to a term common to every candidate (w * lam * ln 2 * (now - origin)), inlined
        count, w, log = self.count, self.w, math.log
        if self.shared_experts:  # a shared pool: each key scored by its layer's model
            E, model = self.shared_experts, self._model
            return min(candidates, key=lambda k: log(model(k // E).p(k % E)) + w * log(count[k]))
        p = self._model(self.layer).p
        best, low = None, math.inf
        for k in candidates:
            s = log(p(k)) + w * log(count[k])
            if s < low:
                best, low = k, s
        return best

    @classmethod
    def with_params(cls, **params) -> type[Markov]:
        """A subclass with other parameter values (for tuning; not registered)."""
        unknown = set(params) - {"order", "gamma", "horizon", "kappa", "memory", "lam", "w"}
        if unknown:
            raise TypeError(f"unknown parameters {sorted(unknown)}")
        label = ",".join(f"{k}={v}" for k, v in sorted(params.items()))
        return type(f"Markov[{label}]", (cls,), dict(params, name=f"markov[{label}]"))


class Orbit(Policy):
    """For a pool shared by all layers: evict the expert with the least expected use per slot-time,
    knowing when its next chance of use comes round in the layer cycle.

    Layers run in a fixed cycle, one step each per token, so an expert of layer l can next be used
    at layer l's next step, a known number of layer steps away; if it is not used then, its next
    chance is a whole token (L steps) later.  Each resident expert is scored by

        ln q + w * ln crf - beta * (distance to its next possible use, in layer steps)

    and the lowest is evicted: q estimates how often its layer will choose it in the coming steps,
    the frequency term ``crf`` is LRFU's decayed access count (as in ``lrfu``), and beta discounts
    a use by how far away it is (a slot held for d more steps before a use is worth exp(-beta d)).

    q comes from an online model of each layer's routing: for every routing decision of the layer
    (the set of experts it chose), the experts chosen in the ``horizon`` steps after its earlier
    occurrences, the d-th step after weighted gamma ** (d - 1), each earlier occurrence's weight
    multiplied by ``memory`` when the decision occurs again; pulled towards the expert's overall
    rate in its layer by ``kappa`` pseudo-counts.  Everything comes from steps already seen.

    Cheap by construction: a step of layer l changes only the scores of layer l's experts (its
    decision, hence its estimates, and its next possible use; the distance of every other layer
    shrinks by one step, which changes no ranking), so ``routed`` rescores the layer's resident
    experts, an access rescores the accessed key, and a victim is one ``min`` over a list.  State:
    plain lists indexed by key, per layer a direct-mapped table of ``2 ** table_bits`` decisions
    with one row of follow-up weights each (``n_experts`` floats).

    With one pool per layer (keys are expert ids, ``shared_experts`` 0) the distance is the same
    for every key and the rule is the routing model with the frequency term.  Without ``routed``
    calls (prefill) the estimate is the expert's overall rate.  Parameters were chosen on traces of
    training text (docs/policy_research.md).
    """

    name = "orbit"
    horizon = 8  # steps of a layer after a decision whose choices count as its follow-up
    gamma = 0.5  # weight of the d-th step after a decision: gamma ** (d - 1)
    memory = 0.5  # weight left to a decision's earlier follow-ups each time it occurs again
    kappa = 0.5  # pseudo-counts pulling a decision's estimate towards the expert's overall rate
    beta = 0.5  # discount per layer step until the next possible use
    w = 0.25  # weight of the frequency term
    lam = 0.01  # LRFU decay per access of the frequency term
    table_bits = 12  # decisions remembered per layer: 2 ** table_bits

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        super().__init__(n_keys, shared_experts)
        E = self.E = shared_experts or max(n_keys, 1)
        L = self.L = n_keys // shared_experts if shared_experts else 1
        n = max(n_keys, E * L)
        self.score = [0.0] * n  # the rule's value of each resident key (the lowest is evicted)
        self.qpart = [0.0] * n  # its ln q - beta * next possible use, set when its layer routes
        self.count = [0.0] * n  # LRFU count (CRF times a factor common to every key)
        self.shift = 0.0  # ln of the factor taken out of every count so far
        self.origin = 0
        self._tick = -1
        self._add = 1.0
        B = 1 << self.table_bits
        self.mask = B - 1
        self.decisions = [[None] * B for _ in range(L)]  # bucket -> the decision it holds
        self.rows = [[None] * B for _ in range(L)]  # bucket -> follow-up weight per expert (times inc)
        self.total = [[0.0] * B for _ in range(L)]  # bucket -> follow-up weight of the steps seen (times inc)
        self.inc = [[1.0] * B for _ in range(L)]  # bucket -> the factor its weights are kept multiplied by
        self.recent = [[] for _ in range(L)]  # the layer's last ``horizon`` decisions' buckets, newest first
        self.current = [-1] * L  # bucket of the layer's last decision (-1: none yet)
        self.seen = [[0] * E for _ in range(L)]  # steps of the layer that chose each expert
        self.steps = [0] * L
        self.next_use = [float(layer) for layer in range(L)]  # layer step of each layer's next possible use
        self.clock = 0  # layer steps so far
        self.members = [set() for _ in range(L)]  # resident keys of each layer

    # ------------------------------------------------------------------ the estimate
    def _value(self, layer: int, e: int) -> float:
        """ln q - beta * next possible use, for expert ``e`` of ``layer`` now."""
        seen, steps, kappa = self.seen[layer], self.steps[layer], self.kappa
        prior = (seen[e] + 1.0) / (steps + 2.0) if e < len(seen) else 1.0 / (steps + 2.0)
        b = self.current[layer]
        far = self.beta * self.next_use[layer]
        if b < 0:
            return math.log(prior) - far
        f = 1.0 / self.inc[layer][b]
        row = self.rows[layer][b]
        got = row[e] * f if e < len(row) else 0.0
        return math.log(got + kappa * prior) - math.log(self.total[layer][b] * f + kappa) - far

    def _weight(self, now: int) -> float:
        """LRFU's 2 ** (lam * (now - origin)), once per clock tick; rescaled before it overflows."""
        if now != self._tick:
            x = self.lam * (now - self.origin)
            if x > 512.0:
                scale = 2.0**-x
                self.count = [c * scale for c in self.count]
                self.shift += x * LN2
                self.origin = now
                x = 0.0
            self._tick = now
            self._add = 2.0**x
        return self._add

    def _touch(self, key: int, now: int) -> None:
        count = self.count
        if key >= len(count):
            for values in (count, self.score, self.qpart):
                grow(values, key, 0.0)
        count[key] += self._weight(now)
        self.score[key] = self.qpart[key] + self.w * (math.log(count[key]) + self.shift)

    # ------------------------------------------------------------------ notifications
    def routed(self, layer, chosen, probs, now):
        E = self.E
        if not self.shared_experts:
            layer = 0
            if chosen and max(chosen) >= E:  # a policy made without n_keys meets larger ids
                self._widen(max(chosen) + 1)
                E = self.E
        decision = tuple(chosen)
        b = hash(decision) & self.mask
        decisions, rows, total, inc = self.decisions[layer], self.rows[layer], self.total[layer], self.inc[layer]
        if decisions[b] != decision:  # a new decision, or another one in its bucket: it starts empty
            decisions[b] = decision
            rows[b] = [0.0] * E
            total[b] = 0.0
            inc[b] = 1.0
        else:  # earlier follow-ups weigh ``memory`` times less from now on
            inc[b] /= self.memory
            if inc[b] > 1e200:
                f = 1.0 / inc[b]
                rows[b] = [v * f for v in rows[b]]
                total[b] *= f
                inc[b] = 1.0
        # this step is the follow-up of the layer's last ``horizon`` decisions
        g, gamma = 1.0, self.gamma
        recent = self.recent[layer]
        for r in recent:
            x = g * inc[r]
            row = rows[r]
            for e in chosen:
                row[e] += x
            total[r] += x
            g *= gamma
        recent.insert(0, b)
        if len(recent) > self.horizon:
            recent.pop()
        self.current[layer] = b
        seen = self.seen[layer]
        for e in chosen:
            seen[e] += 1
        self.steps[layer] += 1
        L = self.L
        self.next_use[layer] = self.clock + L
        self.clock += 1
        # the layer's resident experts: new estimates and a new next possible use
        f = 1.0 / inc[b]
        row = rows[b]
        kp = self.kappa / (self.steps[layer] + 2.0)
        low = math.log(total[b] * f + self.kappa) + self.beta * self.next_use[layer]
        log, base, w, shift = math.log, layer * self.shared_experts, self.w, self.shift
        qpart, score, count = self.qpart, self.score, self.count
        for k in self.members[layer]:
            e = k - base
            v = log(row[e] * f + kp * (seen[e] + 1)) - low
            qpart[k] = v
            score[k] = v + w * (log(count[k]) + shift)

    def _widen(self, E: int) -> None:
        """More experts than the policy was made for (per-layer keys without n_keys)."""
        for rows in self.rows:
            for i, row in enumerate(rows):
                if row is not None:
                    rows[i] = row + [0.0] * (E - len(row))
        for seen in self.seen:
            seen.extend([0] * (E - len(seen)))
        self.E = E

    def _layer_of(self, key: int) -> int:
        return key // self.shared_experts if self.shared_experts else 0

    def inserted(self, key, now):
        layer = self._layer_of(key)
        e = key - layer * self.shared_experts
        if e >= self.E:
            self._widen(e + 1)
        if key >= len(self.qpart):
            for values in (self.count, self.score, self.qpart):
                grow(values, key, 0.0)
        self.qpart[key] = self._value(layer, e)
        self.members[layer].add(key)
        self._touch(key, now)

    def hit(self, key, now):
        self._touch(key, now)

    def evicted(self, key):
        self.members[self._layer_of(key)].discard(key)

    def victim(self, candidates, now):
        return min(candidates, key=self.score.__getitem__)

    @classmethod
    def with_params(cls, **params) -> type[Orbit]:
        """A subclass with other parameter values (for tuning; not registered)."""
        unknown = set(params) - {"horizon", "gamma", "memory", "kappa", "beta", "w", "lam", "table_bits"}
        if unknown:
            raise TypeError(f"unknown parameters {sorted(unknown)}")
        label = ",".join(f"{k}={v}" for k, v in sorted(params.items()))
        return type(f"Orbit[{label}]", (cls,), dict(params, name=f"orbit[{label}]"))


_REGISTRY: dict[str, Callable[..., Policy]] = {}


def register(cls: type[Policy]) -> type[Policy]:
    """Make a policy available by its ``name`` (``--evict NAME``, ``replay --evict``)."""
    _REGISTRY[cls.name] = cls
    return cls


for _cls in (LRU, LFU, FIFO, Optimal, LRFU, Markov, Orbit):
    register(_cls)


def names(online_only: bool = False) -> list[str]:
    return [n for n, c in _REGISTRY.items() if not online_only or getattr(c, "online", True)]


def get(name: str) -> type[Policy]:
    from .errors import BadOption

    cls = _REGISTRY.get(name)
    if cls is None:
        raise BadOption(f"unknown eviction policy {name!r}; known: {', '.join(names())}")
    return cls
