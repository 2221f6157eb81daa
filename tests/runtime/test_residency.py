"""moerun.runtime.residency: the key -> slot bookkeeping the live pool and replay share.

The reference for hits and evictions is the LRU cache built on ``collections.OrderedDict`` that the Python
documentation gives as an example of the class (``move_to_end`` on a hit, ``popitem(last=False)`` to evict);
the rest are properties the pool relies on: pinned and busy keys are never victims, slots stay distinct
and in range, a prefetch insert does not move the clock.
"""

from __future__ import annotations

from collections import OrderedDict

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from moerun.policies import LRU
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
