"""The decision core: what a pool decides, with no buffers, no clocks and no I/O.

One object per pool kind decides hits, misses and victims, where guesses go, which unchosen guesses
are dropped, and the prefill schedule.  Three drivers execute what it decides:

- the live pool (``moerun.runtime.pool``) with real buffers, the reader process and the link;
- replay (``moerun.sim.prefetch``, ``moerun.sim.steps``) with loads that take no time;
- the planner's time model (``moerun.planner.timeline``) on simulated time.

So the three follow one mechanism, not three copies kept equal by tests (docs/design/decision-core.md).
A layer's step is ``route`` (pin its chosen experts, tell the policy) then ``serve`` (the accesses, in
ascending id); at the prefetch point ``place`` yields one record per guess; when a layer routes,
``meet`` offers its unchosen guesses for dropping; ``done`` ends the layer.  Whether a guess is worth
reading is one judgement the driver passes in (``pays``, from ``moerun.runtime.guesses``): replay's
loads are instant and always pay.

``Quotas`` is a pool per layer (keys are expert ids), ``Shared`` one pool for every layer (keys are
``layer * n_experts + expert``; a guess never evicts an expert the current layer computes).

A warm start (``warm``) fills an empty pool with the hottest experts of a profile before the first
step, the same fill for all three drivers (``hottest`` ranks the profile's counts).
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator, Sequence
from typing import NamedTuple

from moerun.policies import Policy
from moerun.runtime.residency import Key, NoVictim, Residency

# why a guess was not read
RESIDENT = "resident"  # already resident or on its way: nothing to do
NO_PAY = "does not pay"  # its read would cost more than it saves (moerun.runtime.guesses)
NO_ROOM = "no room"  # every resident is pinned, busy or another guess of the round
REFUSED = "not admitted"  # the policy would rather keep the victim (Policy.admits)


class Placed(NamedTuple):
    """A guess placed: its key, its slot, and the key it evicted (None: a free slot); ``wasted`` when
    that victim was itself a guess no layer had used."""

    key: Key
    slot: int
    victim: Key | None
    wasted: bool


class Declined(NamedTuple):
    """A guess not read, and why (RESIDENT, NO_PAY, NO_ROOM or REFUSED)."""

    key: Key
    why: str


# One access served: (hit, slot, evicted key or None), as ``Residency.access`` returns it.  A plain
# tuple, not a record: it is made on every access of the decode hot path.
Served = tuple


def prefill_schedule(rows: Iterable[Iterable[int]]) -> list[int]:
    """The prefill block of one layer: each distinct expert of its tokens' rows once, ascending (-1 is
    padding).  Each is then accessed pinned alone (``Decisions.prefill``)."""
    return sorted({e for row in rows for e in row if e >= 0})


def hottest(counts) -> list[tuple[int, int]]:
    """The ``(layer, expert)`` pairs of a profile's counts ([layers][experts], whole numbers) that were used at
    all, hottest first: the most uses first, ties to the lower layer, then the lower expert id.  ``warm``
    fills from the front of this ranking (each layer from its own pairs, in the same order)."""
    pairs = [(-int(n), layer, e) for layer, row in enumerate(counts) for e, n in enumerate(row) if n > 0]
    pairs.sort()
    return [(layer, e) for _, layer, e in pairs]


class Decisions:
    """A pool's decisions over its ``Residency`` objects (one per layer, or one shared by all)."""

    def __init__(self, res_of: list[Residency], base: list[int], shared: bool = False):
        self.shared = shared  # one pool for every layer: a guess never evicts the current layer's experts
        self.res_of = res_of
        self.base = base  # key of (layer, expert): base[layer] + expert
        self.pinned: tuple = ()  # keys of the layer being computed (never victims, never evicted by a guess)
        # per layer, keys a guess placed that no layer has used since (one set for a shared pool)
        self.fresh_of: list[set[Key]] = [set()] * len(res_of) if shared else [set() for _ in res_of]
        self.guessed: list[list[Key]] = [[] for _ in res_of]  # guesses placed for each layer, not yet met by it
        self.used: list[Key] = []  # of the last step: fresh guesses it hit
        self.wasted: list[Key] = []  # of the last step: fresh guesses it evicted
        self.signals = type(res_of[0].policy).routed is not Policy.routed if res_of else False

    def key(self, layer: int, expert: int) -> Key:
        return self.base[layer] + expert

    def residency(self, layer: int) -> Residency:
        return self.res_of[layer]

    def resident(self, layer: int, expert: int) -> bool:
        """Resident, or on its way (no read needed)."""
        return self.base[layer] + expert in self.res_of[layer].slot_of

    # ------------------------------------------------------------------ a layer's accesses
    def route(self, layer: int, ids: Sequence[int] | None, probs=None, keys: tuple | None = None) -> tuple:
        """A decode layer has routed to ``ids`` (ascending): pin them, tell the policy (``Policy.routed``);
        returns the pinned keys.  A driver that holds the keys already passes them (``ids`` may then be
        None: they are worked out only if the policy listens)."""
        base = self.base[layer]
        if keys is None:
            keys = tuple(ids) if not base else tuple([base + e for e in ids])
        self.pinned = keys
        if self.signals:
            r = self.res_of[layer]
            if ids is None:
                ids = [k - base for k in keys]
            r.policy.routed(layer, ids, probs, r.now)
        return keys

    def serve(self, layer: int, done: list | None = None) -> list:
        """The pinned accesses of ``route``, in order: ``[(hit, slot, victim), ...]``.  All pinned at once,
        or each pinned alone when they outnumber the pool (the live pool refuses such quotas).  Raises
        NoVictim (with ``done``, the accesses served so far) when every evictable slot is busy; call
        again with ``done`` to go on.  ``used`` and ``wasted`` then name the fresh guesses hit and evicted
        (drivers that read them call ``serve``, not ``step``)."""
        r = self.res_of[layer]
        keys = self.pinned
        if len(keys) <= r.capacity:
            out = r.access_step(keys, keys, done)
        else:
            out = done if done is not None else []
            for i in range(len(out), len(keys)):
                try:
                    out.append(r.access(keys[i], (keys[i],)))
                except NoVictim:
                    raise NoVictim(out) from None
        fresh = self.fresh_of[layer]
        if fresh:
            self.used.clear()
            self.wasted.clear()
            for key, (hit, _, victim) in zip(keys, out):
                self._met(fresh, key, hit, victim)
        elif self.used or self.wasted:
            self.used.clear()
            self.wasted.clear()
        return out

    def _met(self, fresh: set, key, hit: bool, victim) -> None:
        """One access against the fresh guesses: a fresh guess hit is used, one evicted unhit is wasted."""
        if hit:
            if key in fresh:
                fresh.discard(key)
                self.used.append(key)
        elif victim in fresh:
            fresh.discard(victim)
            self.wasted.append(victim)

    def step(self, layer: int, ids: Sequence[int], probs=None) -> list:
        """``route`` then ``serve``, in one call (the live pool's decode path).  On NoVictim the step is
        routed and ``done`` served: go on with ``serve(layer, done)``."""
        base = self.base[layer]
        keys = self.pinned = tuple(ids) if not base else tuple([base + e for e in ids])
        r = self.res_of[layer]
        if self.signals:
            r.policy.routed(layer, ids, probs, r.now)
        if self.fresh_of[layer] or len(keys) > r.capacity:
            return self.serve(layer)
        return r.access_step(keys, keys)  # no fresh guess to track (``used`` and ``wasted`` are left as they were)

    def prefill(self, layer: int, expert: int) -> Served:
        """A prefill access, pinned alone (the clock advances; no ``Policy.routed``).  Raises NoVictim."""
        key = self.base[layer] + expert
        self.pinned = (key,)
        hit, slot, victim = self.res_of[layer].access(key, self.pinned)
        self.used.clear()
        self.wasted.clear()
        fresh = self.fresh_of[layer]
        if fresh:
            self._met(fresh, key, hit, victim)
        return hit, slot, victim

    def done(self) -> None:
        """The layer being computed is finished: nothing is pinned."""
        self.pinned = ()

    # ------------------------------------------------------------------ warm start
    def warm_keys(self, ranked: Sequence[tuple[int, int]]) -> list[tuple[int, int]]:
        """The ``(layer, expert)`` pairs ``warm`` fills from ``ranked`` (hottest first, ``hottest``), in the order
        it fills them: a pool per layer takes the first ``capacity`` of its own layer's pairs, a shared pool the
        first ``capacity`` of all; then they are taken coldest first, so that the hottest comes in last."""
        taken: dict[int, int] = {}  # id of a Residency -> pairs taken for it
        out = []
        for layer, e in ranked:
            r = self.res_of[layer]
            n = taken.get(id(r), 0)
            if n < r.capacity:
                taken[id(r)] = n + 1
                out.append((layer, e))
        out.reverse()
        return out

    def warm(self, ranked: Sequence[tuple[int, int]]) -> list[tuple[int, int, int]]:
        """Fill an empty pool before the first step from ``ranked`` (``hottest`` of a profile): each pair of
        ``warm_keys`` is accessed in turn, nothing pinned, as if the run had used it just before its first
        step, coldest first: the policy is told ``inserted`` at its own clock tick (the clock advances by one
        per pair), so to a recency rule the hottest is the most recent, and to the offline optimum (whose
        access sequence then starts with these keys) each key's next use is its first use in the run.  The
        pool has room for every pair, so nothing is evicted.  Returns ``(layer, expert, slot)`` per pair filled,
        in that order (the live pool reads each expert into its slot)."""
        out = []
        for layer, e in self.warm_keys(ranked):
            hit, slot, victim = self.res_of[layer].access(self.base[layer] + e, ())
            if hit or victim is not None:  # distinct pairs into an empty pool with room for them: neither happens
                raise RuntimeError("a warm start fills an empty pool with distinct experts: no hit, no eviction")
            out.append((layer, e, slot))
        return out

    # ------------------------------------------------------------------ guesses
    def place(self, target: int, guesses: Sequence[int], pays: Callable[[], bool] | None = None) -> Iterator[Placed | Declined]:
        """Place the guesses for layer ``target`` (best first): one record per guess, in order.

        A guess already resident costs nothing (RESIDENT).  Another is read only if ``pays()`` (asked
        just then; None: always), if a victim can be found that is neither pinned, busy, nor another
        guess of the round (nor, in a shared pool, an expert of the layer being computed), and if the
        policy would rather hold the guess than that victim (``Policy.admits``).  The driver executes
        each Placed record before asking for the next; if it cannot read the guess after all it calls
        ``forget``."""
        r = self.res_of[target]
        base = self.base[target]
        keep = tuple(base + e for e in guesses)
        if self.shared:
            keep += self.pinned
        fresh = self.fresh_of[target]
        for e in guesses:
            key = base + e
            if key in r.slot_of:
                yield Declined(key, RESIDENT)
                continue
            if pays is not None and not pays():
                yield Declined(key, NO_PAY)
                continue
            try:
                victim = r.victim(keep)
            except NoVictim:
                yield Declined(key, NO_ROOM)
                continue
            if victim is not None and not r.policy.admits(key, victim, r.now):
                yield Declined(key, REFUSED)
                continue
            slot, victim = r.place(key, victim)
            wasted = victim is not None and victim in fresh
            if wasted:
                fresh.discard(victim)
            fresh.add(key)
            self.guessed[target].append(key)
            yield Placed(key, slot, victim, wasted)

    def meet(self, layer: int, ids: Sequence[int], drop: Callable[[Key], bool]) -> list[Key]:
        """``layer`` has routed to ``ids``: each guess placed for it that it did not choose and no layer
        has used is offered to ``drop(key)``, which gives back what it can (its link time, its slot) and
        says whether it dropped the guess.  Returns the keys dropped (the driver ``forget``s each once
        its slot is free)."""
        keys = self.guessed[layer]
        if not keys:
            return []
        self.guessed[layer] = []
        base, fresh = self.base[layer], self.fresh_of[layer]
        out = []
        seen = set()
        for key in keys:
            if key in fresh and key - base not in ids and key not in seen:
                seen.add(key)
                if drop(key):
                    out.append(key)
        return out

    def forget(self, layer: int, key: Key) -> int:
        """A key's load failed or was dropped: it leaves the pool; returns its slot, now free."""
        self.fresh_of[layer].discard(key)
        return self.res_of[layer].remove(key)

    def fresh(self, layer: int) -> set[Key]:
        """Keys of ``layer``'s pool a guess placed that no layer has used since."""
        return self.fresh_of[layer]


class Quotas(Decisions):
    """A pool per layer: each layer's ``Residency`` of its own quota; keys are expert ids."""

    def __init__(self, capacities: Sequence[int], policies: Sequence[Policy]):
        res_of = []
        start = 0
        for n, policy in zip(capacities, policies):
            res_of.append(Residency(n, policy, list(range(start, start + n))))
            start += n
        super().__init__(res_of, [0] * len(res_of))


    @classmethod
    def of_layer(cls, layer: int, capacity: int, policy: Policy) -> Quotas:
        """The quota of one layer alone (replay walks one layer's accesses at a time)."""
        one = cls.__new__(cls)
        Decisions.__init__(one, [Residency(capacity, policy)] * (layer + 1), [0] * (layer + 1))
        return one


class Shared(Decisions):
    """One pool for every layer; keys are ``layer * n_experts + expert``.  A guess never evicts an expert
    the layer being computed has chosen."""

    def __init__(self, capacity: int, policy: Policy, n_layers: int, n_experts: int):
        r = Residency(capacity, policy)
        super().__init__([r] * n_layers, [layer * n_experts for layer in range(n_layers)], shared=True)


def make_decisions(policy_for: Callable[[int], Policy], capacities: Sequence[int], n_layers: int, n_experts: int,
                   shared: bool) -> Decisions:
    """The decisions of a pool: ``shared`` with ``capacities[0]`` slots, or a quota per layer.
    ``policy_for(layer)`` makes a layer's policy (called once, with 0, for a shared pool)."""
    if shared:
        return Shared(capacities[0], policy_for(0), n_layers, n_experts)
    return Quotas(capacities, [policy_for(layer) for layer in range(n_layers)])
