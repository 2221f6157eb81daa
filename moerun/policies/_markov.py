"""``markov``: evict the expert least likely to be needed soon, by an online model of each layer's routing."""

from __future__ import annotations

import array
import math

from moerun.policies._base import LN2, LRFU, Key, Policy, first_min, grow


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
    and checked on traces never used for tuning (docs/research/policies.md, scripts/tune_policy.py).
    """

    name = "markov"
    # chosen by scripts/tune_policy.py on traces of training text (docs/research/policies.md)
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
        # A shared pool keeps each resident key's score (``pick``): the two terms of ``scores``, log p, set
        # when the key comes in and each time its layer routes (p changes only then), and w * ln count, set
        # when the key is accessed and when the counts are rescaled; and their sum.
        self.members: dict[int, set] = {}  # layer -> its resident keys
        self.logp = [0.0] * n_keys
        self.wlc = [0.0] * n_keys
        self.kept = [0.0] * n_keys
        self._origin = 0  # the counts' origin when ``wlc`` was last right for every resident key

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
        members = self.members.get(layer) if self.shared_experts else None
        if members:  # the layer's resident keys: log p anew (the same arithmetic as ``scores``)
            p, log, base = m.p, math.log, layer * self.shared_experts
            logp, wlc, kept = self.logp, self.wlc, self.kept
            for k in members:
                lp = logp[k] = log(p(k - base))
                kept[k] = lp + wlc[k]

    def _keep(self, key: Key, inserted: bool) -> None:
        """A shared pool's key was accessed (``inserted``: it came in): its kept score anew."""
        count, w, log = self.count, self.w, math.log
        if self.origin != self._origin:  # the counts were rescaled: every resident key's frequency term
            self._origin = self.origin
            wlc, kept, logp = self.wlc, self.kept, self.logp
            for members in self.members.values():
                for k in members:
                    kept[k] = logp[k] + (wc := w * log(count[k]))
                    wlc[k] = wc
        if key >= len(self.kept):
            for values in (self.logp, self.wlc, self.kept):
                grow(values, key, 0.0)
        if inserted:
            layer, e = divmod(key, self.shared_experts)
            members = self.members.get(layer)
            if members is None:
                members = self.members[layer] = set()
            members.add(key)
            self.logp[key] = log(self._model(layer).p(e))
        wc = self.wlc[key] = w * log(count[key])
        self.kept[key] = self.logp[key] + wc

    def inserted(self, key, now):
        LRFU.inserted(self, key, now)
        if self.shared_experts:
            self._keep(key, True)

    def hit(self, key, now):
        LRFU.inserted(self, key, now)
        if self.shared_experts:
            self._keep(key, False)

    def evicted(self, key):
        if self.shared_experts:
            members = self.members.get(key // self.shared_experts)
            if members is not None:
                members.discard(key)

    def score(self, key: Key, now: int) -> float:
        """log p(key needed soon) + w * ln crf(key); the smallest is evicted."""
        layer, e = divmod(key, self.shared_experts) if self.shared_experts else (self.layer, key)
        return math.log(self._model(layer).p(e)) + self.w * LN2 * self.log_crf(key, now)

    def scores(self, keys, now):
        """The values ``victim`` minimises: score() up to a term common to every key
        (w * lam * ln 2 * (now - origin)); replay's fast path reads them too (``history_scores``)."""
        count, w, log = self.count, self.w, math.log
        E = self.shared_experts
        if not E:
            p = self._model(self.layer).p
            return [log(p(k)) + w * log(count[k]) for k in keys]
        out = []
        last = p = None
        for k in keys:  # a shared pool: each key scored by its layer's model
            layer, e = divmod(k, E)
            if layer != last:
                p, last = self._model(layer).p, layer
            out.append(log(p(e)) + w * log(count[k]))
        return out

    def victim(self, candidates, now):
        if len(candidates) == 1:
            return candidates[0]
        s = self.scores(candidates, now)
        return candidates[s.index(min(s))]  # the first of the smallest, as min() over the candidates

    pick_relies_on = ("victim", "scores", "score", "inserted", "hit", "evicted", "routed")

    def pick(self, resident, pinned, busy, now):
        """A shared pool: the first smallest kept score (the values ``scores`` gives, kept up to date per
        key); a pool of one layer asks ``victim`` (its few candidates are scored when asked)."""
        if self.shared_experts:
            return first_min(resident, self.kept, pinned, busy)
        return Policy.pick(self, resident, pinned, busy, now)

    @classmethod
    def with_params(cls, **params) -> type[Markov]:
        """A subclass with other parameter values (for tuning; not registered)."""
        unknown = set(params) - {"order", "gamma", "horizon", "kappa", "memory", "lam", "w"}
        if unknown:
            raise TypeError(f"unknown parameters {sorted(unknown)}")
        label = ",".join(f"{k}={v}" for k, v in sorted(params.items()))
        return type(f"Markov[{label}]", (cls,), dict(params, name=f"markov[{label}]"))
