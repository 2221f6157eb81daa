"""moerun.cli.main and its commands: broken inputs give one clear stderr line and exit 2, never a traceback.

Corrupt files are made by editing a synthetic model's header or config in the test.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import stat
import struct
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import ROOT, char_device, edit_config, edit_header, fifo, read_raw, tmpfs, write_raw

from moerun.cli import main as cli
from moerun.files.store import ModelStore
from moerun.files.trace import read_trace
from moerun.runtime.budget import minimum_cap
from moerun.sim.jobs import record


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

    from moerun.makers.synthetic import random_tensors, synth_config, write_model

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


# ---------------------------------------------------------------------------- every writer: one rule for its destination
# (moerun.files.fileio; the rules themselves are pinned in tests/test_fileio.py)

_TEXT = "stone river lamp the bright cold runs under over " * 20


def _writer(kind: str, model, tmp_path: Path, dest: Path, *extra) -> tuple:
    """argv of the command that writes ``dest``: each writer of moerun, with small fast inputs."""
    text = tmp_path / "in.txt"
    if not text.exists():
        text.write_text(_TEXT)
    if kind == "generate":
        return ("generate", "--model", str(model), "--prompt", "hi", "--max-new", "2", "--trace", str(dest), "--json", *extra)
    if kind == "record":
        return ("record", "--model", str(model), "--text", str(text), "--trace", str(dest), "--json", *extra)
    if kind == "probe":
        return ("probe", "--sizes", "64KiB", "--runs", "1", "--dir", str(tmp_path), "--save", str(dest), "--json", *extra)
    if kind == "replay":
        trace = tmp_path / "for-replay.npz"
        if not trace.exists():
            record(trace, model, text)  # the library: no notice on stderr for the test to read
        return ("replay", "--routing", str(trace), "--slots", "2", "--plot", str(dest), "--json", *extra)
    if kind == "quantize":
        return ("quantize", "--model", str(model), str(dest), "--no-score", "--method", "rtn", "--json", *extra)
    if kind == "synth":
        return ("synth", str(dest), "--layers", "1", "--experts", "2", "--d-model", "16", "--d-expert", "16", "--json", *extra)
    raise AssertionError(kind)


FILE_WRITERS = ["generate", "record", "probe", "replay"]
WRITERS = FILE_WRITERS + ["quantize", "synth"]


_NODES = {  # a destination that is not a regular file: how to make it, the message's word, how to see it is still one
    "character device": (lambda p: char_device(p), "character device", stat.S_ISCHR),
    "FIFO": (lambda p: fifo(p), "FIFO", stat.S_ISFIFO),
}


@pytest.mark.parametrize("node", sorted(_NODES))
@pytest.mark.parametrize("kind", WRITERS)
def test_every_writer_refuses_a_device_or_fifo_even_with_force_and_leaves_it_as_it_was(small_model, tmp_path, capsys, kind, node):
    make, phrase, still = _NODES[node]
    dest = make(tmp_path / "node")
    code, _, err = _run(capsys, *_writer(kind, small_model, tmp_path, dest, "--force"))  # a FIFO would block an open()
    _assert_one_clear_line(code, err, phrase)
    assert still(os.lstat(dest).st_mode)


@pytest.mark.parametrize("kind", WRITERS)
def test_every_writer_refuses_a_missing_parent_directory_and_creates_none(small_model, tmp_path, capsys, kind):
    dest = tmp_path / "typo" / "out"
    code, _, err = _run(capsys, *_writer(kind, small_model, tmp_path, dest))
    _assert_one_clear_line(code, err, "does not exist")
    assert not (tmp_path / "typo").exists()


@pytest.mark.parametrize("kind", WRITERS)
def test_every_writer_refuses_a_parent_that_is_a_file(small_model, tmp_path, capsys, kind):
    (tmp_path / "plain").write_text("x")
    code, _, err = _run(capsys, *_writer(kind, small_model, tmp_path, tmp_path / "plain" / "out"))
    _assert_one_clear_line(code, err, "not a directory")


@pytest.mark.parametrize("kind", FILE_WRITERS)
def test_every_file_writer_refuses_an_existing_file_without_force(small_model, tmp_path, capsys, kind):
    dest = tmp_path / "taken.out"
    dest.write_text("the user's")
    code, _, err = _run(capsys, *_writer(kind, small_model, tmp_path, dest))
    _assert_one_clear_line(code, err, "--force")
    assert dest.read_text() == "the user's"


@pytest.mark.parametrize("kind", ["generate", "record", "probe"])
def test_a_file_writer_replaces_an_existing_file_with_force(small_model, tmp_path, capsys, kind):
    dest = tmp_path / "taken.out"
    dest.write_text("old")
    code, _, err = _run(capsys, *_writer(kind, small_model, tmp_path, dest, "--force"))
    assert code == 0, err
    assert dest.read_bytes() != b"old"


@pytest.mark.parametrize("kind", ["record", "probe", "quantize", "synth"])
def test_every_writer_on_a_full_disk_gives_one_line_and_leaves_nothing(small_model, tmp_path, capsys, kind):
    with tmpfs(tmp_path / "small", "256k") as disk:
        fd = os.open(disk / "filler", os.O_WRONLY | os.O_CREAT)  # take every block there is
        with contextlib.suppress(OSError):
            while True:
                os.write(fd, b"\0" * 4096)
        os.close(fd)
        code, _, err = _run(capsys, *_writer(kind, small_model, tmp_path, disk / "out"))
        _assert_one_clear_line(code, err)
        assert sorted(p.name for p in disk.iterdir()) == ["filler"]


@pytest.mark.parametrize("kind", ["record", "probe", "quantize", "synth"])
def test_every_writer_on_a_read_only_file_system_gives_one_line(small_model, tmp_path, capsys, kind):
    with tmpfs(tmp_path / "ro", "64m", read_only=True) as disk:
        code, _, err = _run(capsys, *_writer(kind, small_model, tmp_path, disk / "out"))
        _assert_one_clear_line(code, err, "Read-only")


@pytest.mark.parametrize("kind", ["record", "probe"])
def test_a_file_writer_refuses_a_directory_destination(small_model, tmp_path, capsys, kind):
    (tmp_path / "d").mkdir()
    code, _, err = _run(capsys, *_writer(kind, small_model, tmp_path, tmp_path / "d"))
    _assert_one_clear_line(code, err, "directory")


def test_generate_trace_naming_the_models_own_weights_is_refused_even_with_force(fresh_model, capsys):
    weights = fresh_model / "model.safetensors"
    before = weights.read_bytes()
    code, _, err = _run(capsys, *_generate(fresh_model, "--trace", str(weights), "--force"))
    _assert_one_clear_line(code, err, "input of this run")
    assert weights.read_bytes() == before


def test_record_trace_naming_its_own_text_is_refused(small_model, tmp_path, capsys):
    text = tmp_path / "in.txt"
    text.write_text(_TEXT)
    code, _, err = _run(capsys, "record", "--model", str(small_model), "--text", str(text), "--trace", str(text), "--force")
    _assert_one_clear_line(code, err, "input of this run")
    assert text.read_text() == _TEXT


# ---------------------------------------------------------------------------- standard output closed or full


def _moerun_process(*argv, **kw):
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    return subprocess.run([sys.executable, "-m", "moerun", *argv], env=env, cwd=str(ROOT), timeout=120, **kw)


@pytest.mark.parametrize("argv", [("inspect",), ("generate", "--max-new", "2", "--prompt", "fog")], ids=["inspect", "generate"])
def test_stdout_that_is_full_gives_one_line_and_exit_2(argv):
    if not os.path.exists("/dev/full"):
        pytest.skip("no /dev/full here")
    with open("/dev/full", "w") as full:
        proc = _moerun_process(*argv, stdout=full, stderr=subprocess.PIPE, text=True)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr and "Exception ignored" not in proc.stderr
    assert proc.stderr.strip().splitlines()[-1].startswith("moerun") and "standard output" in proc.stderr
    assert len([line for line in proc.stderr.splitlines() if line.startswith("moerun")]) == 1


def test_stdout_that_is_closed_gives_one_line_and_exit_2():
    proc = _moerun_process("inspect", stdout=None, stderr=subprocess.PIPE, text=True,
                           preexec_fn=lambda: os.close(1))
    assert proc.returncode == 2
    assert proc.stderr.strip().splitlines() == ["moerun: standard output is closed; run with an open standard output (> /dev/null to discard it)"]


@pytest.mark.parametrize("argv", [("inspect", "--all"), ("generate", "--max-new", "200", "--prompt", "Field notes")])
def test_stdout_whose_reader_went_away_ends_quietly_with_the_status_of_a_broken_pipe(argv):
    # issue 23, item 20: `moerun generate | head -3`: the tools of a pipeline end quietly when their reader
    # leaves, with the status of SIGPIPE's default action (the shells report 128 + 13 = 141; common practice, no source)
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    proc = subprocess.Popen([sys.executable, "-m", "moerun", *argv], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            env=env, cwd=str(ROOT))
    proc.stdout.close()  # the reader leaves before the first byte
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=120) == 141
    assert err.strip() == ""


# ---------------------------------------------------------------------------- text that is not UTF-8


@pytest.mark.parametrize("argv", [
    (b"generate", b"--max-new", b"1", b"--prompt", b"caf\xe9"),
    (b"synth", b"/tmp/never-made", b"--layers", b"1", b"--experts", b"2", b"--d-model", b"16", b"--d-expert", b"16", b"--name", b"\xff"),
], ids=["generate --prompt", "synth --name"])
def test_an_argument_that_is_not_utf8_gives_one_line_and_exit_2(argv):
    env = {**os.environb, b"PYTHONPATH": os.fsencode(ROOT)}
    proc = subprocess.run([os.fsencode(sys.executable), b"-m", b"moerun", *argv], capture_output=True, env=env, cwd=str(ROOT), timeout=120)
    err = proc.stderr.decode("utf-8", "replace")
    assert proc.returncode == 2 and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1 and "not valid UTF-8" in err
    assert proc.stdout == b""


def test_synth_into_a_directory_whose_name_is_not_utf8_is_refused_before_writing(tmp_path):
    env = {**os.environb, b"PYTHONPATH": os.fsencode(ROOT)}
    out = os.fsencode(tmp_path) + b"/m\xff"
    proc = subprocess.run([os.fsencode(sys.executable), b"-m", b"moerun", b"synth", out, b"--layers", b"1", b"--experts", b"2",
                           b"--d-model", b"16", b"--d-expert", b"16"], capture_output=True, env=env, timeout=120)
    assert proc.returncode == 2 and b"Traceback" not in proc.stderr and b"not valid UTF-8" in proc.stderr
    assert os.listdir(tmp_path) == []


# ---------------------------------------------------------------------------- contradictory or meaningless options: one rule


@pytest.mark.parametrize(("extra", "phrase"), [
    (("--mem-cap", "1GiB", "--slots", "3,3,3", "--shared-pool"), "contradict"),
    (("--prefetch", "0", "--lookahead", "2"), "--lookahead has no effect without --prefetch"),
    (("--prefetch", "0", "--prefetch-from", "output"), "--prefetch-from has no effect without --prefetch"),
    (("--prefetch", "9"), "more than the model's 8 experts"),
    (("--prefetch", "2", "--lookahead", "3"), "past the last layer"),
    (("--prefetch", "auto", "--lookahead", "3"), "past the last layer"),
])
def test_contradictory_memory_options_are_refused_with_one_line(small_model, capsys, extra, phrase):
    for command in ("generate", "score"):
        argv = _generate(small_model, *extra) if command == "generate" else ("score", "--model", str(small_model), *extra)
        code, out, err = _run(capsys, *argv)
        _assert_one_clear_line(code, err, phrase)
        assert out == ""


def test_verify_refuses_the_same_contradictions(small_model, capsys):
    code, _, err = _run(capsys, "verify", "--model", str(small_model), "--mem-cap", "1GiB", "--lookahead", "2")
    _assert_one_clear_line(code, err, "--lookahead has no effect")


@pytest.mark.parametrize(("extra", "phrase"), [
    (("--regime", "cold", "--link-speed", "1GB/s"), "--regime has no effect without --probe"),
    (("--max-tokens", "100", "--routing", "t.npz", "--link-speed", "1GB/s"), "contradict"),
    (("--link-speed", "1GB/s", "--probe", "p.json"), "contradict"),
    (("--link-speed", "1GB/s", "--evict", ","), "--evict is empty"),
])
def test_plan_refuses_meaningless_options_with_one_line(small_model, capsys, extra, phrase):
    code, _, err = _run(capsys, "plan", "--model", str(small_model), "--mem-cap", "1GiB", *extra)
    _assert_one_clear_line(code, err, phrase)


def test_quantize_refuses_max_tokens_with_no_score(small_model, tmp_path, capsys):
    code, _, err = _run(capsys, "quantize", "--model", str(small_model), str(tmp_path / "q"), "--no-score", "--max-tokens", "5")
    _assert_one_clear_line(code, err, "contradict")
    assert not (tmp_path / "q").exists()


@pytest.mark.parametrize("command", ["score", "record", "plan", "quantize"])
def test_every_command_that_reads_part_of_a_text_calls_the_option_max_tokens(command):
    parser = cli.build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices[command]
    flags = {f for a in sub._actions for f in a.option_strings}
    assert "--max-tokens" in flags
    assert not flags & {"--tokens", "--score-tokens"}


# ---------------------------------------------------------------------------- generate: text on stdout, the summary on stderr


def test_generate_writes_the_text_alone_on_stdout_and_the_summary_on_stderr(small_model, capsys):
    code, out, err = _run(capsys, *_generate(small_model, "--max-new", "5", "--mem-cap", str(_minimum(small_model))))
    assert code == 0, err
    assert out.startswith("hi") and out.endswith("\n") and out.count("\n") == 1 + out.rstrip("\n").count("\n")
    assert "tok/s" not in out and "peak resident-set growth" not in out and "random weights" not in out
    assert "tok/s" in err and "peak resident-set growth" in err


def test_generate_quiet_prints_no_summary(small_model, capsys):
    code, out, err = _run(capsys, *_generate(small_model, "--quiet"))
    assert code == 0 and out.startswith("hi") and err == ""


def test_a_prompt_longer_than_the_context_is_refused_before_it_is_echoed(synth_models, capsys):
    model = synth_models(layers=2, experts=4, top_k=2, max_seq_len=16)
    code, out, err = _run(capsys, "generate", "--model", str(model), "--prompt", "x" * 40, "--max-new", "2")
    _assert_one_clear_line(code, err, "exceed the model's context")
    assert out == ""


def test_a_run_without_decode_steps_prints_no_speed_of_zero(small_model, capsys):
    code, out, err = _run(capsys, *_generate(small_model, "--max-new", "1"))
    assert code == 0
    assert "decode 0 tok/s" not in err and "no decode step" in err
    code, out, err = _run(capsys, *_generate(small_model, "--max-new", "1", "--json"))
    assert json.loads(out)["decode_tok_s"] is None


def test_cold_start_is_marked_in_the_summary(small_model, capsys):
    code, out, err = _run(capsys, *_generate(small_model, "--cold"))
    assert code == 0 and "cold start" in err


def test_a_very_small_temperature_samples_the_largest_logit_instead_of_failing(small_model, capsys):
    code, out, err = _run(capsys, *_generate(small_model, "--temperature", "5e-324", "--json"))
    assert code == 0, err
    greedy_code, greedy_out, _ = _run(capsys, *_generate(small_model, "--temperature", "0", "--json"))
    assert json.loads(out)["text"] == json.loads(greedy_out)["text"]


# ---------------------------------------------------------------------------- help texts and messages


def test_evict_help_names_every_online_policy():
    from moerun import policies

    sub = next(a for a in cli.build_parser()._actions if isinstance(a, argparse._SubParsersAction)).choices["generate"]
    help_text = " ".join(sub.format_help().split())  # the list is made when the help is printed
    help_text = help_text[help_text.index("--evict POLICY"):]
    for name in policies.names(online_only=True):
        assert name in help_text


def test_synth_help_does_not_promise_a_quantize_command_arriving_later(capsys):
    code, out, _ = _run(capsys, "synth", "--help")
    assert code == 0 and "arriving later" not in out and "moerun quantize" in " ".join(out.split())


def test_a_bad_rate_gets_a_hint_about_rates_not_sizes(small_model, capsys):
    code, _, err = _run(capsys, *_generate(small_model, "--link-speed", "fast"))
    _assert_one_clear_line(code, err, "GB/s")


def test_a_cap_just_below_the_minimum_names_both_to_the_byte(small_model, capsys):
    lo = _minimum(small_model)
    code, _, err = _run(capsys, *_generate(small_model, "--mem-cap", str(lo - 1)))
    _assert_one_clear_line(code, err)
    assert f"{lo - 1} bytes" in err and f"{lo} bytes" in err


# ---------------------------------------------------------------------------- the cap bounds generate on every storage format


@pytest.fixture(scope="module")
def big_embedding(tmp_path_factory):
    """F16 and F32 models whose embedding dwarfs the pool at the smallest cap: loading them is the peak."""
    root = tmp_path_factory.mktemp("embed")
    out = {}
    for bits in (16, 32):
        d = root / f"e{bits}"
        argv = ["synth", str(d), "--layers", "2", "--experts", "4", "--d-model", "256", "--d-expert", "64",
                "--vocab", "50000", "--context", "32", "--bits", str(bits), "--json"]
        assert cli.main(argv) == 0
        out[bits] = d
    return out


@pytest.mark.parametrize("bits", [16, 32])
@pytest.mark.parametrize("max_new", [0, 8])
def test_generate_stays_within_the_cap_when_loading_the_dense_weights_is_the_peak(big_embedding, capsys, bits, max_new):
    from moerun.cli.summary import CAP_ALLOWANCE_BYTES

    model = big_embedding[bits]
    capsys.readouterr()
    lo = _minimum(model)
    code, out, err = _run(capsys, "generate", "--model", str(model), "--mem-cap", str(lo), "--max-new", str(max_new),
                          "--prompt", "hi", "--json")
    assert code == 0, err
    doc = json.loads(out)
    assert doc["peak_rss_growth_bytes"] <= lo + CAP_ALLOWANCE_BYTES, (doc["peak_rss_growth_bytes"] - lo) / 2**20
    assert doc["cap_exceeded"] is False
