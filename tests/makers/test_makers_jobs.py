"""moerun.synth and moerun.quantize: each returns what its command's --json prints (timings aside)."""

from __future__ import annotations

from _jobs import as_json, cli_json, without

import moerun


def test_synth_returns_what_the_command_prints(tmp_path, capsys):
    shape = {"layers": 2, "experts": 4, "d_model": 32, "d_expert": 16, "top_k": 2, "d_shared": 8}
    result = moerun.synth(tmp_path / "lib", seed=5, **shape)
    assert isinstance(result, moerun.SynthResult) and result.config.n_layers == 2
    code, doc = cli_json(capsys, "synth", tmp_path / "cli", "--layers", 2, "--experts", 4, "--d-model", 32,
                         "--d-expert", 16, "--d-shared", 8, "--seed", 5, "--name", "lib")
    assert code == 0
    # seconds: the time of each run; model_dir: each run writes its own directory (named alike through --name)
    assert without(as_json(result.to_json()), "seconds", "model_dir") == without(doc, "seconds", "model_dir")
    assert (tmp_path / "lib" / "model.safetensors").read_bytes() == (tmp_path / "cli" / "model.safetensors").read_bytes()


def test_quantize_returns_what_the_command_prints(small_model, tmp_path, capsys):
    out = tmp_path / "q4"
    result = moerun.quantize(out, small_model, expert_bits=4, method="rtn", score=False)
    assert isinstance(result, moerun.QuantizeResult) and result.spec.expert_bits == 4
    code, doc = cli_json(capsys, "quantize", "--model", small_model, out, "--expert-bits", 4, "--method", "rtn",
                         "--no-score", "--force")
    assert code == 0
    assert without(as_json(result.to_json()), "seconds") == without(doc, "seconds")  # seconds: the time of each run
