"""moerun synth --open-type: open checkpoints of random weights that moerun and the reference library both read.

Outside references: the safetensors format (its README: header length, JSON header, data; tensors whole in one
file; BF16 = the top 16 bits of a float32), IEEE 754 round-half-to-even for the float32 -> BF16 rounding (the
expected bit patterns below are worked by hand from it), and, where torch and transformers import (CI's
reference step), the transformers library 5.x loading what is written
(`from_pretrained(dir, dtype=torch.float32, attn_implementation="eager", experts_implementation="eager")`) and
computing the same logits within 1e-3.
"""

from __future__ import annotations

import importlib.util
import json

import numpy as np
import pytest

import moerun
from moerun.cli import main as cli
from moerun.files.checkpoint import Checkpoint
from moerun.makers.synth_open import OpenShape, synthesize_open, to_bf16

SHAPES = {
    "qwen3_moe": dict(head_dim=24, dense_layers=(1,), dense_width=48),
    "qwen2_moe": dict(shared_width=40),
    "olmoe": {},
}


def _write(tmp_path, mt, dtype="BF16", shard=30_000, **kw):
    shape = OpenShape(mt, layers=3, experts=8, hidden=64, expert_width=32, dtype=dtype, **{**SHAPES[mt], **kw})
    return tmp_path / mt, synthesize_open(tmp_path / mt, shape, seed=5, shard_bytes=shard)


def test_bf16_rounding_is_to_nearest_even():
    f = np.array([0x3F800000, 0x3F808000, 0x3F818000, 0x3F808001, 0xBF7FFFFF], np.uint32).view(np.float32)
    # 1.0 exact; halfway with an even low half -> down; halfway with an odd low half -> up; just past halfway -> up;
    # -0.99999994 rounds up in magnitude to -1.0 (0xBF80)
    assert to_bf16(f).tolist() == [0x3F80, 0x3F80, 0x3F82, 0x3F81, 0xBF80]


@pytest.mark.parametrize("mt", sorted(SHAPES))
def test_a_synthesized_open_checkpoint_is_valid_sharded_and_runs(tmp_path, mt):
    d, doc = _write(tmp_path, mt)
    assert len(doc["files"]) > 1 and (d / "model.safetensors.index.json").exists()
    index = json.loads((d / "model.safetensors.index.json").read_text())
    assert set(index["weight_map"].values()) == set(doc["files"])
    with Checkpoint.open(d) as ck:  # every shard validated against the config, as a user's checkpoint is
        assert ck.config.model_type == mt and ck.expert_dtype == "BF16"
        assert sum(len(sp.files) > 1 for row in ck.span_map if row for sp in row) > 0  # experts straddle files
    eng = moerun.load(d)
    try:
        gen = eng.generate("Fog", max_new=4)
        assert len(gen.new_ids) >= 1 and eng.config.arch == mt
    finally:
        eng.close()
    assert "random weights" in (d / "CARD.md").read_text()


def test_the_same_seed_writes_the_same_bytes(tmp_path):
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    a, _ = _write(tmp_path / "a", "olmoe")
    b, _ = _write(tmp_path / "b", "olmoe")
    for f in sorted(a.iterdir()):
        assert f.read_bytes() == (b / f.name).read_bytes(), f.name


@pytest.mark.parametrize(("argv", "phrase"), [
    (["--open-type", "olmoe", "--d-shared", "16"], "shared expert"),
    (["--open-type", "qwen2_moe"], "--d-shared"),
    (["--open-type", "qwen3_moe", "--vocab", "257"], "258"),
    (["--open-type", "qwen3_moe", "--dense-layers", "7", "--dense-width", "32"], "--dense-layers"),
    (["--tied"], "--open-type"),
    (["--open-type", "olmoe", "--shard-size", "lots"], "shard-size"),
])
def test_a_bad_open_synth_option_gets_one_line_and_writes_nothing(tmp_path, capsys, argv, phrase):
    out = tmp_path / "ck"
    code = cli.main(["synth", str(out), "--layers", "2", "--experts", "4", "--d-model", "64", "--d-expert", "32",
                     "--heads", "4", "--kv-heads", "2", *argv])
    o, err = capsys.readouterr()
    assert code == 2 and o == "" and len(err.strip().splitlines()) == 1 and phrase in err
    assert not out.exists() and list(tmp_path.iterdir()) == []


def test_synth_open_from_the_command_line_reports_json(tmp_path, capsys):
    out = tmp_path / "ck"
    code = cli.main(["synth", str(out), "--open-type", "qwen3_moe", "--layers", "2", "--experts", "4", "--d-model", "64",
                     "--d-expert", "32", "--heads", "4", "--kv-heads", "2", "--json"])
    doc = json.loads(capsys.readouterr().out)
    assert code == 0 and doc["model_type"] == "qwen3_moe" and doc["files"] == ["model.safetensors"]
    assert doc["file_bytes"] == (out / "model.safetensors").stat().st_size and doc["dtype"] == "BF16"


HAVE_REFERENCE = importlib.util.find_spec("torch") is not None and importlib.util.find_spec("transformers") is not None


@pytest.mark.skipif(not HAVE_REFERENCE, reason="torch and transformers (the reference extra) are not installed")
@pytest.mark.parametrize("mt", sorted(SHAPES))
@pytest.mark.parametrize("dtype", ["BF16", "F32"])
def test_the_reference_library_loads_what_synth_writes_and_computes_the_same_logits(tmp_path, mt, dtype):
    import torch
    import transformers

    torch.set_num_threads(1)
    d, _ = _write(tmp_path, mt, dtype=dtype)
    model = transformers.AutoModelForCausalLM.from_pretrained(
        d, dtype=torch.float32, attn_implementation="eager", experts_implementation="eager")
    ids = [0, 40, 50, 60, 70, 80, 90, 100, 7]
    with torch.no_grad():
        want = model(torch.tensor([ids])).logits[0].numpy()
    eng = moerun.load(d)
    try:
        assert np.abs(eng.logits(ids) - want).max() < 1e-3
    finally:
        eng.close()


def test_force_replaces_an_open_checkpoint_that_synth_wrote(tmp_path):
    d, _ = _write(tmp_path, "olmoe")
    shape = OpenShape("olmoe", layers=2, experts=4, hidden=64, expert_width=32)
    doc = synthesize_open(d, shape, seed=1, force=True)  # its shards, index and side files count as a model's
    assert doc["files"] == ["model.safetensors"] and not (d / "model.safetensors.index.json").exists()
