"""moerun.planner.shape_costs and plan on an open checkpoint: compute times at the real shape from one layer of
random weights, bytes from the headers, nothing of the weights read."""

from __future__ import annotations

from pathlib import Path

import pytest

import moerun
from moerun.cli import main as cli
from moerun.errors import BadInput
from moerun.planner.shape_costs import checkpoint_shape, measure_shape

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures" / "open"


@pytest.mark.parametrize("variant", ["qwen3_moe-bf16-sharded-v4", "qwen2_moe-bf16-fused", "olmoe-f32"])
def test_a_checkpoints_shape_holds_the_bytes_its_engine_budgets(variant):
    sh, c = checkpoint_shape(FIXTURES / variant)
    with moerun.load(FIXTURES / variant, mem_cap="64MiB") as eng:  # capped: experts held as stored
        b = eng.budget
        assert (sh["layers"], sh["experts"], sh["top_k"]) == (eng.config.n_layers, eng.config.n_experts, eng.config.top_k)
        assert sh["expert_bytes"] == eng.store.expert_nbytes
        assert sh["dense_bytes"] == b.dense and sh["kv_cache_bytes"] == b.kv_cache and sh["scratch_bytes"] == b.scratch


def test_measured_times_are_positive_and_a_bf16_expert_pays_for_its_widening():
    _, c = checkpoint_shape(FIXTURES / "qwen2_moe-bf16-fused")
    t = measure_shape(c, "BF16")
    assert all(t[k] > 0 for k in ("dense_layer_us", "expert_us", "decode_us", "copy_us", "head_us", "guess_us"))
    assert measure_shape(c, "F32")["decode_us"] == 0.0


def test_plan_on_an_open_checkpoint_needs_a_trace_and_says_how_to_make_one(capsys):
    code = cli.main(["plan", "--model", str(FIXTURES / "olmoe-f32"), "--mem-cap", "4MiB", "--link-speed", "1GB/s"])
    out, err = capsys.readouterr()
    assert code == 2 and out == "" and len(err.strip().splitlines()) == 1 and "moerun record" in err
    with pytest.raises(BadInput, match="--routing"):
        moerun.plan(FIXTURES / "olmoe-f32", "4MiB", link_speed="1GB/s")


def test_plan_on_an_open_checkpoint_predicts_from_its_trace(tmp_path):
    d = FIXTURES / "qwen3_moe-bf16-sharded-v4"
    trace = tmp_path / "t.npz"
    moerun.record(trace, d, text=FIXTURES / "README.md", max_tokens=200)
    result = moerun.plan(d, "1900KiB", link_speed="1GB/s", routing=trace, evict="lru")
    doc = result.to_json()
    assert doc["planned_for"].startswith("open checkpoint") and result.recommended is not None
    assert result.recommended.tok_s > 0 and "one layer of random weights" in result.calibration


def test_a_moerun_model_too_large_to_run_whole_is_planned_from_its_shape_under_a_cap(monkeypatch):
    """A model that does not fit the memory available is never loaded whole: its compute is timed at its shape and
    on a few of its own experts, and its routing is recorded under a cap."""
    import moerun.planner.jobs as jobs
    import moerun.runtime.options as options

    monkeypatch.setattr(jobs, "fits_whole", lambda nbytes: False)
    monkeypatch.setattr(jobs, "calibrate", lambda *a, **k: pytest.fail("the whole-model calibration ran"))
    caps = []
    real_load = options.load
    monkeypatch.setattr(options, "load", lambda *a, **k: (caps.append(k.get("mem_cap")), real_load(*a, **k))[1])
    r = moerun.plan("pebble", mem_cap="14MiB", link_speed="2GB/s", max_tokens=32)
    assert caps and all(c is not None for c in caps)  # every engine it ran was capped
    assert "too large to run whole" in r.to_json()["calibration"] and r.recommended is not None
    assert r.to_json()["costs"]["expert_s"] > 0


def test_a_moerun_models_shape_holds_the_bytes_its_engine_budgets():
    from moerun.planner.shape_costs import model_shape

    sh = model_shape("scree")
    with moerun.load("scree", mem_cap="64MiB") as eng:
        b = eng.budget
        assert (sh["layers"], sh["experts"], sh["top_k"]) == (eng.config.n_layers, eng.config.n_experts, eng.config.top_k)
        assert sh["expert_bytes"] == eng.store.expert_nbytes
        assert sh["dense_bytes"] == b.dense and sh["kv_cache_bytes"] == b.kv_cache and sh["scratch_bytes"] == b.scratch
    assert sh["expert_us"] > 0 and sh["decode_us"] == 0.0  # float32 experts: nothing to decode
