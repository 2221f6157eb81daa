"""``orbit``: for a pool shared by all layers, an eviction rule that knows when each expert's next chance of use comes round."""

from __future__ import annotations

import math
from array import array
from collections import deque

from moerun.policies._base import LN2, Policy, first_min, grow, rescaled


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
    with one row of follow-up weights each (``n_experts`` doubles, packed).

    With one pool per layer (keys are expert ids, ``shared_experts`` 0) the distance is the same
    for every key and the rule is the routing model with the frequency term.  Without ``routed``
    calls (prefill) the estimate is the expert's overall rate.  Parameters were chosen on a trace of
    scree's training text and checked on held-out text never used for tuning (docs/research/policies.md,
    scripts/tune_policy.py --policy orbit --shared).
    """

    name = "orbit"
    for_shared_pool = True  # the planner always tries it in a shared pool
    # chosen by scripts/tune_policy.py --policy orbit --shared on a trace of scree's training text
    # (pool sizes 10%, 25%, 50% of all experts), checked on held-out text (docs/research/policies.md)
    horizon = 8  # steps of a layer after a decision whose choices count as its follow-up
    gamma = 0.5  # weight of the d-th step after a decision: gamma ** (d - 1)
    memory = 0.75  # weight left to a decision's earlier follow-ups each time it occurs again
    kappa = 0.25  # pseudo-counts pulling a decision's estimate towards the expert's overall rate
    beta = 0.25  # discount per layer step until the next possible use
    w = 1.0  # weight of the frequency term
    lam = 0.003  # LRFU decay per access of the frequency term
    table_bits = 12  # decisions remembered per layer: 2 ** table_bits

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        super().__init__(n_keys, shared_experts)
        E = self.E = shared_experts or max(n_keys, 1)
        L = n_keys // shared_experts if shared_experts else 1
        n = max(n_keys, E * L)
        self.score = [0.0] * n  # the rule's value of each resident key (the lowest is evicted)
        self.qpart = [0.0] * n  # its ln q - beta * next possible use, set when its layer routes
        self.count = [0.0] * n  # LRFU count (CRF times a factor common to every key)
        self.freq = [0.0] * n  # w * ln of its count (plus shift): the frequency term of its score
        self.shift = 0.0  # ln of the factor taken out of every count so far
        self.origin = 0
        self._tick = -1
        self._add = 1.0
        self.mask = (1 << self.table_bits) - 1
        self.decisions: list[list] = []  # per layer: bucket -> the decision it holds
        self.rows: list[list] = []  # per layer: bucket -> follow-up weight per expert (times inc)
        self.total: list[list[float]] = []  # per layer: bucket -> follow-up weight of the steps seen (times inc)
        self.inc: list[list[float]] = []  # per layer: bucket -> the factor its weights are kept multiplied by
        self.recent: list[deque] = []  # per layer: its last ``horizon`` decisions' buckets, newest first
        self.powers = [self.gamma**d for d in range(self.horizon)]  # weight of the d+1-th step after a decision
        self.current: list[int] = []  # per layer: bucket of its last decision (-1: none yet)
        # per layer: expert id -> its label, in the order the layer first chose them.  A decision's bucket
        # is the hash of its labels, not of its ids, so renumbering the experts (replay keeps only the ids
        # a trace uses, moerun.sim.steps.compact) changes no decision of the policy
        self.labels: list[dict[int, int]] = []
        self.seen: list[list[int]] = []  # per layer: steps that chose each expert
        self.steps: list[int] = []
        self.next_use: list[float] = []  # per layer: the layer step of its next possible use
        self.members: list[set] = []  # per layer: its resident keys
        self.clock = 0  # layer steps so far
        self.L = 0
        self._add_layers(L)

    def _add_layers(self, L: int) -> None:
        """Per-layer state up to ``L`` layers (a shared pool made without ``n_keys`` meets more)."""
        B = self.mask + 1
        for layer in range(self.L, L):
            self.decisions.append([None] * B)
            self.rows.append([None] * B)
            self.total.append([0.0] * B)
            self.inc.append([1.0] * B)
            self.recent.append(deque(maxlen=self.horizon))
            self.current.append(-1)
            self.labels.append({})
            self.seen.append([0] * self.E)
            self.steps.append(0)
            self.next_use.append(float(self.clock + layer))
            self.members.append(set())
        self.L = max(self.L, L)

    # ------------------------------------------------------------------ the estimate
    def _value(self, layer: int, e: int) -> float:
        """ln q - beta * next possible use, for expert ``e`` of ``layer`` now.  The same arithmetic as
        ``routed``'s rescoring, to the last bit: a key's value is then the same whether it was resident
        when its layer last routed or came in since (replay's fast path relies on it, ``history_scores``)."""
        seen, steps, kappa = self.seen[layer], self.steps[layer], self.kappa
        n = seen[e] if e < len(seen) else 0
        b = self.current[layer]
        far = self.next_use[layer]
        if b < 0:
            return math.log((n + 1.0) / (steps + 2.0)) - self.beta * far
        f = 1.0 / self.inc[layer][b]
        row = self.rows[layer][b]
        got = row[e] * f if e < len(row) else 0.0
        low = math.log(self.total[layer][b] * f + kappa) + self.beta * far
        return math.log(got + kappa / (steps + 2.0) * (n + 1)) - low

    def _weight(self, now: int) -> float:
        """LRFU's 2 ** (lam * (now - origin)), once per clock tick; rescaled before it overflows."""
        if now != self._tick:
            x = self.lam * (now - self.origin)
            if x > 512.0:
                self.count = rescaled(self.count, 2.0**-x)
                self.shift += x * LN2
                self.origin = now
                x = 0.0
            self._tick = now
            self._add = 2.0**x
        return self._add

    def _touch(self, key: int, now: int) -> None:
        add = self._weight(now)  # first: it may rescale (and replace) the counts
        count = self.count
        if key >= len(count):
            for values in (count, self.score, self.qpart, self.freq):
                grow(values, key, 0.0)
        count[key] += add
        fr = self.freq[key] = self.w * (math.log(count[key]) + self.shift)
        self.score[key] = self.qpart[key] + fr

    # ------------------------------------------------------------------ notifications
    def routed(self, layer, chosen, probs, now):
        E = self.E
        if not self.shared_experts:
            layer = 0
            if chosen and max(chosen) >= E:  # a policy made without n_keys meets larger ids
                self._widen(max(chosen) + 1)
                E = self.E
        elif layer >= self.L:
            self._add_layers(layer + 1)
        labels = self.labels[layer]
        try:
            decision = tuple(map(labels.__getitem__, chosen))
        except KeyError:  # the layer chooses an expert for the first time
            for e in chosen:
                if e not in labels:
                    labels[e] = len(labels)
            decision = tuple([labels[e] for e in chosen])
        b = hash(decision) & self.mask
        decisions, rows, total, inc = self.decisions[layer], self.rows[layer], self.total[layer], self.inc[layer]
        if decisions[b] != decision:  # a new decision, or another one in its bucket: it starts empty
            decisions[b] = decision
            rows[b] = array("d", bytes(8 * E))  # doubles packed: a quarter of a list of floats' memory
            total[b] = 0.0
            inc[b] = 1.0
        else:  # earlier follow-ups weigh ``memory`` times less from now on
            inc[b] /= self.memory
            if inc[b] > 1e200:
                f = 1.0 / inc[b]
                rows[b] = array("d", [v * f for v in rows[b]])
                total[b] *= f
                inc[b] = 1.0
        # this step is the follow-up of the layer's last ``horizon`` decisions
        recent = self.recent[layer]
        for r, g in zip(recent, self.powers):
            x = g * inc[r]
            row = rows[r]
            for e in chosen:
                row[e] += x
            total[r] += x
        recent.appendleft(b)  # a deque of at most ``horizon``: the oldest drops out
        self.current[layer] = b
        seen = self.seen[layer]
        for e in chosen:
            seen[e] += 1
        steps = self.steps[layer] = self.steps[layer] + 1
        far = self.next_use[layer] = self.clock + self.L
        self.clock += 1
        # the layer's resident experts: new estimates and a new next possible use
        f = 1.0 / inc[b]
        row = rows[b]
        kp = self.kappa / (steps + 2.0)
        low = math.log(total[b] * f + self.kappa) + self.beta * far
        log, base = math.log, layer * self.shared_experts
        qpart, score, freq = self.qpart, self.score, self.freq
        for k in self.members[layer]:
            e = k - base
            v = qpart[k] = log(row[e] * f + kp * (seen[e] + 1)) - low
            score[k] = v + freq[k]

    def _widen(self, E: int) -> None:
        """More experts than the policy was made for (per-layer keys without n_keys)."""
        for rows in self.rows:
            for i, row in enumerate(rows):
                if row is not None:
                    rows[i] = row + array("d", bytes(8 * (E - len(row))))
        for seen in self.seen:
            seen.extend([0] * (E - len(seen)))
        self.E = E

    def _layer_of(self, key: int) -> int:
        return key // self.shared_experts if self.shared_experts else 0

    def inserted(self, key, now):
        layer = self._layer_of(key)
        if layer >= self.L:
            self._add_layers(layer + 1)
        e = key - layer * self.shared_experts
        if e >= self.E:
            self._widen(e + 1)
        if key >= len(self.qpart):
            for values in (self.count, self.score, self.qpart, self.freq):
                grow(values, key, 0.0)
        self.qpart[key] = self._value(layer, e)
        self.members[layer].add(key)
        self._touch(key, now)

    def hit(self, key, now):
        self._touch(key, now)

    def evicted(self, key):
        self.members[self._layer_of(key)].discard(key)

    history_scores = True  # see Policy; ``_value`` and ``routed`` compute a key's value alike

    def scores(self, keys, now):
        score = self.score
        return [score[k] for k in keys]

    def victim(self, candidates, now):
        return min(candidates, key=self.score.__getitem__)

    def pick(self, resident, pinned, busy, now):
        return first_min(resident, self.score, pinned, busy)

    @classmethod
    def with_params(cls, **params) -> type[Orbit]:
        """A subclass with other parameter values (for tuning; not registered)."""
        unknown = set(params) - {"horizon", "gamma", "memory", "kappa", "beta", "w", "lam", "table_bits"}
        if unknown:
            raise TypeError(f"unknown parameters {sorted(unknown)}")
        label = ",".join(f"{k}={v}" for k, v in sorted(params.items()))
        return type(f"Orbit[{label}]", (cls,), dict(params, name=f"orbit[{label}]"))
