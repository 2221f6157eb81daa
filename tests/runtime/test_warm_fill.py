"""Decisions.warm: the one warm-start fill the live pool, replay and the planner execute (docs/design/decision-core.md)."""

from __future__ import annotations

import numpy as np

from moerun.policies import LFU, LRU
from moerun.runtime.decisions import Quotas, Shared, hottest


def test_hottest_ranks_by_count_then_layer_then_expert_and_leaves_out_unused():
    counts = [[0, 5, 2, 5], [5, 0, 0, 1]]
    assert hottest(counts) == [(0, 1), (0, 3), (1, 0), (0, 2), (1, 3)]


def test_a_pool_per_layer_takes_its_own_hottest_up_to_its_quota_coldest_first():
    counts = [[9, 1, 5, 7], [0, 3, 0, 4]]
    core = Quotas([2, 3], [LRU(4), LRU(4)])
    filled = core.warm(hottest(counts))
    # layer 0: its two hottest (0: 9 uses, 3: 7); layer 1: its only two used experts (3: 4, 1: 3)
    assert sorted((layer, e) for layer, e, _ in filled) == [(0, 0), (0, 3), (1, 1), (1, 3)]
    assert set(core.res_of[0].slot_of) == {0, 3} and set(core.res_of[1].slot_of) == {1, 3}
    # filled in ascending heat, so the hottest is the most recent: the next miss of layer 0 evicts expert 3
    assert [(layer, e) for layer, e, _ in filled] == [(1, 1), (1, 3), (0, 3), (0, 0)]
    core.route(0, [1])
    assert core.serve(0)[0][2] == 3
    # no step has been counted: the fill is neither a hit nor a miss of the run
    assert core.res_of[0].now == 3 and core.res_of[1].now == 2


def test_a_shared_pool_takes_the_hottest_of_all_layers():
    counts = [[9, 1, 5, 7], [0, 8, 0, 4]]
    core = Shared(3, LRU(8), 2, 4)
    core.warm(hottest(counts))
    assert set(core.res_of[0].slot_of) == {0, 4 + 1, 3}  # (0,0): 9, (1,1): 8, (0,3): 7


def test_a_frequency_rule_sees_the_fill_as_one_use_each():
    core = Quotas([3], [LFU(4)])
    core.warm(hottest([[3, 2, 1, 0]]))
    core.route(0, [3])
    hit, _, victim = core.serve(0)[0]
    assert not hit and victim == 2  # all used once; the tie goes to the least recent, the coldest filled


def test_a_fill_larger_than_the_pool_never_evicts_and_a_profile_of_nothing_fills_nothing():
    core = Quotas([2], [LRU(8)])
    assert len(core.warm(hottest([np.arange(8)]))) == 2
    assert Quotas([2], [LRU(8)]).warm(hottest([[0] * 8])) == []
