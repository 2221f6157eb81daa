"""moerun.plan: returns what 'moerun plan --json' prints (the calibration's age aside, a timing)."""

from __future__ import annotations

import json

import numpy as np
from _jobs import as_json, cli_json, without
from _planning import _random_trace

import moerun
from moerun.files.trace import write_trace


def test_plan_of_a_shape_file_returns_what_the_command_prints(tmp_path, capsys):
    trace = tmp_path / "t.npz"
    write_trace(trace, _random_trace(np.random.default_rng(4), layers=4, experts=8))
    shape = tmp_path / "shape.json"
    shape.write_text(json.dumps({"layers": 4, "experts": 8, "top_k": 2, "expert_bytes": 1 << 20, "dense_bytes": 1 << 22,
                                 "expert_us": 50.0, "dense_layer_us": 100.0}))
    result = moerun.plan(mem_cap="16MiB", shape=shape, routing=str(trace), link_speed="1GB/s", target=5000, shared_pool=True)
    assert isinstance(result, moerun.PlanResult) and result.recommended.tok_s > 0
    code, doc = cli_json(capsys, "plan", "--shape", shape, "--routing", trace, "--mem-cap", "16MiB", "--link-speed", "1GB/s",
                         "--target", 5000, "--shared-pool")
    assert code == (0 if result.ok else 1)
    assert as_json(result.to_json()) == doc  # compute times from the shape file: nothing measured


def test_plan_of_a_model_returns_what_the_command_prints(small_model, tmp_path, capsys):
    text = tmp_path / "text.txt"
    text.write_text("the bright lamp runs under the cold river; " * 30)
    trace = tmp_path / "rec.npz"
    moerun.record(trace, small_model, text)
    moerun.plan(small_model, "1GiB", routing=str(trace), link_speed="2GB/s")  # calibrates, or finds the cached calibration
    result = moerun.plan(small_model, "1GiB", routing=str(trace), link_speed="2GB/s", evict=["lru", "lfu"])
    assert result.ok and result.calibration.startswith("calibration cached") and result.calibration_age_s is not None
    code, doc = cli_json(capsys, "plan", "--model", small_model, "--mem-cap", "1GiB", "--routing", trace,
                         "--link-speed", "2GB/s", "--evict", "lru,lfu")
    assert code == 0
    # calibration_age_s: seconds since the (cached) calibration, a little more on the second call
    assert without(as_json(result.to_json()), "calibration_age_s") == without(doc, "calibration_age_s")
