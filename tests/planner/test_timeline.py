"""moerun.planner.timeline: the planner's time model, hand-computed on traces small enough to add up by hand.

The step time of a decode token is the layer's compute, its experts, the head and the waits for page-ins
(docs/design/planner.md, "The time model"); with prefetch off and a pool per layer the sum over steps is exact.
"""

from __future__ import annotations

import numpy as np
import pytest
from _planning import US, _costs, _random_trace, _trace

from moerun.files.trace import Trace
from moerun.planner.search import Costs, predict


def test_every_access_a_miss_costs_compute_plus_one_page_in_per_token():
    # one layer, top-1, one slot, alternating experts: every access misses.
    # per token: attention 10 + page-in 100 + expert 2 + head 3 = 115 us (worked by hand)
    p = predict(_trace([0, 1, 0, 1]), [1], "lru", 0, 1, _costs())
    assert p.misses == 4 and p.accesses == 4
    assert p.step_s == pytest.approx(115 * US)
    assert p.tok_s == pytest.approx(1 / (115 * US))
    assert p.stall_s == pytest.approx(100 * US)


def test_two_slots_pay_only_the_first_two_page_ins():
    # slots 2: misses on the first 0 and the first 1 only: (4 * 15 + 2 * 100) / 4 = 65 us per token
    p = predict(_trace([0, 1, 0, 1]), [2], "lru", 0, 1, _costs())
    assert p.misses == 2
    assert p.step_s == pytest.approx(65 * US)


def test_a_blocking_wait_adds_the_measured_wake_up_cost():
    # as the first case, plus 7 us for each blocking read: 122 us per token
    p = predict(_trace([0, 1, 0, 1]), [1], "lru", 0, 1, _costs(wait=7))
    assert p.step_s == pytest.approx(122 * US)


def test_prefill_tokens_warm_the_pool_and_are_not_timed():
    # the first token is a prefill: it loads expert 0 without being timed; then 0, 0, 0 all hit
    p = predict(_trace([0, 0, 0, 0], prefill=1), [1], "lru", 0, 1, _costs())
    assert p.accesses == 3 and p.misses == 0
    assert p.step_s == pytest.approx(15 * US)


def test_perfect_guesses_faster_than_the_window_hide_every_page_in():
    # Two layers, top-1, one slot each.  Layer 1 uses 0, 1, 0, 1 ...; layer 0 always uses 5 and
    # guesses layer 1 perfectly at its prefetch point.  The page-in (5 us) is shorter than what
    # follows the prefetch point before layer 1 routes (layer 0's expert 2 + layer 1's attention 10),
    # so after the first token nothing waits: per token 2 * (10 + 2) + 3 = 27 us.  The first token
    # also waits 5 us at layer 0 for its own demand read, which goes to the reader before the
    # guess for layer 1 (the prefetch point follows the layer's routing).
    n = 8
    experts = np.zeros((n, 2, 1), np.int64)
    experts[:, 0, 0] = 5
    experts[:, 1, 0] = np.arange(n) % 2
    guesses = np.full((n, 2, 1, 1), -1, np.int64)
    guesses[:, 0, 0, 0] = experts[:, 1, 0]
    trace = Trace(experts, guesses=guesses, meta={"n_experts": 6, "prefill_tokens": 0})
    p = predict(trace, [1, 1], "lru", 1, 1, _costs(L=2, page=5))
    assert p.misses == 1  # layer 0's first access only
    assert p.prefetch_loads == n
    assert p.step_s == pytest.approx(27 * US + 5 * US / n)


def test_the_stored_formats_decoding_enters_every_expert_of_the_step():
    # one layer, top-1, every access a hit after the first: per token attention 10 + expert 2 (+ decoding) + head 3
    from moerun.planner.calibration import costs_from_shape

    shape = {"layers": 1, "experts": 2, "top_k": 1, "expert_bytes": 1, "dense_bytes": 0, "expert_us": 2, "dense_layer_us": 10,
             "head_us": 3}
    trace = _trace([0, 0, 0, 0], prefill=1)
    plain = predict(trace, [1], "lru", 0, 1, costs_from_shape(shape, 100 * US, "test"))
    decoded = predict(trace, [1], "lru", 0, 1, costs_from_shape({**shape, "decode_us": 7}, 100 * US, "test"))
    assert plain.step_s == pytest.approx(15 * US)
    assert decoded.step_s == pytest.approx(22 * US)  # 7 us more per expert, one expert per token


def test_prefetch_off_is_the_same_prediction_step_by_step_and_summed():
    # the additive path (per-layer miss counts) and the step-by-step simulation are one time model
    from moerun.planner import timeline

    rng = np.random.default_rng(3)
    trace = _random_trace(rng, tokens=200, layers=3, experts=8, k=2)
    costs = Costs([30 * US] * 3, 4 * US, 9 * US, 80 * US, "test", 3 * US, copy=5 * US)
    for slots in ([2, 2, 2], [3, 4, 5], [8, 8, 8]):
        a = predict(trace, slots, "lru", 0, 1, costs)
        b = timeline._simulate(trace, slots, "lru", 0, 1, costs, False, 10**9)
        assert (a.misses, a.accesses) == (b.misses, b.accesses)
        # (the simulated link keeps whole nanoseconds: a few ns of rounding over the run)
        assert a.step_s == pytest.approx(b.step_s, rel=1e-6) and a.stall_s == pytest.approx(b.stall_s, rel=1e-6)


def _lru_that_admits_nothing():
    """LRU whose ``admits`` always keeps the victim: a guess may fill a free slot, never evict."""
    from moerun.policies import LRU

    class NoAdmitLRU(LRU):
        name = "lru-no-admit"

        def admits(self, key, victim, now):
            return False

    return NoAdmitLRU


def test_the_time_model_places_no_guess_the_policy_does_not_admit(monkeypatch):
    # The pool and replay ask Policy.admits before a guess evicts; so must the time model.  Two layers,
    # top-1, one slot each: layer 0 always uses 5, layer 1 alternates 0, 1 and layer 0 guesses it
    # perfectly.  Only the first guess finds a free slot; every later one would evict and is refused.
    from moerun import policies
    from moerun.sim.prefetch import simulate_prefetch

    cls = _lru_that_admits_nothing()
    monkeypatch.setitem(policies._REGISTRY, cls.name, cls)
    n = 8
    experts = np.zeros((n, 2, 1), np.int64)
    experts[:, 0, 0] = 5
    experts[:, 1, 0] = np.arange(n) % 2
    guesses = np.full((n, 2, 1, 1), -1, np.int64)
    guesses[:, 0, 0, 0] = experts[:, 1, 0]
    trace = Trace(experts, guesses=guesses, meta={"n_experts": 6, "prefill_tokens": 0})
    p = predict(trace, [1, 1], cls.name, 1, 1, _costs(L=2, page=5))
    replayed = simulate_prefetch(trace, cls, 1, 1, 1)
    assert p.prefetch_loads == sum(c.loads for c in replayed) == 1
    assert p.misses == sum(c.misses for c in replayed) == n  # layer 0's first access, then every access of layer 1


def test_a_guess_in_a_shared_pool_never_evicts_an_expert_the_current_layer_computes():
    # One shared slot, top-1: at layer 0's prefetch point the only resident is the expert layer 0 is about
    # to compute, so a guess for layer 1 has nowhere to go (the pool and replay pin the current layer).
    from moerun.policies import LRU
    from moerun.sim.prefetch import simulate_prefetch

    n = 8
    experts = np.zeros((n, 2, 1), np.int64)
    experts[:, 0, 0] = 5
    experts[:, 1, 0] = 1
    guesses = np.full((n, 2, 1, 1), -1, np.int64)
    guesses[:, 0, 0, 0] = 2  # a wrong guess
    trace = Trace(experts, guesses=guesses, meta={"n_experts": 6, "prefill_tokens": 0})
    p = predict(trace, [1], "lru", 1, 1, _costs(L=2, page=5), shared=True)
    replayed = simulate_prefetch(trace, LRU, 1, 1, 1, shared=True)
    assert p.prefetch_loads == sum(c.loads for c in replayed) == 0


@pytest.mark.parametrize("emulated", [True, False], ids=["emulated link", "real reads"])
def test_quotas_per_layer_do_not_depend_on_which_ids_other_layers_use(emulated):
    # Each layer's quota is its own: giving every layer its own range of expert ids (layer l's expert e
    # becomes l * E + e) changes no prediction.  (Before the decision core, the time model kept one
    # table of guesses and transfers keyed by expert id for every layer, so layers shared entries.)
    rng = np.random.default_rng(4)
    base = _random_trace(rng, tokens=80, layers=3, experts=8, k=2)
    guesses = rng.integers(0, 8, (80, 3, 2, 3))
    costs = Costs([30 * US] * 3, 4 * US, 9 * US, 80 * US, "test", 3 * US, emulated=emulated, copy=5 * US, place=2 * US)
    off = (np.arange(3) * 8)[None, :, None]
    same = Trace(base.experts, guesses=guesses, meta={"n_experts": 8, "prefill_tokens": 0})
    target = np.arange(3)[:, None] + np.arange(1, 3)[None, :]  # guesses [src, j - 1] are for layer src + j
    moved = guesses + np.where(target < 3, target * 8, 0)[None, :, :, None]
    apart = Trace(base.experts + off, guesses=moved, meta={"n_experts": 24, "prefill_tokens": 0})
    for slots in ([3, 3, 3], [2, 4, 5]):
        a = predict(same, slots, "lru", 2, 2, costs)
        b = predict(apart, slots, "lru", 2, 2, costs)
        assert (a.misses, a.prefetch_loads) == (b.misses, b.prefetch_loads)
        assert a.step_s == pytest.approx(b.step_s, rel=1e-12)
