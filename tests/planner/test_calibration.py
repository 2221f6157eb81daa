"""moerun.planner.calibration: the measured costs, where they are cached, and when they are not to be trusted."""

from __future__ import annotations

import json

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st


def test_calibration_goes_to_the_tests_temporary_cache_never_the_users(private_cache_dir):
    from pathlib import Path

    from moerun.planner.calibration import cache_dir

    assert private_cache_dir in cache_dir().parents
    assert Path.home() / ".cache" not in [cache_dir(), *cache_dir().parents]


@pytest.mark.parametrize("damage", ["negative", "infinite as a string", "wrong layer count", "missing figure", "not an object"])
def test_a_calibration_cache_that_parses_but_holds_wrong_values_is_measured_again(small_model, damage):
    from moerun.planner.calibration import SCHEMA, cache_dir, calibrate, model_key

    first = calibrate(small_model)
    path = cache_dir() / f"calibration-{model_key(small_model)}.json"
    assert path.is_file()
    doc = json.loads(path.read_text())
    if damage == "negative":
        doc["attn_s"][0] = -1.0
    elif damage == "infinite as a string":
        doc["expert_s"] = "inf"
    elif damage == "wrong layer count":
        doc["attn_s"] = doc["attn_s"][:1]
    elif damage == "missing figure":
        del doc["head_s"]
    else:
        doc = [SCHEMA]
    path.write_text(json.dumps(doc))
    again = calibrate(small_model)
    assert "cached" not in again  # measured, not read
    assert len(again["attn_s"]) == len(first["attn_s"]) and min(again["attn_s"]) >= 0 and again["expert_s"] > 0
    assert json.loads(path.read_text())["attn_s"] == again["attn_s"]  # and the cache repaired


def test_a_calibration_with_flags_is_shown_as_not_trusted_with_its_age():
    import time

    from moerun.planner.calibration import describe

    cal = {"created_unix": time.time() - 3 * 3600, "created": "then", "host": "h", "step_spread": 0.21, "step_runs": 9,
           "flags": ["noisy: the best resident decodes differed by 21%"]}
    text = describe(cal)
    assert "3 h old" in text and "21.0%" in text and "NOT TRUSTED" in text and "--recalibrate" in text
    assert "NOT TRUSTED" not in describe({**cal, "flags": []})


def test_a_calibration_taken_beside_a_busy_process_is_flagged(small_model):
    import subprocess
    import sys

    from moerun.planner.calibration import measure

    busy = [subprocess.Popen([sys.executable, "-c", "while True: pass"]) for _ in range(2)]
    try:
        doc = measure(small_model, tokens=24)
    finally:
        for p in busy:
            p.kill()
            p.wait()
    assert any("other work ran" in f for f in doc["flags"])
    assert doc["others_cpu_s"] > 0 and doc["policy_s"].keys() >= {"markov", "lrfu"}


# ---------------------------------------------------------------------------- a cache that is not wholly valid and plausible


def _good(small_model) -> dict:
    """A real calibration of the small model (measured once in the session, then cached), as the file holds it."""
    from moerun.planner.calibration import calibrate

    doc = dict(calibrate(small_model))
    doc.pop("cached", None)
    return doc


def _plan_with_cache(small_model, tmp_path, capsys, monkeypatch, doc) -> tuple[int, dict, str, list]:
    """``moerun plan --json`` with ``doc`` as the cache file; measuring returns the good calibration at once."""
    import numpy as np
    from _planning import _random_trace

    from moerun.cli.main import main
    from moerun.files.trace import write_trace
    from moerun.planner import calibration

    good = _good(small_model)
    path = calibration.cache_dir() / f"calibration-{calibration.model_key(small_model)}.json"
    path.write_text(json.dumps(doc))
    measured = []
    monkeypatch.setattr(calibration, "measure", lambda *a, **k: measured.append(1) or dict(good))
    trace = tmp_path / "t.npz"
    write_trace(trace, _random_trace(np.random.default_rng(0), layers=3, experts=8))
    capsys.readouterr()
    code = main(["plan", "--model", str(small_model), "--mem-cap", "1GiB", "--link-speed", "2GB/s", "--routing", str(trace),
                 "--evict", "lru", "--json"])
    out, err = capsys.readouterr()
    assert json.loads(path.read_text()) == good  # the cache file replaced
    return code, json.loads(out), err, measured


@pytest.mark.parametrize("damage", ["created missing", "host missing", "step_runs missing", "flags a number",
                                    "flags holding a number", "host with a lone surrogate"])
def test_a_calibration_cache_with_missing_or_mistyped_descriptive_fields_is_measured_again_with_one_line(
        small_model, tmp_path, capsys, monkeypatch, damage):
    doc = _good(small_model)
    if damage.endswith("missing"):
        del doc[damage.split()[0]]
    elif damage == "flags a number":
        doc["flags"] = 3
    elif damage == "flags holding a number":
        doc["flags"] = [3]
    else:
        doc["host"] = "\udcff"  # written by json as the escape \udcff, read back as a lone surrogate
    code, out, err, measured = _plan_with_cache(small_model, tmp_path, capsys, monkeypatch, doc)
    assert code == 0 and measured == [1]
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("moerun plan: the cached calibration ") and "measuring again" in lines[0]
    assert "calibration measured now" in out["calibration"]


@pytest.mark.parametrize("damage", ["no attention", "one picosecond per expert", "no head", "a step faster than its parts"])
def test_a_calibration_cache_with_implausible_costs_is_measured_again(small_model, tmp_path, capsys, monkeypatch, damage):
    # the case: 0 s of attention and 1 ps per expert were trusted, and plan predicted 48,002 tok/s
    good = _good(small_model)
    doc = dict(good)
    if damage == "no attention":
        doc["attn_s"] = [0.0] * len(doc["attn_s"])
    elif damage == "one picosecond per expert":
        doc["expert_s"] = 1e-12
    elif damage == "no head":
        doc["head_s"] = 0.0
    else:
        doc["resident_step_s"] = 1e-9
    code, out, err, measured = _plan_with_cache(small_model, tmp_path, capsys, monkeypatch, doc)
    assert code == 0 and measured == [1]
    assert len(err.strip().splitlines()) == 1 and "below the" in err and "no CPU beats" in err
    assert out["costs"]["attn_s"] == pytest.approx(good["attn_s"])
    assert out["costs"]["expert_s"] == pytest.approx(good["expert_s"])


def test_a_fresh_calibration_is_plausible_and_read_back_from_the_cache(small_model):
    from moerun.files.config import ModelConfig
    from moerun.planner.calibration import Floors, cache_dir, cached, model_key

    good = _good(small_model)
    floor = Floors.for_config(ModelConfig.load(small_model))
    assert min(a - f for a, f in zip(good["attn_s"], floor.attn)) >= 0 and good["expert_s"] > floor.expert
    doc, why = cached(cache_dir() / f"calibration-{model_key(small_model)}.json", ModelConfig.load(small_model), small_model)
    assert why is None and doc["attn_s"] == good["attn_s"]


def test_the_plausibility_floors_follow_the_models_shapes():
    # a large shape (hidden 4096, expert width 14336, 32 layers, 32 heads, 8 key-value heads, vocabulary
    # 32000, 8 experts, top-2, untied embeddings); floors worked by hand: float32 bytes at 10 TB/s.
    from moerun.files.config import ModelConfig
    from moerun.planner.calibration import BANDWIDTH, CALL_S, Floors

    c = ModelConfig(vocab_size=32000, d_model=4096, n_layers=32, n_heads=32, n_kv_heads=8, head_dim=128, n_experts=8,
                    top_k=2, d_expert=14336, max_seq_len=4096, rope_theta=1e6, norm_eps=1e-5, tied_embeddings=False)
    f = Floors.for_config(c)
    assert BANDWIDTH == 10e12
    assert f.expert == pytest.approx(3 * 4096 * 14336 * 4 / 10e12)  # 70.5 us
    assert f.attn[0] == pytest.approx((2 * 4096 * 4096 + 2 * 4096 * 1024 + 4096 * 8 + 2 * 4096) * 4 / 10e12)  # 16.8 us
    assert f.head == pytest.approx((4096 * 32000 + 4096) * 4 / 10e12)  # 52.4 us
    assert f.copy == pytest.approx(3 * 4096 * 14336 * 2 / 8 / 10e12)  # 2-bit weights: 4.4 us
    assert f.step == pytest.approx(32 * f.attn[0] + f.head + 64 * f.expert)
    tiny = Floors.for_config(ModelConfig(vocab_size=16, d_model=4, n_layers=1, n_heads=1, n_kv_heads=1, head_dim=4,
                                         n_experts=2, top_k=1, d_expert=4, max_seq_len=8, rope_theta=1e4, norm_eps=1e-5,
                                         tied_embeddings=True))
    assert tiny.expert == tiny.attn[0] == tiny.head == CALL_S and tiny.guess == 0.0  # one numpy call at least


# ---------------------------------------------------------------------------- fuzz: the loader never raises

_ODD_TEXT = ["\udcff", "\ud800x", "a\x00b", "two\nlines", "", "x" * 3000, "2026-12-04T18:00:00Z", "héllo"]
_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**70), 2**70) | st.floats(allow_nan=True, allow_infinity=True)
    | st.floats(-2.0, 20.0) | st.text(max_size=12) | st.sampled_from(_ODD_TEXT),
    lambda kids: st.lists(kids, max_size=4) | st.dictionaries(st.text(max_size=6) | st.sampled_from(_ODD_TEXT), kids, max_size=4),
    max_leaves=8,
)
_FIELDS = ["schema", "model_dir", "created", "created_unix", "host", "cpus", "load_average", "others_cpu_s", "seconds",
           "moerun", "attn_s", "head_s", "resident_step_s", "step_spread", "step_runs", "expert_s", "decode_s", "copy_s",
           "guess_s", "wait_s", "policy_s", "pool_s", "late_share", "place_s", "flags", "note", "cached", "unknown"]
_MUTATION = st.one_of(
    st.tuples(st.just("set"), st.sampled_from(_FIELDS), _VALUES),
    st.tuples(st.just("delete"), st.sampled_from(_FIELDS), st.none()),
    st.tuples(st.just("scale"), st.sampled_from(["attn_s", "head_s", "resident_step_s", "expert_s", "copy_s", "guess_s",
                                                 "pool_s", "wait_s", "decode_s"]), st.integers(-15, 4)),
    st.tuples(st.just("item"), st.sampled_from(["attn_s", "flags", "policy_s"]), _VALUES),
)


def _mutate(doc: dict, mutation) -> None:
    op, key, value = mutation
    if op == "set":
        doc[key] = value
    elif op == "delete":
        doc.pop(key, None)
    elif op == "scale" and isinstance(doc.get(key), (int, float)):
        doc[key] = doc[key] * 10.0**value
    elif op == "scale" and isinstance(doc.get(key), list) and doc[key]:
        doc[key][0] = doc[key][0] * 10.0**value if isinstance(doc[key][0], (int, float)) else value
    elif op == "item" and isinstance(doc.get(key), list) and doc[key]:
        doc[key][0] = value
    elif op == "item" and isinstance(doc.get(key), dict):
        doc[key]["lfu" if doc[key] else "x"] = value


def _check_loaded(path, small_model) -> str:
    """Load ``path`` as the cache: a valid calibration that everything downstream can use, or "measure again"."""
    from moerun.files.config import ModelConfig
    from moerun.planner.calibration import cached, check_cache, costs_from_calibration, describe

    config = ModelConfig.load(small_model)
    doc, why = cached(path, config, small_model)
    if doc is None:
        assert isinstance(why, str) and why and why.isprintable()
        return "measure again"
    assert why is None and check_cache({k: v for k, v in doc.items() if k != "cached"}, config, small_model) is None
    describe(doc).encode("utf-8")  # printable text: the crash of the issue was at printing
    costs = costs_from_calibration(doc, 1e-4, "test")
    assert all(a > 0 for a in costs.attn) and costs.expert > 0 and costs.head > 0
    return "valid"


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(_MUTATION, min_size=1, max_size=3))
def test_the_calibration_cache_loader_returns_a_valid_cache_or_measure_again_never_an_error(small_model, mutations):
    import copy
    import tempfile
    from pathlib import Path

    doc = copy.deepcopy(_good(small_model))
    for m in mutations:
        _mutate(doc, m)
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "calibration.json"
        path.write_text(json.dumps(doc, allow_nan=True))
        _check_loaded(path, small_model)


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.integers(0, 10**6), st.integers(0, 64), st.binary(max_size=64))
def test_the_calibration_cache_loader_survives_damaged_bytes(small_model, at, cut, junk):
    import tempfile
    from pathlib import Path

    raw = json.dumps(_good(small_model), indent=2).encode()
    at %= len(raw)
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "calibration.json"
        path.write_bytes(raw[:at] + junk + raw[at + cut:])
        _check_loaded(path, small_model)


def test_the_calibration_cache_fuzz_reaches_both_outcomes(small_model, tmp_path):
    # the loader's two answers both occur under the fuzz's mutations: a plausible change is kept, others measured again
    path = tmp_path / "calibration.json"
    doc = _good(small_model)
    path.write_text(json.dumps({**doc, "head_s": doc["head_s"] * 2}))
    assert _check_loaded(path, small_model) == "valid"
    path.write_text(json.dumps({**doc, "head_s": doc["head_s"] * 1e-12}))
    assert _check_loaded(path, small_model) == "measure again"
