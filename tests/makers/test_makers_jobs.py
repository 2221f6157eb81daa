"""moerun.synth and moerun.quantize: each returns what its command's --json prints (timings aside)."""

from __future__ import annotations

from pathlib import Path

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


def test_quantize_of_an_open_checkpoint_returns_what_the_command_prints(tmp_path, capsys):
    src = Path(__file__).resolve().parents[1] / "fixtures" / "open" / "qwen2_moe-bf16-sharded-v4"
    text = tmp_path / "t.txt"
    text.write_text("The fog nets on the ridge caught water before dawn; the keepers logged the yield.\n")
    out = tmp_path / "q"
    result = moerun.quantize(out, src, expert_bits=8, method="rtn", text=text)
    code, doc = cli_json(capsys, "quantize", "--model", src, out, "--expert-bits", 8, "--method", "rtn",
                         "--text", text, "--force")
    assert code == 0 and doc["quant"]["format"] == "moerun-packed/2" and doc["heldout"]["text"] == "t.txt"
    # seconds and tok_s: the time of each run
    a, b = as_json(result.to_json()), doc
    for d in (a, b):
        for key in ("source", "quantized"):
            d["heldout"][key].pop("tok_s")
    assert without(a, "seconds") == without(b, "seconds")
