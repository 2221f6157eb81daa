"""moerun.planner.calibration: the measured costs, where they are cached, and when they are not to be trusted."""

from __future__ import annotations

import json

import pytest


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
