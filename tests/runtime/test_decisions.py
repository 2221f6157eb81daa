"""moerun.runtime.decisions: the one decision core, and its three drivers agreeing step by step.

The live pool, replay and the planner's time model each drive the same ``Decisions`` object; the
property test below records every outcome the core hands each driver (hits, misses, evictions,
guesses placed or declined, guesses dropped) and requires the three records to be equal, on random
routing, for both pool kinds, with and without prefetch.  Loads are made instant for all three
(replay's are; the pool gets an emulated link too fast to take time and guesses that cost nothing;
the planner a page-in of 1 ns), so every guess pays and none is dropped.
"""

from __future__ import annotations

from contextlib import ExitStack
from unittest import mock

import numpy as np
import pytest
from conftest import PEBBLE
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from moerun import policies
from moerun.files.store import ModelStore
from moerun.files.trace import Trace
from moerun.planner import timeline
from moerun.planner.search import Costs
from moerun.policies import LRU
from moerun.runtime.budget import Budget, slot_bytes
from moerun.runtime.decisions import NO_ROOM, REFUSED, RESIDENT, Placed, Quotas, Shared, hottest, prefill_schedule
from moerun.runtime.pool import ExpertPool
from moerun.runtime.prefetch import Prefetcher
from moerun.sim import prefetch as sim_prefetch
from moerun.sim import steps
from moerun.sim.steps import layer_plans, plan_decisions, shared_plan, walk, warm_plans


class OddRefusingLRU(LRU):
    """LRU that refuses to let a guess evict an odd key: ``Policy.admits`` decides for every driver."""

    name = "test-odd-refusing-lru"

    def admits(self, key, victim, now):
        return victim % 2 == 0


POLICIES = ["lru", "fifo", "lfu", "markov", "orbit", OddRefusingLRU.name]


# ---------------------------------------------------------------------------- the core alone


def test_a_guess_in_a_shared_pool_never_evicts_the_current_layers_experts():
    core = Shared(2, LRU(), 2, 4)
    core.step(0, [1, 2])  # layer 0's experts fill the pool and stay pinned until done()
    (out,) = list(core.place(1, [3]))
    assert out == (4 + 3, NO_ROOM)
    core.done()
    (out,) = list(core.place(1, [3]))
    assert type(out) is Placed and out.victim == 1  # the least recently used of layer 0's


def test_a_guess_is_placed_only_where_the_policy_admits_it():
    core = Quotas([2, 2], [OddRefusingLRU(), OddRefusingLRU()])
    core.step(1, [1, 2])
    core.done()
    assert [o.why if type(o) is not Placed else "placed" for o in core.place(1, [3, 2])] == [REFUSED, RESIDENT]
    core.step(1, [2, 3])  # 1 is evicted by the miss on 3 (an access, not a guess: admits is not asked)
    core.done()
    (out,) = list(core.place(1, [0]))
    assert type(out) is Placed and out.victim == 2


def test_unchosen_guesses_are_offered_for_dropping_and_chosen_ones_count_as_used():
    core = Quotas([3], [LRU()])
    assert [type(o) for o in core.place(0, [1, 2])] == [Placed, Placed]
    offered = []
    dropped = core.meet(0, [2], lambda key: offered.append(key) or True)
    assert offered == dropped == [1]
    core.forget(0, 1)
    served = core.step(0, [2])
    assert served[0][0] and core.used == [2] and not core.fresh(0)


def test_prefill_schedule_is_each_distinct_expert_once_ascending():
    assert prefill_schedule([[3, 1], [1, -1], [0, 3]]) == [0, 1, 3]


# ---------------------------------------------------------------------------- three drivers, one record


def _record(core, log):
    """Wrap a core's methods so that every outcome it hands its driver is appended to ``log``."""
    serve, step, prefill, place, meet = core.serve, core.step, core.prefill, core.place, core.meet

    def rserve(layer, done=None):
        out = serve(layer, done)
        log.append(("step", layer, tuple((k, h, v) for k, (h, _, v) in zip(core.pinned, out))))
        return out

    def rstep(layer, ids, probs=None):  # route and serve in one call (the pool's decode path)
        n = len(log)
        out = step(layer, ids, probs)
        if len(log) == n:  # served without calling serve
            log.append(("step", layer, tuple((k, h, v) for k, (h, _, v) in zip(core.pinned, out))))
        return out

    def rprefill(layer, expert):
        hit, slot, victim = prefill(layer, expert)
        log.append(("prefill", layer, core.pinned[0], hit, victim))
        return hit, slot, victim

    def rplace(target, guesses, pays=None):
        outs = []
        for o in place(target, guesses, pays):
            outs.append((o.key, o.victim) if type(o) is Placed else (o.key, o.why))
            yield o
        log.append(("place", target, tuple(outs)))

    def rmeet(layer, ids, drop):
        out = meet(layer, ids, drop)
        if out:
            log.append(("drop", layer, tuple(out)))
        return out

    def rwarm(ranked):  # a warm start: each key filled, in order
        out = warm(ranked)
        log.extend(("warm", layer, core.key(layer, e)) for layer, e, _ in out)
        return out

    warm = core.warm
    core.serve, core.step, core.prefill, core.place, core.meet, core.warm = rserve, rstep, rprefill, rplace, rmeet, rwarm
    return core


def _per_pool(log, shared):
    """The record of each pool: one per layer (quotas), or the one shared pool."""
    if shared:
        return [log]
    pools: dict = {}
    for entry in log:
        pools.setdefault(entry[1], []).append(entry)
    return [pools[k] for k in sorted(pools)]


class _TraceRule:
    """A guess rule that reads the trace's guesses of the token being decoded (``Prefetcher``'s ``rule``)."""

    def __init__(self, trace, lookahead):
        self.g, self.lookahead, self.L = trace.guesses.tolist(), lookahead, trace.n_layers
        self.t = 0

    def top(self, layer, h, n):
        return [[e for e in self.g[self.t][layer][j - 1][:n] if e >= 0] for j in range(1, min(self.lookahead, self.L - 1 - layer) + 1)]


def _pool_record(store, trace, slots, policy, shared, n_guesses, lookahead, warm=None):
    L = store.config.n_layers
    budget = Budget(None, 0, 0, 0, slot_bytes(store.expert_nbytes), store.expert_nbytes, "shared" if shared else "list", list(slots))
    store.link_rate = 1e18 if n_guesses else None  # a link whose transfers take no time (ns rounds down to 0)
    pool = ExpertPool(store, budget, policy)
    log = []
    _record(pool.core, log)
    if warm is not None:
        pool.warm(warm)
    prefetcher = None
    if n_guesses:
        pool.place_ns = -(10**15)  # a guess that costs less than nothing: every guess is read
        rule = _TraceRule(trace, lookahead)
        prefetcher = Prefetcher(pool, rule, n_guesses, lookahead, None)
    ex, probs = trace.experts, trace.probs
    P = trace.meta["prefill_tokens"]
    k = ex.shape[2]
    weights = np.full((1, k), 1 / k, np.float32)
    if P:
        pool.begin_step(-1)
        for layer in range(L):
            pool.begin_layer(layer)
            pool.routed(layer, ex[:P, layer], np.full((P, k), 1 / k, np.float32), probs[:P, layer])
            for e in prefill_schedule(ex[:P, layer].tolist()):
                pool.weights(layer, e)
            pool.end_layer(layer)
    for t in range(P, trace.n_tokens):
        pool.begin_step(t)
        for layer in range(L):
            pool.begin_layer(layer)
            ids = ex[t, layer].tolist()
            pool.routed(layer, ex[t, layer][None], weights, probs[t, layer][None])
            if prefetcher is not None:
                rule.t = t
                prefetcher.point(layer, None)
            for j in pool.compute_order(layer, ids):
                pool.weights(layer, ids[j])
            pool.end_layer(layer)
    assert pool.stats.prefetch_failed == 0 and pool.stats.prefetch_dropped == 0
    return log


def _planner_record(trace, slots, policy, shared, n_guesses, lookahead, warm=None):
    log = []
    L = trace.n_layers
    costs = Costs([10e-6] * L, 2e-6, 3e-6, 1e-9, "test", 0.0, emulated=True)  # page-ins of 1 ns: they always pay
    with mock.patch.object(timeline, "Quotas", lambda *a: _record(Quotas(*a), log)), \
            mock.patch.object(timeline, "Shared", lambda *a: _record(Shared(*a), log)):
        timeline._simulate(trace, list(slots), policy, n_guesses, lookahead, costs, shared, 10**9, warm)
    return log


def _replay_record(trace, slots, policy, shared, n_guesses, lookahead, warm=None):
    log = []
    cls = policies.get(policy)
    plans = warm_plans([shared_plan(trace)] if shared else layer_plans(trace), warm)
    real = steps.decisions_over  # the core plan_decisions makes (and warms): recorded from its first decision
    with mock.patch.object(steps, "decisions_over", lambda *a: _record(real(*a), log)):
        if n_guesses:
            sim_prefetch.simulate_prefetch(trace, cls, slots[0], n_guesses, lookahead, plans, shared)
            return log
        for plan in plans:
            for _ in walk(plan, plan_decisions(plan, cls, slots[0])):
                pass
    return log


@pytest.fixture(scope="module")
def pebble_store():
    if not (PEBBLE / "model.safetensors").exists():
        pytest.skip("bundled model tiny_models/pebble is absent")
    store = ModelStore.open(PEBBLE)
    yield store
    store.close()


@st.composite
def routings(draw, shared):
    L, E, k = 4, 8, 2  # tiny_models/pebble's shape
    T = draw(st.integers(1, 7))
    P = draw(st.integers(0, min(2, T - 1)))  # at least one decode token
    seed = draw(st.integers(0, 2**32 - 1))
    n_experts_used = draw(st.integers(k + 1, E))  # fewer experts in play: more hits and resident guesses
    rng = np.random.default_rng(seed)
    ex = np.sort(np.stack([rng.choice(n_experts_used, k, replace=False) for _ in range(T * L)]), axis=-1).reshape(T, L, k)
    guesses = np.stack([rng.choice(E, 3, replace=False) for _ in range(T * L * 2)]).reshape(T, L, 2, 3)
    probs = rng.random((T, L, E)).astype(np.float32)
    probs /= probs.sum(axis=-1, keepdims=True)
    trace = Trace(ex.astype(np.int64), guesses=guesses.astype(np.int64), meta={"n_experts": E, "prefill_tokens": P}, probs=probs)
    slots = [draw(st.integers(k, L * E))] if shared else [draw(st.integers(k, E))] * L
    warm = None
    if draw(st.booleans()):  # a warm start from random counts (Decisions.warm)
        warm = hottest(rng.integers(0, 5, (L, E)) * (rng.random((L, E)) < 0.6))
    return trace, slots, draw(st.sampled_from(POLICIES)), draw(st.integers(1, 3)), draw(st.integers(1, 2)), warm


@pytest.mark.parametrize("prefetch", [False, True], ids=["no prefetch", "prefetch"])
@pytest.mark.parametrize("shared", [False, True], ids=["quotas", "shared"])
def test_pool_replay_and_planner_agree_step_by_step_on_random_routing(pebble_store, shared, prefetch):
    ran = []

    @settings(max_examples=200, deadline=None, suppress_health_check=list(HealthCheck), database=None)
    @given(routings(shared))
    def check(case):
        ran.append(1)
        trace, slots, policy, n_guesses, lookahead, warm = case
        n = n_guesses if prefetch else 0
        with ExitStack() as stack:
            stack.enter_context(mock.patch.dict(policies._REGISTRY, {OddRefusingLRU.name: OddRefusingLRU}))
            pool = _pool_record(pebble_store, trace, slots, policy, shared, n, lookahead, warm)
            planner = _planner_record(trace, slots, policy, shared, n, lookahead, warm)
            replay = _replay_record(trace, slots, policy, shared, n, lookahead, warm)
        assert _per_pool(pool, shared) == _per_pool(planner, shared) == _per_pool(replay, shared)
        assert any(e[0] == "step" for e in pool)
        if warm:
            assert any(e[0] == "warm" for e in pool)
            warmed.append(1)

    warmed = []
    check()
    assert warmed  # some of them warm
    assert len(ran) >= 200  # random routings, each driven through all three
