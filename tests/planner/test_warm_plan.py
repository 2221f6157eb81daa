"""plan --warm-from: the planner's warm start is the decision core's fill (Decisions.warm), so its predicted hits
equal replay's; the profile's own split of slots per layer; the library's result is the command's --json."""

from __future__ import annotations

import numpy as np
import pytest
from _jobs import as_json, cli_json, without
from _planning import _costs, _random_trace
from hypothesis import given, settings
from hypothesis import strategies as st

import moerun
from moerun.files.profile import Profile
from moerun.planner.search import Space, best_split, profile_curves
from moerun.planner.timeline import predict
from moerun.runtime.decisions import hottest
from moerun.sim.report import overall, run_replay


def _profile(counts, trace) -> Profile:
    counts = np.asarray(counts, np.int64)
    return Profile(counts, {"name": "t", "layers": counts.shape[0], "experts": counts.shape[1], "top_k": trace.top_k,
                            "d_model": 1}, {"kind": "trace", "file": "made here", "blake2b": "", "tokens": 0})


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 2**31 - 1), st.sampled_from(["lru", "lfu", "fifo", "lrfu", "markov", "orbit"]), st.booleans())
def test_the_planners_warm_prediction_has_replays_hit_counts(seed, policy, shared):
    rng = np.random.default_rng(seed)
    trace = _random_trace(rng, tokens=60, layers=3, experts=8, k=2)
    warm = _profile(rng.integers(0, 9, (3, 8)) * (rng.random((3, 8)) < 0.8), trace)
    c = int(rng.integers(2, 9)) if not shared else int(rng.integers(2, 25))
    slots = [c] if shared else [c] * 3
    pr = predict(trace, slots, policy, 0, 1, _costs(L=3), shared=shared, warm=hottest(warm.counts))
    rep = overall(run_replay(trace, [policy], [c], baselines=False, shared=shared, warm=warm)["results"], policy)[c]
    assert (pr.accesses, pr.misses) == (rep["accesses"], rep["misses"])
    used = (warm.counts > 0).sum(axis=1)
    assert pr.warm_loads == (min(c, int(used.sum())) if shared else int(np.minimum(used, c).sum()))
    cold = predict(trace, slots, policy, 0, 1, _costs(L=3), shared=shared)
    assert cold.warm_loads == 0 and cold.warm_s == 0.0


def test_the_profile_split_gives_the_hot_layers_more_slots():
    """A layer whose uses spread over more experts misses more with few slots: the profile's curves give it more."""
    counts = [[50, 50, 0, 0, 0, 0], [20, 20, 20, 20, 10, 10], [90, 10, 0, 0, 0, 0]]
    curves = profile_curves(counts)
    assert curves[0][:3] == [50, 0, 0] and curves[1][1] == 60
    assert best_split(curves, 9, 2, 6) == [2, 5, 2]


def test_plan_considers_the_profile_split_and_predicts_every_setting_warm(pebble, tmp_path):
    moerun.record(tmp_path / "t.npz", pebble, max_tokens=300)
    moerun.profile(tmp_path / "p.json", pebble, from_trace=tmp_path / "t.npz")
    result = moerun.plan(pebble, "14MiB", routing=tmp_path / "t.npz", link_speed="2GB/s", evict="lru",
                         warm_from=tmp_path / "p.json")
    labels = {lab for lab, _ in result.candidates}
    assert "profile" in labels
    assert all(pr.warm_loads > 0 for _, pr in result.candidates)
    cold = moerun.plan(pebble, "14MiB", routing=tmp_path / "t.npz", link_speed="2GB/s", evict="lru")
    assert "profile" not in {lab for lab, _ in cold.candidates}
    even_w = next(pr for lab, pr in result.candidates if lab == "even" and not pr.prefetch)
    even_c = next(pr for lab, pr in cold.candidates if lab == "even" and not pr.prefetch)
    assert even_w.misses <= even_c.misses  # lru from a profile of the same text (tests/sim/test_warm_replay.py)


@pytest.mark.parametrize("shared", [False, True])
def test_plan_with_a_warm_start_returns_what_the_command_prints(pebble, tmp_path, capsys, shared):
    moerun.record(tmp_path / "t.npz", pebble, max_tokens=200)
    moerun.profile(tmp_path / "p.json", pebble, max_tokens=100)
    result = moerun.plan(pebble, "13MiB", routing=tmp_path / "t.npz", link_speed="2GB/s", evict="lru,lfu",
                         shared_pool=shared, warm_from=tmp_path / "p.json")
    argv = ["plan", "--model", pebble, "--mem-cap", "13MiB", "--routing", tmp_path / "t.npz", "--link-speed", "2GB/s",
            "--evict", "lru,lfu", "--warm-from", tmp_path / "p.json"] + (["--shared-pool"] if shared else [])
    code, doc = cli_json(capsys, *argv)
    assert code == 0 and doc["warm_from"]["file"] == str(tmp_path / "p.json")
    assert without(as_json(result.to_json()), "calibration_age_s") == without(doc, "calibration_age_s")


def test_space_ceiling_stays_above_every_warm_prediction(pebble, tmp_path):
    """The search prunes by ceilings; with a warm start they must still bound what is predicted (fewer cold keys)."""
    from moerun.files.trace import read_trace

    moerun.record(tmp_path / "t.npz", pebble, max_tokens=300)
    prof = moerun.profile(tmp_path / "p.json", pebble, from_trace=tmp_path / "t.npz")
    from moerun.files.profile import read_profile

    counts = read_profile(prof.profile).counts
    trace = read_trace(tmp_path / "t.npz")
    costs = _costs(L=4, page=300)
    costs.copy = 5e-6
    space = Space(trace, costs, 4, 8, 2, 0, 1, ["lru"], [(0, 1), (1, 1)], True, prune=False, profile=counts)
    for total in (8, 13, 20):
        for lab, pr in space.candidates(total):
            top = space.ceiling(pr.policy, pr.prefetch) if (pr.shared or pr.prefetch) else None
            if top is not None:
                assert pr.tok_s <= top, (lab, total)
            if pr.shared and not pr.prefetch:
                assert pr.tok_s <= space.shared_ceiling(pr.policy, total), total
