"""moerun.runtime.residency: the key -> slot bookkeeping the live pool and replay share.

The reference for hits and evictions is the LRU cache built on ``collections.OrderedDict`` that the Python
documentation gives as an example of the class (``move_to_end`` on a hit, ``popitem(last=False)`` to evict);
the rest are properties the pool relies on: pinned and busy keys are never victims, slots stay distinct
and in range, a prefetch insert does not move the clock.
"""

from __future__ import annotations

import math
from collections import OrderedDict

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from moerun.policies import FIFO, LFU, LRFU, LRU, Markov, Orbit, Policy, grow, make_policy
from moerun.policies._base import first_min
from moerun.runtime.residency import NoVictim, Residency


def _ordered_dict_lru(keys: list[int], capacity: int) -> list[bool]:
    """Hits of an LRU cache of ``capacity`` entries, as the Python docs' OrderedDict example keeps one."""
    cache: OrderedDict[int, None] = OrderedDict()
    hits = []
    for k in keys:
        if k in cache:
            cache.move_to_end(k)
            hits.append(True)
        else:
            if len(cache) >= capacity:
                cache.popitem(last=False)
            cache[k] = None
            hits.append(False)
    return hits


@settings(max_examples=150, deadline=None)
@given(st.integers(1, 6), st.lists(st.integers(0, 9), min_size=1, max_size=120))
def test_hits_and_residents_match_an_ordered_dict_lru(capacity, keys):
    res = Residency(capacity, LRU())
    got = [res.access(k)[0] for k in keys]
    assert got == _ordered_dict_lru(keys, capacity)
    assert len(res.slot_of) == min(capacity, len(set(keys)))


@settings(max_examples=100, deadline=None)
@given(st.integers(1, 5), st.lists(st.integers(0, 7), min_size=1, max_size=80))
def test_slots_stay_distinct_and_in_range_and_the_clock_counts_accesses(capacity, keys):
    res = Residency(capacity, LRU())
    for n, k in enumerate(keys, 1):
        hit, slot, victim = res.access(k)
        assert 0 <= slot < capacity and res.slot_of[k] == slot
        assert victim is None or victim not in res.slot_of
        assert sorted(res.slot_of.values()) == sorted(set(res.slot_of.values()))
        assert res.now == n


def test_access_step_serves_a_step_as_accesses_in_turn_do():
    keys = [3, 1, 4, 1, 5, 9, 2, 6, 5, 3, 5]
    a, b = Residency(3, LRU()), Residency(3, LRU())
    one_by_one = [a.access(k) for k in keys]
    assert b.access_step(keys, ()) == one_by_one
    assert a.slot_of == b.slot_of and a.now == b.now == len(keys)


def test_pinned_and_busy_keys_are_never_victims():
    res = Residency(3, LRU())
    for k in (0, 1, 2):
        res.access(k)
    res.busy.add(0)  # least recently used, but a background read is outstanding on its slot
    _, _, victim = res.access(3, pinned=(1,))  # 1 pinned, 0 busy: only 2 may go
    assert victim == 2
    assert 0 in res and 1 in res


def test_no_victim_when_every_resident_is_pinned_or_busy_keeps_the_served_part_of_a_step():
    res = Residency(2, LRU())
    res.access(0)
    res.access(1)
    res.busy.add(1)
    with pytest.raises(NoVictim) as e:
        res.access_step([0, 2], pinned=(0,))
    assert e.value.done == [(True, res.slot_of[0], None)]  # the hit on 0 was served before the step stalled
    res.busy.discard(1)
    out = res.access_step([0, 2], pinned=(0,), done=e.value.done)  # the step continues where it stopped
    assert [hit for hit, _, _ in out] == [True, False] and out[1][2] == 1


def test_a_prefetch_insert_does_not_advance_the_clock_and_remove_frees_the_slot():
    res = Residency(2, LRU())
    res.access(0)
    slot, victim = res.insert(5)
    assert victim is None and res.now == 1 and 5 in res
    freed = res.remove(5)
    assert freed == slot and 5 not in res and slot in res.free
    assert res.access(5)[0] is False  # a removed key is a miss again


# ---------------------------------------------------------------------------- the pool's victims against the reference path
#
# The residency asks a policy for its victim through ``Policy.pick``; the built-in rules answer without
# making the list of candidates (lru and fifo from the order they keep, lfu, lrfu and orbit by one
# ``min`` over the residents, ``first_min``).  The reference is the path they replaced, kept here: the
# candidates listed in insertion order and ``victim`` asked, with lru, lfu, fifo and lrfu as they were
# written before (their victim is ``min`` over the candidates of the score, ties to the first); markov,
# orbit and the optimum on the general path of their own class (``Policy.pick``, which asks their
# ``victim``).  Both are driven with the same random streams of steps, guesses, busy slots and removals.


class _RefLRU(Policy):
    name = "ref-lru"

    def __init__(self, n_keys=0, shared_experts=0):
        super().__init__(n_keys, shared_experts)
        self.last = [0] * n_keys

    def inserted(self, key, now):
        grow(self.last, key)
        self.last[key] = now

    def hit(self, key, now):
        self.last[key] = now

    def victim(self, candidates, now):
        return min(candidates, key=self.last.__getitem__)


class _RefFIFO(Policy):
    name = "ref-fifo"

    def __init__(self, n_keys=0, shared_experts=0):
        super().__init__(n_keys, shared_experts)
        self.loaded = [0] * n_keys

    def inserted(self, key, now):
        grow(self.loaded, key)
        self.loaded[key] = now

    def victim(self, candidates, now):
        return min(candidates, key=self.loaded.__getitem__)


class _RefLFU(Policy):
    name = "ref-lfu"

    def __init__(self, n_keys=0, shared_experts=0):
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


class _RefLRFU(LRFU):
    """lrfu's counts (``LRFU``'s own bookkeeping), its victim as it was: min over the candidates."""

    name = "ref-lrfu"

    def victim(self, candidates, now):
        return min(candidates, key=self.count.__getitem__)


def _general(cls):
    """``cls`` on the general path: the candidates listed, its own ``victim`` asked."""
    return type(f"General{cls.__name__}", (cls,), {"pick": Policy.pick, "name": f"general-{cls.name}"})


class _RefResidency:
    """The residency's decisions as they were made before ``Policy.pick``: a list of candidates per victim."""

    def __init__(self, capacity, policy):
        self.policy, self.slot_of, self.now, self.busy = policy, {}, 0, set()
        self.free = list(reversed(range(capacity)))

    def victim(self, pinned):
        if self.free:
            return None
        candidates = [k for k in self.slot_of if k not in pinned and k not in self.busy]
        if not candidates:
            raise NoVictim
        return self.policy.victim(candidates, self.now)

    def _take(self, key, victim, now):
        if victim is None:
            slot = self.free.pop()
        else:
            self.policy.evicted(victim)
            slot = self.slot_of.pop(victim)
        self.slot_of[key] = slot
        self.policy.inserted(key, now)
        return slot

    def access(self, key, pinned):
        now, slot = self.now, self.slot_of.get(key)
        if slot is not None:
            self.policy.hit(key, now)
            self.now += 1
            return True, slot, None
        victim = self.victim(pinned)
        slot = self._take(key, victim, now)
        self.now += 1
        return False, slot, victim

    def place(self, key, victim):
        return self._take(key, victim, self.now), victim

    def remove(self, key):
        slot = self.slot_of.pop(key)
        self.busy.discard(key)
        self.policy.evicted(key)
        self.free.append(slot)


# lam 5: the counts of lrfu, markov and orbit are rescaled every 100 or so accesses (at most about 150 in a
# stream, too few for a resident count to underflow), so the kept scores' refresh on a rescale is exercised
_RESCALING = {cls: cls.with_params(lam=5.0) if hasattr(cls, "with_params") else type("LRFU5", (cls,), {"lam": 5.0})
              for cls in (LRFU, Markov, Orbit)}
_FAST_AND_REFERENCE = {"lru": (LRU, _RefLRU), "fifo": (FIFO, _RefFIFO), "lfu": (LFU, _RefLFU), "lrfu": (LRFU, _RefLRFU),
                       "markov": (Markov, _general(Markov)), "orbit": (Orbit, _general(Orbit)),
                       "lrfu-rescaling": (_RESCALING[LRFU], type("RefLRFU5", (_RefLRFU,), {"lam": 5.0})),
                       "markov-rescaling": (_RESCALING[Markov], _general(_RESCALING[Markov])),
                       "orbit-rescaling": (_RESCALING[Orbit], _general(_RESCALING[Orbit]))}


def _drive(res, ops, n_layers, n_experts, shared, out):
    """Run ``ops`` on a residency (the package's or the reference), writing down every decision in ``out``."""
    pol = res.policy
    for op in ops:
        kind = op[0]
        if kind == "step":
            _, layer, ids = op
            keys = [layer * n_experts + e if shared else e for e in ids]
            pol.routed(layer, ids, None, res.now)
            try:
                if isinstance(res, Residency):
                    got = res.access_step(keys, tuple(keys)) if len(keys) <= res.capacity else \
                        [res.access(k, (k,)) for k in keys]
                else:
                    pinned = tuple(keys) if len(keys) <= len(res.slot_of) + len(res.free) else None
                    got = [res.access(k, pinned if pinned is not None else (k,)) for k in keys]
            except NoVictim:
                out.append(("stalled",))
                return
            out.append(("step", [(h, v) for h, _, v in got]))
        elif kind == "guess":
            _, key, pinned = op
            if key in res.slot_of:
                continue
            try:
                victim = res.victim(pinned)
            except NoVictim:
                out.append(("no room", key))
                continue
            res.place(key, victim)
            out.append(("placed", key, victim))
        elif kind == "busy":
            resident = list(res.slot_of)
            if resident:
                res.busy.add(resident[op[1] % len(resident)])
        elif kind == "idle":
            res.busy.clear()
        elif kind == "remove":
            resident = list(res.slot_of)
            if resident:
                key = resident[op[1] % len(resident)]
                res.remove(key)
                out.append(("removed", key))


@st.composite
def _streams(draw):
    n_layers = draw(st.integers(1, 3))
    n_experts = draw(st.integers(2, 9))
    shared = draw(st.booleans())
    k = draw(st.integers(1, min(3, n_experts)))
    capacity = draw(st.integers(1, (n_layers * n_experts if shared else n_experts) + 1))
    ops = []
    for _ in range(draw(st.integers(1, 60))):
        kind = draw(st.sampled_from(["step", "step", "step", "step", "guess", "busy", "idle", "remove"]))
        if kind == "step":
            layer = draw(st.integers(0, n_layers - 1)) if shared else 0
            ids = sorted(draw(st.sets(st.integers(0, n_experts - 1), min_size=1, max_size=k)))
            ops.append(("step", layer, ids))
        elif kind == "guess":
            layer = draw(st.integers(0, n_layers - 1)) if shared else 0
            e = draw(st.integers(0, n_experts - 1))
            key = layer * n_experts + e if shared else e
            pinned = tuple(draw(st.sets(st.integers(0, (n_layers * n_experts if shared else n_experts) - 1), max_size=2)))
            ops.append(("guess", key, pinned))
        else:
            ops.append((kind, draw(st.integers(0, 50))))
    return n_layers, n_experts, shared, capacity, ops


@pytest.mark.parametrize("name", sorted(_FAST_AND_REFERENCE))
@settings(max_examples=120, deadline=None)
@given(stream=_streams())
def test_every_policy_makes_the_victims_of_the_reference_path(name, stream):
    n_layers, n_experts, shared, capacity, ops = stream
    fast_cls, ref_cls = _FAST_AND_REFERENCE[name]
    n_keys = n_layers * n_experts if shared else n_experts
    E = n_experts if shared else 0
    got, want = [], []
    fast, ref = Residency(capacity, make_policy(fast_cls, n_keys, E)), _RefResidency(capacity, make_policy(ref_cls, n_keys, E))
    _drive(fast, ops, n_layers, n_experts, shared, got)
    _drive(ref, ops, n_layers, n_experts, shared, want)
    assert got == want
    assert fast.slot_of == ref.slot_of and fast.now == ref.now


def test_a_subclass_that_overrides_victim_or_the_order_keeping_hooks_is_asked_on_the_general_path():
    class Newest(LRU):  # its own victim: the most recently used
        def victim(self, candidates, now):
            return max(candidates, key=self.last.__getitem__)

    class Backwards(FIFO):  # its own bookkeeping: loaded times run backwards, so fifo's order no longer holds
        def inserted(self, key, now):
            grow(self.loaded, key)
            self.loaded[key] = -now

    assert Newest.pick is Policy.pick and Backwards.pick is Policy.pick
    assert LRU.pick is not Policy.pick and FIFO.pick is not Policy.pick
    res = Residency(2, Newest())
    res.access(0)
    res.access(1)
    assert res.access(2)[2] == 1  # 1 was used last: its victim, not lru's
    res = Residency(2, Backwards())
    res.access(0)
    res.access(1)
    assert res.access(2)[2] == 1  # loaded -1 < 0: the later one goes first


def test_lru_breaks_a_tie_on_the_last_access_by_insertion_order_as_min_does():
    # a guess placed at the clock of the access that follows ties with that access's key
    fast, ref = Residency(4, LRU()), _RefResidency(4, _RefLRU())
    for res in (fast, ref):
        for k in (0, 1, 2):
            res.access(k, (k,))
        res.place(5, res.victim(()))  # a free slot; placed at clock 3
        for k in (0, 1, 2):  # 0 is used at clock 3 too: it ties with 5, and was inserted before it
            res.access(k, (k,))
    assert fast.policy.last[0] == fast.policy.last[5] == 3
    assert next(iter(fast.policy.order)) == 5  # 5 is first in lru's order (touched first) ...
    assert fast.access(7, (7,))[2] == ref.access(7, (7,))[2] == 0  # ... but min() over the candidates takes 0


def test_first_min_puts_back_the_scores_it_masks_even_for_a_key_both_pinned_and_busy():
    score = [0.5, 0.25, 0.75, 0.1]
    resident = {3: 0, 0: 1, 1: 2, 2: 3}
    assert first_min(resident, score, (3,), {3}) == 1  # 3 has the smallest score but may not go
    assert score == [0.5, 0.25, 0.75, 0.1]
    assert first_min(resident, score, (3, 1), {0, 2}) is None  # every resident is pinned or busy
    assert score == [0.5, 0.25, 0.75, 0.1]
    assert first_min({}, score, (), set()) is None


@pytest.mark.parametrize("name", ["lrfu-rescaling", "markov-rescaling", "orbit-rescaling"])
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_long_streams_with_rescaled_counts_make_the_victims_of_the_reference_path(name, seed):
    rng = np.random.default_rng(seed)
    n_layers, n_experts, k = 3, 4, 2
    ops = []
    for _ in range(500):
        layer = int(rng.integers(n_layers))
        ops.append(("step", layer, sorted(rng.choice(n_experts, size=k, replace=False).tolist())))
        if rng.random() < 0.2:
            e = int(rng.integers(n_experts))
            ops.append(("guess", layer * n_experts + e, ()))
    fast_cls, ref_cls = _FAST_AND_REFERENCE[name]
    got, want = [], []
    fast = Residency(5, make_policy(fast_cls, n_layers * n_experts, n_experts))
    ref = _RefResidency(5, make_policy(ref_cls, n_layers * n_experts, n_experts))
    _drive(fast, ops, n_layers, n_experts, True, got)
    _drive(ref, ops, n_layers, n_experts, True, want)
    assert fast.policy.origin > 0  # the counts were rescaled along the way
    assert got == want and fast.slot_of == ref.slot_of


@pytest.mark.parametrize("name", ["lrfu-rescaling", "markov-rescaling", "orbit-rescaling"])
def test_a_resident_left_unused_until_its_count_underflows_stays_scorable(name):
    """A key that stays resident but unused for longer than its decayed count can hold (about 1,074 / lam
    accesses: a float's smallest subnormal is 2**-1074) keeps a count above zero, so the scores that take its
    logarithm (markov's, the log CRF) stay finite; before, a long run of a large shared pool crashed on log(0)."""
    cls = _FAST_AND_REFERENCE[name][0]
    n_layers, n_experts = 3, 4
    res = Residency(5, make_policy(cls, n_layers * n_experts, n_experts))
    ops = [("step", 2, [3])] + [("step", 0, [e, (e + 1) % 4]) for e in range(4)] * 150  # key 11, then layer 0 only
    got = []
    _drive(res, ops, n_layers, n_experts, True, got)
    pol = res.policy
    assert 11 in res.slot_of and pol.origin > 0 and pol.count[11] > 0.0
    if name != "orbit-rescaling":  # (orbit keeps no log CRF)
        assert math.isfinite(pol.log_crf(11, res.now))
