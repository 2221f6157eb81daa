"""moerun.runtime.budget: a memory cap split into dense weights, KV cache, scratch and whole expert slots.

Properties the pool relies on (docs/design/architecture.md, invariants: the cap is real): nothing planned ever
exceeds the cap, the smallest cap is exactly the smallest that plans, every layer can hold its top_k experts,
and slots are whole 4 KiB pages (the x86-64 and arm64 base page size, common practice, no source).
"""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from moerun.errors import ImpossibleBudget
from moerun.makers.synthetic import synth_config
from moerun.runtime.budget import SLOT_ALIGN, minimum_cap, plan_budget, slot_bytes

CONFIG = synth_config(layers=3, experts=8, top_k=2, d_model=32, d_expert=64)
DENSE, EXPERT = 123_456, 3 * 32 * 64 * 4


@pytest.mark.parametrize("n, want", [(1, 4096), (4096, 4096), (4097, 8192), (24_576, 24_576)])
def test_a_slot_is_the_expert_rounded_up_to_whole_pages(n, want):
    assert slot_bytes(n) == want and slot_bytes(n) % SLOT_ALIGN == 0


@pytest.mark.parametrize("split", ["even", "shared"])
def test_the_smallest_cap_plans_and_one_byte_less_does_not(split):
    low = minimum_cap(CONFIG, DENSE, EXPERT, split)
    b = plan_budget(CONFIG, DENSE, EXPERT, low, split)
    assert b.total == low and b.unused == 0
    assert b.slots == ([CONFIG.top_k] if split == "shared" else [CONFIG.top_k] * CONFIG.n_layers)
    with pytest.raises(ImpossibleBudget, match="smallest cap"):
        plan_budget(CONFIG, DENSE, EXPERT, low - 1, split)


@settings(max_examples=200, deadline=None)
@given(st.integers(0, 40 * 4096), st.sampled_from(["even", "shared"]))
def test_no_plan_exceeds_its_cap_and_the_rest_is_less_than_a_slot(extra, split):
    cap = minimum_cap(CONFIG, DENSE, EXPERT, split) + extra
    b = plan_budget(CONFIG, DENSE, EXPERT, cap, split)
    assert b.total + b.unused == cap and b.total <= cap
    full = CONFIG.n_layers * CONFIG.n_experts
    if b.n_slots < full:
        assert b.unused < b.slot  # a whole slot more would not fit
    if split == "even":
        assert max(b.slots) - min(b.slots) <= 1 and all(CONFIG.top_k <= n <= CONFIG.n_experts for n in b.slots)


def test_an_explicit_slot_list_is_checked_against_the_layers_and_the_cap():
    b = plan_budget(CONFIG, DENSE, EXPERT, None, [2, 8, 3])
    assert b.split == "list" and b.slots == [2, 8, 3]
    with pytest.raises(ImpossibleBudget, match="3 layers"):
        plan_budget(CONFIG, DENSE, EXPERT, None, [2, 2])
    with pytest.raises(ImpossibleBudget, match="between top_k"):
        plan_budget(CONFIG, DENSE, EXPERT, None, [1, 2, 2])
    with pytest.raises(ImpossibleBudget, match="cannot hold"):
        plan_budget(CONFIG, DENSE, EXPERT, b.total - 1, [2, 8, 3])


def test_no_cap_keeps_every_expert_resident():
    b = plan_budget(CONFIG, DENSE, EXPERT, None)
    assert b.split == "resident" and b.slots == [CONFIG.n_experts] * CONFIG.n_layers
    assert b.to_json()["total_bytes"] == b.dense + b.kv_cache + b.scratch + b.n_slots * b.slot
