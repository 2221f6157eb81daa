"""replay --warm-from: every pool filled from a routing profile first (Decisions.warm), on the reference path; the
fast paths give it the same counts; a live warm run is reproduced; what a warm start is guaranteed to do."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from test_replay import _random_trace, trace_params

import moerun
from moerun.files.profile import Profile, counts_of, read_profile
from moerun.files.trace import read_trace, write_trace
from moerun.model.sampling import Sampling
from moerun.policies import FIFO, LFU, LRU, Optimal
from moerun.sim import report as replay
from moerun.sim.report import run_replay


def _profile(counts, trace) -> Profile:
    counts = np.asarray(counts, np.int64)
    return Profile(counts, {"name": "t", "layers": counts.shape[0], "experts": counts.shape[1], "top_k": trace.top_k,
                            "d_model": 1}, {"kind": "trace", "file": "made here", "blake2b": "", "tokens": 0})


def _random_profile(seed: int, trace) -> Profile:
    """Counts for about 70% of the ids the trace uses and for two it never uses (a trace of sparse large ids
    declares thousands of experts: the profile names few of them, as a real one of such a model would)."""
    rng = np.random.default_rng(seed)
    L, E = trace.n_layers, trace.n_experts
    ids = np.union1d(np.unique(trace.experts[trace.experts >= 0]), rng.integers(0, E, 2))
    counts = np.zeros((L, E), np.int64)
    counts[:, ids] = rng.integers(0, 6, (L, ids.size)) * (rng.random((L, ids.size)) < 0.7)
    return _profile(counts, trace)


def _totals(doc: dict, key: str = "results") -> dict:
    return {(r["policy"], r["slots"], r["layer"]): (r["accesses"], r["misses"], r["prefill_loads"]) for r in doc[key]}


@settings(max_examples=120, deadline=None)
@given(trace_params, st.integers(0, 2**31 - 1), st.booleans())
def test_warm_fast_paths_give_the_reference_paths_counts_on_random_traces(params, pseed, shared):
    trace = _random_trace(*params)
    warm = _random_profile(pseed, trace)
    names = ["lru", "lfu", "fifo", "optimal", "lrfu", "markov", "orbit"]
    E = trace.n_experts
    N = trace.n_layers * E
    slots = sorted({min(c, E) for c in (1, 2, 3, E // 2 or 1, E)}) if not shared else sorted({min(c, N) for c in (1, 2, N // 2 or 1, N)})
    fast = run_replay(trace, names, slots, baselines=False, fast=True, shared=shared, warm=warm)
    ref = run_replay(trace, names, slots, baselines=False, fast=False, shared=shared, warm=warm)
    assert _totals(fast) == _totals(ref)


def _faults(doc, policy):
    return {(r["slots"], r["layer"]): (r["misses"], r["prefill_loads"]) for r in doc["results"] if r["policy"] == policy}


@settings(max_examples=200, deadline=None)
@given(trace_params, st.integers(0, 2**31 - 1), st.booleans())
def test_a_warm_start_never_costs_lru_or_the_optimum_a_miss_on_random_traces(params, pseed, shared):
    """What is guaranteed at equal capacity, whatever the profile (common practice, no source; the reasoning):

    - lru: the pool holds the C most recently used keys (sim/fast.py's proof, with the fill as accesses before
      the first step); the fill's keys the run has not touched yet sit below every key it has, so the warm pool
      holds every key the cold pool holds, at every access: no access misses warm that hits cold (decode
      misses and prefill loads each);
    - the optimum: starting with keys resident never raises the fewest faults possible (keep the cold
      schedule's keys and evict an unused filled key where it fills a free slot), and Belady's rule attains
      that fewest from any start: total faults (misses plus prefill loads) never rise.

    Nothing is guaranteed for fifo or lfu (a fill can push out, later, what a cold pool would have kept;
    fifo's anomaly is of that kind), so nothing is asserted for them."""
    trace = _random_trace(*params)
    warm = _random_profile(pseed, trace)
    E = trace.n_experts
    U = len(np.union1d(np.unique(trace.experts[trace.experts >= 0]), np.nonzero(warm.counts.sum(axis=0))[0]))
    slots = list(range(1, min(E, U + 1) + 1)) if not shared else list(range(1, min(trace.n_layers * E, trace.n_layers * U + 1) + 1))
    cold = run_replay(trace, ["lru", "optimal"], slots, baselines=False, fast=False, shared=shared)
    hot = run_replay(trace, ["lru", "optimal"], slots, baselines=False, fast=False, shared=shared, warm=warm)
    for key, (m, p) in _faults(cold, "lru").items():
        wm, wp = _faults(hot, "lru")[key]
        assert wm <= m and wp <= p, key
    for key, (m, p) in _faults(cold, "optimal").items():
        wm, wp = _faults(hot, "optimal")[key]
        if key[1] == "all" or not shared:
            assert wm + wp <= m + p, key


@pytest.mark.parametrize("split", ["even", "shared"])
@pytest.mark.parametrize("evict", ["lru", "lfu", "orbit"])
def test_replay_with_the_profile_reproduces_a_live_warm_runs_hits_and_misses(pebble, tmp_path, split, evict):
    moerun.profile(tmp_path / "p.json", pebble, max_tokens=150)
    kw = {"slots": [2, 3, 4, 3]} if split == "even" else {"mem_cap": "12MiB", "split": "shared"}
    with moerun.load(pebble, tokenizer=False, evict=evict, warm_from=tmp_path / "p.json", **({"mem_cap": "1GiB"} if split == "even" else {}), **kw) as eng:
        eng.start_trace()
        eng.generate(prompt_ids=list(range(40, 49)), max_new=40, sampling=Sampling(temperature=1.0, seed=4))
        write_trace(tmp_path / "live.npz", eng.finish_trace())
        pool = eng.stats["pool"]
        slots = list(eng.budget.slots)
    trace = read_trace(tmp_path / "live.npz")
    assert trace.meta["warm_from"] == str(tmp_path / "p.json")
    prof = read_profile(tmp_path / "p.json")
    for fast in (True, False):
        if split == "even":
            got = [run_replay(trace, [evict], [c], baselines=False, fast=fast, warm=prof)["results"] for c in slots]
            per_layer = [next(r for r in recs if r["layer"] == layer) for layer, recs in enumerate(got)]
        else:
            recs = run_replay(trace, [evict], slots, baselines=False, fast=fast, shared=True, warm=prof)["results"]
            per_layer = [r for r in recs if r["layer"] != "all"]
        for layer, r in enumerate(per_layer):
            live = pool["per_layer"][layer]
            assert (r["accesses"], r["misses"]) == (live["accesses"], live["misses"]), (fast, layer)
        assert sum(r["prefill_loads"] for r in per_layer) == pool["prefill_loads"]
    assert pool["warm_loads"] > 0


def test_a_profile_of_the_same_text_raises_the_hit_rate_on_it(bundled, tmp_path):
    """On the text it was made from, a warm start holds at least what a cold one holds (lru; the optimum's faults
    never rise: see above), and on the bundled models' held-out text it hits strictly more at every quota below
    the layer's experts (checked on this data)."""
    moerun.record(tmp_path / "t.npz", bundled, max_tokens=400)
    moerun.profile(tmp_path / "p.json", bundled, from_trace=tmp_path / "t.npz")
    trace = read_trace(tmp_path / "t.npz")
    E = trace.n_experts
    slots = sorted({trace.top_k, trace.top_k + 1, E // 2, E - 1})
    cold = moerun.replay(tmp_path / "t.npz", "lru,optimal", slots, baselines=False).to_json()
    warm = moerun.replay(tmp_path / "t.npz", "lru,optimal", slots, baselines=False, warm_from=tmp_path / "p.json").to_json()
    assert warm["warm_from"]["source"] == "trace"
    for policy in ("lru", "optimal"):
        c, w = replay.overall(cold["results"], policy), replay.overall(warm["results"], policy)
        for n in slots:
            assert w[n]["hits"] > c[n]["hits"], (policy, n)


def test_counts_of_a_trace_are_what_a_warm_replay_fills_from(pebble, tmp_path):
    moerun.record(tmp_path / "t.npz", pebble, max_tokens=100)
    trace = read_trace(tmp_path / "t.npz")
    prof = read_profile(moerun.profile(tmp_path / "p.json", pebble, from_trace=tmp_path / "t.npz").profile)
    assert np.array_equal(prof.counts, counts_of(trace.experts, trace.n_experts))


@pytest.mark.parametrize("cls", [LRU, LFU, FIFO, Optimal])
def test_a_profile_naming_experts_the_trace_never_uses_still_fills_them(cls):
    """compact() renumbers a trace's ids to those it uses; the warm ids are kept too, so a filled expert the run
    never uses still takes its slot (and with a quota of one per layer, every access misses)."""
    from moerun.files.trace import Trace

    ex = np.array([[[1]], [[1]], [[3]]])
    trace = Trace(ex, meta={"n_experts": 6, "prefill_tokens": 0})
    warm = _profile([[0, 0, 0, 0, 0, 7]], trace)  # only expert 5, never routed to
    doc = run_replay(trace, [cls.name], [1, 2], baselines=False, fast=True, warm=warm)
    by = replay.overall(doc["results"], cls.name)
    assert (by[1]["misses"], by[2]["misses"]) == (2, 2)


def test_replay_with_a_warm_start_returns_what_the_command_prints(pebble, tmp_path, capsys):
    from _jobs import as_json, cli_json

    moerun.record(tmp_path / "t.npz", pebble, max_tokens=150)
    moerun.profile(tmp_path / "p.json", pebble, max_tokens=60)
    result = moerun.replay(str(tmp_path / "t.npz"), "lru,optimal", "2-5", shared_pool=False, prefetch=1,
                           warm_from=str(tmp_path / "p.json"))
    code, doc = cli_json(capsys, "replay", "--routing", tmp_path / "t.npz", "--evict", "lru,optimal", "--slots", "2-5",
                         "--prefetch", 1, "--warm-from", tmp_path / "p.json")
    assert code == 0 and doc["warm_from"]["source"] == "text"
    assert as_json(result.to_json()) == doc  # nothing in it is a timing
