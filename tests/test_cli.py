"""moerun.cli and its commands: broken inputs give one clear stderr line and exit 2, never a traceback.

Corrupt files are made by editing a synthetic model's header or config in the test.
"""

from __future__ import annotations

import json
import os
import struct
import subprocess
import sys

import numpy as np
import pytest
from conftest import ROOT, edit_config, edit_header, read_raw, write_raw

from moerun import cli
from moerun.budget import minimum_cap
from moerun.store import ModelStore
from moerun.trace import read_trace


def _run(capsys, *argv):
    """Exit code, stdout and stderr of ``moerun ARGV`` run in this process (usage errors end in SystemExit)."""
    try:
        code = cli.main(list(argv))
    except SystemExit as e:
        code = e.code
    out, err = capsys.readouterr()
    return code, out, err


def _assert_one_clear_line(code, err, phrase=None):
    assert code == 2
    assert "Traceback" not in err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("moerun")
    if phrase is not None:
        assert phrase in lines[0]


def _generate(model, *extra):
    return ("generate", "--model", str(model), "--prompt", "hi", "--max-new", "2", *extra)


# ---------------------------------------------------------------------------- broken model files


def _weights(d):
    return d / "model.safetensors"


def _truncate(d):
    blob = _weights(d).read_bytes()
    _weights(d).write_bytes(blob[: len(blob) // 2])


def _truncate_tiny(d):
    _weights(d).write_bytes(b"\x01\x02\x03")


def _header_length_past_end(d):
    blob = _weights(d).read_bytes()
    _weights(d).write_bytes(struct.pack("<Q", 10 * len(blob)) + blob[8:])


def _header_not_json(d):
    doc, data = read_raw(_weights(d))
    write_raw(_weights(d), b"not json at all" + b" " * 40, data)


def _unknown_dtype(d):
    edit_header(_weights(d), lambda doc: doc["layers.0.router"].__setitem__("dtype", "Q7"))


def _offsets_outside(d):
    doc, data = read_raw(_weights(d))
    doc["embed"]["data_offsets"] = [len(data) - 4, len(data) - 4 + doc["embed"]["data_offsets"][1] - doc["embed"]["data_offsets"][0]]
    write_raw(_weights(d), doc, data)


def _overlapping(d):
    def edit(doc):
        doc["layers.1.experts.2.w_gate"]["data_offsets"] = list(doc["layers.1.experts.1.w_up"]["data_offsets"])

    edit_header(_weights(d), edit)


def _missing_tensor(d):
    edit_header(_weights(d), lambda doc: doc.pop("layers.1.attn.wo"))


def _shape_vs_config(d):
    edit_config(d, lambda c: c.__setitem__("d_expert", 48))


def _config_missing_field(d):
    edit_config(d, lambda c: c.pop("top_k"))


def _config_top_k_too_big(d):
    edit_config(d, lambda c: c.__setitem__("top_k", c["n_experts"] + 1))


def _config_heads_not_multiple(d):
    edit_config(d, lambda c: c.update(n_heads=3, n_kv_heads=2))


def _config_negative_d_model(d):
    edit_config(d, lambda c: c.__setitem__("d_model", -32))


def _config_not_json(d):
    (d / "config.json").write_text("{'single': 'quotes'}")


def _config_deeply_nested(d):
    (d / "config.json").write_text("[" * 100_000 + "]" * 100_000)


def _config_missing(d):
    (d / "config.json").unlink()


def _config_context_beyond_any_memory(d):
    # 10**15 positions: the rotary tables alone would take petabytes, beyond any address space,
    # so the allocation fails at once whatever the machine's overcommit setting
    edit_config(d, lambda c: c.__setitem__("max_seq_len", 10**15))


def _broken_tokenizer(d):
    (d / "tokenizer.json").write_text('{"version": "1.0", "model": ')


BROKEN_MODELS = {
    "truncated file": (_truncate, "outside the data"),
    "truncated below the length field": (_truncate_tiny, "truncated"),
    "header length past the end": (_header_length_past_end, "past the end"),
    "header not JSON": (_header_not_json, "not valid JSON"),
    "unknown dtype": (_unknown_dtype, "unknown dtype"),
    "offsets outside the file": (_offsets_outside, "outside the data"),
    "overlapping offsets": (_overlapping, "overlap"),
    "missing tensor": (_missing_tensor, "missing tensor 'layers.1.attn.wo'"),
    "shapes disagree with config.json": (_shape_vs_config, "layers.0.experts.0.w_gate"),
    "config missing a field": (_config_missing_field, "missing field(s) top_k"),
    "config top_k above n_experts": (_config_top_k_too_big, "top_k"),
    "config n_heads not a multiple of n_kv_heads": (_config_heads_not_multiple, "multiple of n_kv_heads"),
    "config negative d_model": (_config_negative_d_model, "d_model must be a positive integer"),
    "config not JSON": (_config_not_json, "not valid JSON"),
    "config nested too deeply": (_config_deeply_nested, "config.json"),
    "config missing": (_config_missing, "config.json"),
    "broken tokenizer.json": (_broken_tokenizer, "tokenizer"),
    "config context beyond any memory": (_config_context_beyond_any_memory, "out of memory"),
}


@pytest.mark.parametrize("case", sorted(BROKEN_MODELS))
def test_broken_model_gives_one_stderr_line_and_exit_2(fresh_model, capsys, case):
    corrupt, phrase = BROKEN_MODELS[case]
    corrupt(fresh_model)
    code, _, err = _run(capsys, *_generate(fresh_model))
    _assert_one_clear_line(code, err, phrase)


@pytest.mark.parametrize("case", ["header not JSON", "missing tensor", "config top_k above n_experts"])
def test_inspect_and_verify_report_broken_models_the_same_way(fresh_model, capsys, case):
    corrupt, phrase = BROKEN_MODELS[case]
    corrupt(fresh_model)
    for command in ("inspect", "verify"):
        code, _, err = _run(capsys, command, "--model", str(fresh_model))
        _assert_one_clear_line(code, err, phrase)


def test_missing_model_directory_gives_one_line_and_exit_2(tmp_path, capsys):
    code, _, err = _run(capsys, *_generate(tmp_path / "no-such-model"))
    _assert_one_clear_line(code, err, "no such model directory")


@pytest.mark.parametrize(("where", "phrase"), [("dir", "is a directory"), ("under-a-file", "cannot write")])
def test_trace_path_that_cannot_be_written_gives_one_line_and_exit_2(small_model, tmp_path, capsys, where, phrase):
    (tmp_path / "plain-file").write_text("x")
    target = tmp_path if where == "dir" else tmp_path / "plain-file" / "run.npz"
    code, _, err = _run(capsys, *_generate(small_model, "--json", "--trace", str(target)))
    _assert_one_clear_line(code, err, phrase)


def test_prompt_file_that_is_not_utf8_gives_one_line_and_exit_2(small_model, tmp_path, capsys):
    p = tmp_path / "prompt.txt"
    p.write_bytes(b"caf\xe9 latin-1")
    code, _, err = _run(capsys, "generate", "--model", str(small_model), "--prompt-file", str(p), "--max-new", "2")
    _assert_one_clear_line(code, err, "not UTF-8")


@pytest.mark.parametrize(
    ("option", "phrase"),
    [
        (("--mem-cap", "abc"), "memory cap"),
        (("--mem-cap=-5MB",), "memory cap"),
        (("--prefetch", "-1"), "--prefetch"),
        (("--lookahead", "0"), "--lookahead"),
        (("--max-new", "-3"), "--max-new"),
        (("--evict", "nosuch"), "nosuch"),
        (("--evict", "optimal"), "replay"),
        (("--slots", "x"), "--slots"),
        (("--link-speed", "0"), "link speed"),
        (("--link-speed", "fast"), "link speed"),
        (("--temperature", "-1"), "temperature"),
        (("--top-p", "0"), "top-p"),
        (("--seed", "-1"), "seed"),
    ],
)
def test_bad_option_value_gives_one_line_and_exit_2(small_model, capsys, option, phrase):
    # for --max-new the later value on the command line wins over the "2" given first
    code, _, err = _run(capsys, "generate", "--model", str(small_model), "--prompt", "hi", "--max-new", "2", *option)
    _assert_one_clear_line(code, err, phrase)


@pytest.mark.parametrize("option", [("--max-new", "lots"), ("--prefetch", "2.5"), ("--no-such-option",)])
def test_malformed_option_is_a_usage_error_with_exit_2(small_model, capsys, option):
    code, _, err = _run(capsys, "generate", "--model", str(small_model), *option)
    _assert_one_clear_line(code, err, option[0])


def test_broken_model_through_a_real_process_exits_2_without_traceback(fresh_model):
    _missing_tensor(fresh_model)
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    proc = subprocess.run(
        [sys.executable, "-m", "moerun", *_generate(fresh_model)],
        capture_output=True, text=True, env=env, cwd=str(ROOT), timeout=120,
    )
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert proc.stderr.strip().count("\n") == 0
    assert "missing tensor" in proc.stderr
    assert proc.stdout == ""


def test_bad_option_through_a_real_process_exits_2_without_traceback(small_model):
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    proc = subprocess.run(
        [sys.executable, "-m", "moerun", *_generate(small_model, "--mem-cap", "abc")],
        capture_output=True, text=True, env=env, cwd=str(ROOT), timeout=120,
    )
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert proc.stderr.strip().count("\n") == 0


# ---------------------------------------------------------------------------- the memory cap on the command line


def _minimum(model_dir, split="even"):
    store = ModelStore.open(model_dir)
    try:
        return minimum_cap(store.config, store.dense_nbytes, store.expert_nbytes, split, store.codec.scratch_bytes())
    finally:
        store.close()


def test_cap_below_the_minimum_exits_2_naming_the_minimum_in_bytes(small_model, capsys):
    lo = _minimum(small_model)
    code, _, err = _run(capsys, *_generate(small_model, "--mem-cap", str(lo - 1)))
    _assert_one_clear_line(code, err, f"{lo} bytes")


def test_cap_at_the_minimum_generates(small_model, capsys):
    lo = _minimum(small_model)
    code, out, err = _run(capsys, *_generate(small_model, "--mem-cap", str(lo), "--json"))
    assert code == 0, err
    doc = json.loads(out)
    assert doc["new_tokens"] == 2
    assert doc["budget"]["total_bytes"] <= lo


def test_slot_list_out_of_range_exits_2(small_model, capsys):
    code, _, err = _run(capsys, *_generate(small_model, "--mem-cap", "1GiB", "--slots", "1,2,2"))
    _assert_one_clear_line(code, err, "top_k")


# ---------------------------------------------------------------------------- outputs


def test_generate_json_prints_one_json_document_only(small_model, capsys):
    code, out, err = _run(capsys, *_generate(small_model, "--json", "--mem-cap", str(_minimum(small_model))))
    assert code == 0, err
    doc = json.loads(out)  # the whole of stdout parses as one document
    assert doc["prompt"] == "hi"
    assert doc["new_tokens"] == 2


def test_generate_trace_is_readable_with_one_row_per_token_through_the_model(small_model, tmp_path, capsys):
    path = tmp_path / "run.npz"
    code, out, err = _run(
        capsys, "generate", "--model", str(small_model), "--prompt", "héllo", "--max-new", "7",
        "--mem-cap", str(_minimum(small_model)), "--trace", str(path), "--json",
    )
    assert code == 0, err
    doc = json.loads(out)
    trace = read_trace(path)
    # every prompt token, then every decoded token fed back through the model (the last sampled one is not)
    tokens = doc["prompt_tokens"] + doc["decode_steps"]
    assert doc["decode_steps"] == 6
    assert trace.experts.shape == (tokens, 3, 2)
    assert ((trace.experts >= 0) & (trace.experts < 8)).all()
    assert (np.diff(trace.experts, axis=-1) > 0).all()  # chosen experts ascending within a row
    assert trace.meta["prefill_tokens"] == doc["prompt_tokens"]
    assert trace.meta["partial"] is False


def test_inspect_json_reports_the_expert_layout(small_model, capsys):
    code, out, err = _run(capsys, "inspect", "--model", str(small_model), "--json", "--check")
    assert code == 0, err
    doc = json.loads(out)
    assert doc["min_cap_even_bytes"] == _minimum(small_model)
    assert doc["check"]["differ"] == [] and doc["check"]["recorded"]


def test_inspect_check_exits_1_when_a_tensor_differs_from_its_digest(fresh_model, capsys):
    blob = bytearray(_weights(fresh_model).read_bytes())
    blob[-5] ^= 0xFF  # flip bits inside the last expert
    _weights(fresh_model).write_bytes(bytes(blob))
    code, out, _ = _run(capsys, "inspect", "--model", str(fresh_model), "--check", "--json")
    assert code == 1
    assert json.loads(out)["check"]["differ"] == ["layers.1.experts.3.w_down"]


def test_inspect_reports_the_expert_region_of_a_library_written_file(tmp_path, capsys):
    # safetensors 0.8.0 orders tensors by dtype, then name as text: experts interleave with dense tensors
    from safetensors.numpy import save_file

    from moerun.synth import random_tensors, synth_config, write_model

    config = synth_config(layers=2, experts=12, top_k=2)
    ours = write_model(tmp_path / "ours", config)
    theirs = tmp_path / "theirs"
    theirs.mkdir()
    for name in ("config.json", "tokenizer.json"):
        (theirs / name).write_bytes((ours / name).read_bytes())
    save_file(random_tensors(config), str(theirs / "model.safetensors"))
    for model, in_order in ((ours, True), (theirs, False)):
        code, out, err = _run(capsys, "inspect", "--model", str(model), "--json")
        assert code == 0, err
        doc = json.loads(out)
        experts = [t for t in doc["tensors"] if ".experts." in t["name"]]
        assert doc["experts_region"] == [min(t["offset"] for t in experts), max(t["offset"] + t["bytes"] for t in experts)]
        assert doc["experts_in_layer_order"] is in_order
        code, out, err = _run(capsys, "inspect", "--model", str(model))
        assert code == 0, err
        assert ("interleaved" in out) is not in_order
