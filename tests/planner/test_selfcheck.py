"""moerun.planner.selfcheck: the recommendation run the way generate runs it, predicted against measured, and
the compute costs corrected when the two disagree."""

from __future__ import annotations

import dataclasses

import pytest

import moerun
from moerun.files.trace import read_trace
from moerun.planner import selfcheck
from moerun.planner.timeline import Costs, Prediction, predict


def _pred(**kw) -> Prediction:
    base = dict(slots=[3, 3, 3, 3], policy="lru", prefetch=0, lookahead=1, tok_s=500.0, step_s=0.002, stall_s=0.0005,
                accesses=100, misses=20)
    return Prediction(**{**base, **kw})


def test_the_factor_makes_the_step_the_measured_one_with_the_stall_kept():
    pr = _pred()
    f = selfcheck.compute_factor(pr, measured_tok_s=250.0)  # 4 ms a step: compute 3.5 ms instead of 1.5 ms
    assert f == pytest.approx(3.5 / 1.5)
    assert selfcheck.compute_factor(pr, 0.0) is None
    assert selfcheck.compute_factor(pr, 1e9) is None  # faster than the stall alone: not a matter of compute costs


def test_scaled_costs_scale_compute_and_keep_page_ins():
    c = Costs([1.0, 2.0], 3.0, 4.0, page=5.0, wait=6.0, copy=7.0, decode=8.0, guess=9.0, place=10.0, late=0.5,
              policy={"lfu": 11.0}, pool=12.0)
    s = selfcheck.scaled_costs(c, 2.0)
    assert s.attn == [2.0, 4.0] and (s.expert, s.head, s.copy, s.decode, s.guess, s.place, s.pool) == (6, 8, 14, 16, 18, 20, 24)
    assert s.policy == {"lfu": 22.0} and (s.page, s.wait, s.late) == (5.0, 6.0, 0.5)


def test_engine_settings_of_a_prediction():
    kw = selfcheck.engine_kwargs(_pred(prefetch=2, lookahead=2), 1 << 24, 2e9, False)
    assert kw["slots"] == [3, 3, 3, 3] and kw["prefetch"] == 2 and kw["lookahead"] == 2 and kw["link_speed"] == 2e9
    kw = selfcheck.engine_kwargs(_pred(prefetch=2, lookahead=1, auto=True), 1 << 24, None, False)
    assert kw["prefetch"] == "auto" and kw["lookahead"] == 1  # prefetch auto runs as the engine's option
    off = selfcheck.engine_kwargs(_pred(), 1 << 24, None, False)
    assert off["prefetch"] == 0 and "lookahead" not in off  # off said outright: the engine's default is auto
    kw = selfcheck.engine_kwargs(_pred(shared=True, slots=[12]), 1 << 24, None, True)
    assert kw["split"] == "shared" and "slots" not in kw and kw["cold_reads"] and "link_speed" not in kw
    assert selfcheck.tokens_per_run(1.0) == selfcheck.MIN_TOKENS and selfcheck.tokens_per_run(1e6) == selfcheck.MAX_TOKENS


@pytest.mark.plan_runs
def test_a_check_of_costs_made_wrong_on_purpose_disagrees_and_its_correction_comes_closer(tmp_path):
    """Costs doubled on purpose: the check's runs give about half the predicted step's compute, it says they
    disagree, and the prediction with the corrected costs lies nearer the measured speed than the wrong one."""
    r = moerun.plan("pebble", mem_cap="14MiB", link_speed="2GB/s", evict="lru", max_tokens=128)
    wrong = selfcheck.scaled_costs(r.costs, 3.0)
    rec = r.recommended
    moerun.record(tmp_path / "t.npz", "pebble", max_tokens=128)
    trace = read_trace(tmp_path / "t.npz")
    bad = predict(trace, rec.slots, rec.policy, rec.prefetch, rec.lookahead, wrong, rec.shared)
    prompt = list(range(1, 9))
    chk = selfcheck.measure("pebble", bad, r.mem_cap_bytes, prompt, link_speed=2e9, rounds=3)
    assert not chk.agrees and chk.error < 0  # the wrong costs promised less than the runs gave
    f = selfcheck.compute_factor(bad, chk.measured_tok_s)
    assert f is not None and f < 1
    fixed = predict(trace, rec.slots, rec.policy, rec.prefetch, rec.lookahead, selfcheck.scaled_costs(wrong, f), rec.shared)
    assert abs(fixed.tok_s / chk.measured_tok_s - 1) < abs(chk.error)
    assert dataclasses.asdict(chk) and chk.to_json()["agrees"] is False


@pytest.mark.plan_runs
def test_plan_runs_its_recommendation_and_reports_it(capsys):
    """The command's check line and the library's document: runs of the recommended setting, the measured speed,
    its spread and the prompt; --no-check leaves them out."""
    from moerun.cli import main as cli

    r = moerun.plan("pebble", mem_cap="14MiB", link_speed="2GB/s", evict="lru", max_tokens=64)
    ck = r.to_json()["check"]
    assert len(ck["runs_tok_s"]) == selfcheck.ROUNDS and all(v > 0 for v in ck["runs_tok_s"])
    assert ck["prompt"].startswith("the first 32 tokens of heldout.txt")
    assert ck["predicted_tok_s"] > 0 and ck["measured_tok_s"] == sorted(ck["runs_tok_s"])[1]
    if ck["agrees"]:
        assert ck["correction_factor"] is None
    else:  # corrected: the recommendation's prediction is the corrected one
        assert ck["corrected_tok_s"] == r.recommended.tok_s
    code = cli.main(["plan", "--mem-cap", "14MiB", "--link-speed", "2GB/s", "--evict", "lru", "--max-tokens", "64"])
    out = capsys.readouterr().out
    assert code == 0 and "checked: 3 runs of" in out
    code = cli.main(["plan", "--mem-cap", "14MiB", "--link-speed", "2GB/s", "--evict", "lru", "--max-tokens", "64", "--no-check"])
    out = capsys.readouterr().out
    assert code == 0 and "checked:" not in out
    assert "check" not in moerun.plan("pebble", mem_cap="14MiB", link_speed="2GB/s", evict="lru", max_tokens=64,
                                      check=False).to_json()


def test_an_open_checkpoint_is_checked_from_its_start_token():
    from pathlib import Path

    d = Path(__file__).resolve().parent.parent / "fixtures" / "open" / "olmoe-f32"
    ids, what = selfcheck.prompt_ids(d)
    assert what == "one start token" and len(ids) == 1
