"""moerun.runtime.pool: the live expert pool counts faults like the textbook, serves the right bytes, and pages prefill in once.

Textbook source: Silberschatz, Galvin and Gagne, Operating System Concepts, 9th edition,
chapter 9 (virtual memory, page replacement): reference string
7,0,1,2,0,3,0,4,2,3,0,3,2,1,2,0,1,7,0,1 with three frames gives 15 faults under
FIFO (fig. 9.12), 9 under the optimal algorithm (fig. 9.14) and 12 under LRU (fig. 9.15).
"""

from __future__ import annotations

import collections

import numpy as np
import pytest

import moerun
from moerun.files.store import ModelStore
from moerun.policies import Optimal
from moerun.runtime.budget import minimum_cap, plan_budget
from moerun.runtime.pool import ExpertPool
from moerun.runtime.residency import Residency

REFERENCE_STRING = [7, 0, 1, 2, 0, 3, 0, 4, 2, 3, 0, 3, 2, 1, 2, 0, 1, 7, 0, 1]
FRAMES = 3
TEXTBOOK_FAULTS = {"fifo": 15, "lru": 12, "optimal": 9}  # Silberschatz et al. 9th ed., ch. 9


@pytest.fixture(scope="module")
def one_layer_model(synth_models):
    """One layer, 8 experts, top-1: each routing decision is one page reference."""
    return synth_models(layers=1, experts=8, top_k=1)


def _drive(pool: ExpertPool, pages, store: ModelStore):
    """Feed one-token routing decisions to the pool the way moerun.model.transformer.moe does; check the served bytes."""
    E = pool.config.n_experts
    for step, page in enumerate(pages):
        pool.begin_step(step)
        pool.begin_layer(0)
        chosen = np.array([[page]])
        weights = np.ones((1, 1), np.float32)
        probs = np.full((1, E), 1.0 / E, np.float32)
        pool.routed(0, chosen, weights, probs)
        for j in pool.compute_order(0, [page]):
            w_gate, w_up, w_down = pool.weights(0, [page][j])
            assert np.array_equal(w_down, store.read_tensor(f"layers.0.experts.{page}.w_down"))
        pool.end_layer(0)


@pytest.mark.parametrize("policy", ["lru", "fifo"])
def test_pool_fault_count_matches_the_textbook(one_layer_model, policy):
    store = ModelStore.open(one_layer_model)
    try:
        budget = plan_budget(store.config, store.dense_nbytes, store.expert_nbytes, 1 << 40, [FRAMES])
        pool = ExpertPool(store, budget, policy)
        reads = collections.Counter()
        real = store.copy_in

        def counting(layer, expert, dst):
            reads[expert] += 1
            return real(layer, expert, dst)

        store.copy_in = counting
        _drive(pool, REFERENCE_STRING, store)
        assert int(pool.stats.misses[0]) == TEXTBOOK_FAULTS[policy]
        assert int(pool.stats.accesses[0]) == len(REFERENCE_STRING)
        assert sum(reads.values()) == TEXTBOOK_FAULTS[policy]  # one page-in per fault, none per hit
    finally:
        store.close()


def test_residency_with_the_optimal_policy_gives_the_textbook_fault_count():
    res = Residency(FRAMES, Optimal(REFERENCE_STRING))
    faults = sum(not res.access(page)[0] for page in REFERENCE_STRING)
    assert faults == TEXTBOOK_FAULTS["optimal"]


def test_pool_refuses_the_offline_optimal_policy(one_layer_model):
    store = ModelStore.open(one_layer_model)
    try:
        budget = plan_budget(store.config, store.dense_nbytes, store.expert_nbytes, 1 << 40, [FRAMES])
        with pytest.raises(moerun.BadOption, match="replay"):
            ExpertPool(store, budget, "optimal")
    finally:
        store.close()


# ---------------------------------------------------------------------------- prefill


@pytest.mark.parametrize("split", ["even", "shared"])
def test_prefill_pages_each_needed_expert_in_at_most_once_per_layer(small_model, split):
    with moerun.load(small_model, tokenizer=False) as probe:
        st = probe.store
        cap = minimum_cap(st.config, st.dense_nbytes, st.expert_nbytes, split)
    with moerun.load(small_model, mem_cap=cap, split=split, tokenizer=False) as eng:
        reads = collections.Counter()
        real = eng.store.copy_in

        def counting(layer, expert, dst):
            reads[(layer, expert)] += 1
            return real(layer, expert, dst)

        eng.store.copy_in = counting
        eng.start_trace()
        eng.logits(np.random.default_rng(7).integers(1, 257, 48).tolist())
        trace = eng.finish_trace()
    needed = {(layer, int(e)) for layer in range(trace.n_layers) for e in np.unique(trace.experts[:, layer])}
    assert len(needed) > sum(eng.budget.slots)  # the prompt needs more experts than the pool holds
    assert set(reads) == needed
    assert max(reads.values()) == 1


def test_fully_resident_pool_pages_nothing_in_while_running(small_model):
    with moerun.load(small_model, tokenizer=False) as eng:
        reads = []
        eng.store.copy_in = lambda *a: reads.append(a)
        eng.generate(prompt_ids=[1, 2, 3, 4], max_new=6)
        assert reads == []
        assert eng.stats["pool"]["misses"] == 0


# ---------------------------------------------------------------------------- guesses that fail


def test_a_chosen_guess_whose_read_failed_keeps_its_slot_while_the_layer_waits_for_room(small_model):
    # Two slots for layer 0, both holding guesses the reader has answered FAILED but the pool has not
    # looked at yet.  The layer chooses one of them (a hit, pinned) and a third expert (a miss): with
    # every other resident busy, the pool waits for room, and only then learns that both reads
    # failed.  The chosen guess must stay with the layer (to be read by it), not be given back:
    # giving it back would hand its slot to the miss, and two experts would share one slot.
    from moerun.runtime.reader import Reader

    store = ModelStore.open(small_model)
    c = store.config
    budget = plan_budget(c, store.dense_nbytes, store.expert_nbytes, 1 << 40, [2] * c.n_layers)
    reader = Reader(store, budget.n_slots, budget.slot)
    try:
        pool = ExpertPool(store, budget, "lru", reader)
        pool.place_ns = -(10**15)  # a guess that costs less than nothing: every guess is read
        reader.set_faults(fail_every=1)  # every read the reader does reports a failure
        pool.begin_step(0)
        pool.prefetch(0, [1, 2], 0)
        assert pool.stats.prefetch_loads == 2
        since = 0
        while reader.published() < 2:  # both answered, unseen by the pool
            reader.wait_any(since)
            since = reader.published()
        E = c.n_experts
        pool.begin_layer(0)
        # the chosen guess is 2: the pool looks at 1's answer first, so a slot given back for 2 would
        # be the last one freed, the one the miss takes
        pool.routed(0, np.array([[2, 3]]), np.full((1, 2), 0.5, np.float32), np.full((1, E), 1 / E, np.float32))
        slots = {e: pool._events[e].slot for e in (2, 3)}
        assert slots[2] != slots[3]
        for e in (2, 3):
            w_gate, w_up, w_down = pool.weights(0, e)
            assert np.array_equal(w_down, store.read_tensor(f"layers.0.experts.{e}.w_down"))
        pool.end_layer(0)
    finally:
        reader.close()
        store.close()


def test_guesses_that_cannot_pay_are_not_even_made(small_model):
    # a link so fast that one read takes less than what a guess costs the compute thread:
    # the prefetch point is skipped, guess rule included (ExpertPool.worth_guessing)
    with moerun.load(small_model, tokenizer=False, mem_cap=_smallest(small_model), prefetch=2, link_speed="1000GB/s") as eng:
        eng.generate(prompt_ids=[1, 2, 3], max_new=30)
        pf = eng.stats["pool"]["prefetch"]
    assert pf["guesses"] == 0 and pf["loads"] == 0


def test_guesses_are_read_on_a_link_slow_enough_for_them_to_pay(small_model):
    with moerun.load(small_model, tokenizer=False, mem_cap=_smallest(small_model), prefetch=2, link_speed="5MB/s") as eng:
        eng.generate(prompt_ids=[1, 2, 3], max_new=30)
        pf = eng.stats["pool"]["prefetch"]
    assert pf["guesses"] > 0 and pf["loads"] > 0
    assert pf["declined"] + pf["loads"] + pf["already_resident"] <= pf["guesses"]


def _smallest(model_dir) -> int:
    with moerun.load(model_dir, tokenizer=False) as eng:
        st = eng.store
        return minimum_cap(st.config, st.dense_nbytes, st.expert_nbytes)
