"""moerun synth and the streaming writer in moerun.makers.synthetic: layout, atomicity, disk check, bounded memory."""

from __future__ import annotations

import collections
import json
import shutil
import tracemalloc
from pathlib import Path

import numpy as np
import pytest

from moerun.cli import main as cli
from moerun.files.modelfile import digest, read_header, recorded_digests, save_model_file
from moerun.files.store import ModelStore
from moerun.makers import synthetic as synth_mod
from moerun.makers.synthetic import (
    RANDOM_NOTE,
    random_tensors,
    synth_config,
    tensor_chunks,
    tensor_layout,
    weights_file_bytes,
    write_tensors_streaming,
)

SMALL = ["--layers", "2", "--experts", "4", "--d-model", "64", "--d-expert", "128", "--context", "32"]


def run_cli(argv, capsys) -> tuple[int, str, str]:
    """Exit code, stdout and stderr of ``moerun ARGV`` in this process (usage errors, --seed's too, end in SystemExit)."""
    try:
        code = cli.main(argv)
    except SystemExit as e:
        code = e.code
    out, err = capsys.readouterr()
    return code, out, err


def leftovers(d: Path) -> list[str]:
    return sorted(p.name for p in d.iterdir())


def test_synth_model_opens_with_inspect_and_generates_under_its_smallest_cap(tmp_path, capsys):
    out = tmp_path / "m"
    code, text, _ = run_cli(["synth", str(out), *SMALL], capsys)
    assert code == 0
    assert RANDOM_NOTE in text
    assert sorted(p.name for p in out.iterdir()) == ["CARD.md", "config.json", "model.safetensors", "tokenizer.json"]

    code, text, _ = run_cli(["inspect", "--model", str(out), "--json"], capsys)
    assert code == 0
    info = json.loads(text)
    assert info["synthetic"] is True and "meaningless" in info["note"]
    cap = info["min_cap_even_bytes"]

    # The streamed digests must be the ones moerun.files.modelfile.digest gives for each tensor.
    code, text, _ = run_cli(["inspect", "--model", str(out), "--check"], capsys)
    assert code == 0, text
    assert "match their recorded digests" in text

    code, text, _ = run_cli(["generate", "--model", str(out), "--max-new", "4", "--mem-cap", str(cap), "--json"], capsys)
    assert code == 0
    gen = json.loads(text)
    assert gen["new_tokens"] == 4


def test_synth_f16_writes_every_tensor_as_f16_and_runs(tmp_path, capsys):
    out = tmp_path / "h"
    code, _, _ = run_cli(["synth", str(out), *SMALL, "--bits", "16", "--untied"], capsys)
    assert code == 0
    header = read_header(out / "model.safetensors")
    assert {t.dtype for t in header.tensors.values()} == {"F16"}
    assert "lm_head" in header.tensors
    store = ModelStore.open(out)
    try:
        assert store.codec.name == "F16"
        # 3 matrices of 64 x 128 at 2 bytes each
        assert store.expert_nbytes == 3 * 64 * 128 * 2
    finally:
        store.close()
    code, _, _ = run_cli(["generate", "--model", str(out), "--max-new", "3", "--json"], capsys)
    assert code == 0


def test_streaming_writer_gives_the_bytes_save_model_file_gives(tmp_path):
    config = synth_config(layers=2, experts=3, d_model=16, d_expert=24, head_dim=8)
    tensors = random_tensors(config, seed=3)
    meta = {"note": RANDOM_NOTE}
    save_model_file(tmp_path / "whole.safetensors", tensors, meta)
    layout = tensor_layout(config, "F32")
    assert sorted(n for n, _, _ in layout) == sorted(tensors)

    def in_pieces(name):  # several chunks per tensor, split by rows
        a = tensors[name]
        return np.array_split(a, 3) if a.ndim > 1 else [a]

    size = write_tensors_streaming(tmp_path / "streamed.safetensors", layout, in_pieces, meta)
    whole = (tmp_path / "whole.safetensors").read_bytes()
    assert (tmp_path / "streamed.safetensors").read_bytes() == whole
    assert size == len(whole) == weights_file_bytes(layout, meta)


def test_streamed_digests_equal_modelfile_digest_of_each_tensor(tmp_path):
    config = synth_config(layers=1, experts=2, d_model=16, d_expert=8, head_dim=8)
    layout = tensor_layout(config, "F32")
    shapes = {n: s for n, _, s in layout}
    path = tmp_path / "w.safetensors"
    write_tensors_streaming(path, layout, lambda n: tensor_chunks(n, shapes[n], "F32", 0, 16, chunk_bytes=64))
    header = read_header(path)
    want = recorded_digests(header)
    raw = path.read_bytes()
    for name, t in header.tensors.items():
        assert want[name] == digest(raw[t.start : t.end])


def test_layout_puts_dense_first_then_experts_by_layer_expert_part(tmp_path):
    config = synth_config(layers=2, experts=11, d_model=16, d_expert=8, head_dim=8)
    names = [n for n, _, _ in tensor_layout(config)]
    first_expert = next(i for i, n in enumerate(names) if ".experts." in n)
    assert all(".experts." not in n for n in names[:first_expert])
    experts = names[first_expert:]
    # natural order: expert 2 before expert 10 (a plain text sort would put 10 first)
    assert experts.index("layers.0.experts.2.w_gate") < experts.index("layers.0.experts.10.w_gate")
    assert experts[:3] == ["layers.0.experts.0.w_gate", "layers.0.experts.0.w_up", "layers.0.experts.0.w_down"]
    assert experts[-1] == "layers.1.experts.10.w_down"


def test_same_seed_same_file_other_seed_other_weights(tmp_path, capsys):
    for name, seed in (("a", "5"), ("b", "5"), ("c", "6")):
        assert run_cli(["synth", str(tmp_path / name), *SMALL, "--seed", seed, "--name", "x"], capsys)[0] == 0
    a = (tmp_path / "a" / "model.safetensors").read_bytes()
    assert a == (tmp_path / "b" / "model.safetensors").read_bytes()
    assert a != (tmp_path / "c" / "model.safetensors").read_bytes()


def test_synth_refuses_when_the_disk_is_too_small_and_leaves_nothing(tmp_path, capsys, monkeypatch):
    Usage = collections.namedtuple("Usage", "total used free")
    monkeypatch.setattr(shutil, "disk_usage", lambda path: Usage(10**6, 10**6 - 1000, 1000))
    out = tmp_path / "m"  # (a missing parent is refused before the disk is looked at)
    code, text, err = run_cli(["synth", str(out), *SMALL], capsys)
    assert code == 2
    assert "free" in err and "nothing was written" in err
    assert text == ""
    assert not out.exists()
    assert leftovers(tmp_path) == []


def test_interrupted_synth_leaves_no_model_directory(tmp_path, capsys, monkeypatch):
    real = synth_mod.tensor_chunks
    calls = {"n": 0}

    def interrupt_midway(*a, **k):
        calls["n"] += 1
        if calls["n"] > 5:
            raise KeyboardInterrupt
        return real(*a, **k)

    monkeypatch.setattr(synth_mod, "tensor_chunks", interrupt_midway)
    out = tmp_path / "m"
    code, _, err = run_cli(["synth", str(out), *SMALL], capsys)
    assert code == 130
    assert "interrupted" in err
    assert not out.exists()
    assert leftovers(tmp_path) == []


def test_failed_synth_removes_the_directories_it_created(tmp_path, monkeypatch):
    def boom(*a, **k):
        raise RuntimeError("injected")

    monkeypatch.setattr(synth_mod, "tensor_chunks", boom)
    config = synth_config()
    with pytest.raises(RuntimeError, match="injected"):
        synth_mod.synthesize(tmp_path / "m", config)  # parents are never created (test_fileio); the temporary is
    assert leftovers(tmp_path) == []


def test_synth_refuses_a_non_empty_directory_and_accepts_an_empty_one(tmp_path, capsys):
    busy = tmp_path / "busy"
    busy.mkdir()
    (busy / "keep.txt").write_text("mine")
    code, _, err = run_cli(["synth", str(busy), *SMALL], capsys)
    assert code == 2 and "not an empty directory" in err
    assert leftovers(busy) == ["keep.txt"]

    empty = tmp_path / "empty"
    empty.mkdir()
    assert run_cli(["synth", str(empty), *SMALL], capsys)[0] == 0
    assert (empty / "model.safetensors").is_file()


@pytest.mark.parametrize(
    "extra, message",
    [
        (["--top-k", "5"], "--top-k"),
        (["--vocab", "100"], "--vocab"),
        (["--heads", "3"], "not a multiple"),
        (["--heads", "4", "--kv-heads", "3"], "--kv-heads"),
        (["--seed", "-1"], "--seed"),
        (["--d-shared", "-4"], "--d-shared"),
    ],
)
def test_synth_rejects_impossible_shapes_with_exit_2(tmp_path, capsys, extra, message):
    out = tmp_path / "m"
    code, _, err = run_cli(["synth", str(out), *SMALL, *extra], capsys)
    assert code == 2
    assert message in err
    assert not out.exists()


def test_synth_json_is_one_document_that_says_routing_is_meaningless(tmp_path, capsys):
    code, text, _ = run_cli(["synth", str(tmp_path / "m"), *SMALL, "--json"], capsys)
    assert code == 0
    doc = json.loads(text)
    assert doc["note"] == RANDOM_NOTE
    assert doc["file_bytes"] == (tmp_path / "m" / "model.safetensors").stat().st_size
    assert doc["expert_bytes"] == 3 * 64 * 128 * 4
    config = json.loads((tmp_path / "m" / "config.json").read_text())
    assert config["synthetic"] is True and config["note"] == RANDOM_NOTE
    assert RANDOM_NOTE in (tmp_path / "m" / "CARD.md").read_text()


def test_streaming_memory_stays_near_one_chunk_not_the_model_size(tmp_path, monkeypatch):
    monkeypatch.setattr(synth_mod, "CHUNK_BYTES", 1 << 20)
    config = synth_config(layers=2, experts=8, d_model=256, d_expert=1024, n_heads=4, head_dim=64)
    tracemalloc.start()
    try:
        doc = synth_mod.synthesize(tmp_path / "m", config)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert doc["file_bytes"] > 48 * 2**20  # 16 experts of 3 MiB, plus dense tensors
    assert peak < 8 * 2**20


def test_synth_config_defaults_are_unchanged_for_existing_callers():
    c = synth_config()
    assert (c.n_layers, c.n_experts, c.d_model, c.d_expert, c.vocab_size) == (2, 4, 32, 64, 257)
    assert c.dtype == "F32" and c.tied_embeddings is True
    assert "seed" not in c.extra and c.extra["synthetic"] is True


def test_synth_writes_a_shared_expert_and_raw_weights_that_inspect_and_generate_use(tmp_path, capsys):
    out = tmp_path / "s"
    code, text, _ = run_cli(["synth", str(out), *SMALL, "--experts", "32", "--top-k", "4", "--d-expert", "32",
                             "--d-shared", "96", "--no-renorm"], capsys)
    assert code == 0 and "d_shared 96" in text
    config = json.loads((out / "config.json").read_text())
    assert config["d_shared"] == 96 and config["norm_topk"] is False
    header = read_header(out / "model.safetensors")
    assert header.tensors["layers.1.shared.w_down"].shape == (96, 64)
    code, text, _ = run_cli(["inspect", "--model", str(out), "--json"], capsys)
    info = json.loads(text)
    assert info["d_shared"] == 96 and info["norm_topk"] is False
    assert info["shared_expert_file_bytes"] == 2 * 3 * 64 * 96 * 4  # 2 layers of three F32 matrices, in the dense part
    assert info["dense_file_bytes"] >= info["shared_expert_file_bytes"]
    code, text, _ = run_cli(["generate", "--model", str(out), "--max-new", "3", "--shared-pool", "--mem-cap", str(info["min_cap_shared_bytes"]),
                             "--json"], capsys)
    assert code == 0 and json.loads(text)["new_tokens"] == 3


@pytest.mark.parametrize("shape", [[], ["--d-shared", "40", "--no-renorm", "--top-k", "3"]])
def test_card_records_a_command_that_rebuilds_the_same_weights(tmp_path, capsys, shape):
    import shlex

    first = tmp_path / "first"
    assert run_cli(["synth", str(first), *SMALL, "--bits", "16", "--seed", "9", "--heads", "2", *shape], capsys)[0] == 0
    card = (first / "CARD.md").read_text()
    line = next(x for x in card.splitlines() if x.startswith("Command: `"))
    argv = shlex.split(line[len("Command: `") : -1])
    assert argv[:3] == ["moerun", "synth", str(first)]
    again = tmp_path / "again"
    assert run_cli(["synth", str(again), *argv[3:]], capsys)[0] == 0
    assert (again / "model.safetensors").read_bytes() == (first / "model.safetensors").read_bytes()


# ---------------------------------------------------------------------------- OUT: never destroy, never two at once, no stale temporaries


def test_two_synth_runs_to_one_out_keep_the_first_to_finish_and_fail_the_other(tmp_path, capsys, monkeypatch):
    out = tmp_path / "m"
    real = synth_mod.tensor_chunks
    state = {"inner": None}

    def a_second_run_finishes_first(*a, **k):
        if state["inner"] is None:
            state["inner"] = "running"
            state["inner"] = run_cli(["synth", str(out), *SMALL, "--seed", "7", "--json"], capsys)[0]
        return real(*a, **k)

    monkeypatch.setattr(synth_mod, "tensor_chunks", a_second_run_finishes_first)
    code, _, err = run_cli(["synth", str(out), *SMALL, "--seed", "1"], capsys)
    assert state["inner"] == 0
    assert code == 2 and "appeared" in err and len(err.strip().splitlines()) == 1
    assert json.loads((out / "config.json").read_text())["seed"] == 7  # the finished model, whole and untouched
    assert leftovers(tmp_path) == ["m"]


def test_a_killed_synths_temporary_directory_is_removed_by_the_next_run(tmp_path, capsys):
    import subprocess
    import sys

    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    stale = tmp_path / f".moerun-tmp-{dead.pid}-m-killed"  # what a SIGKILLed synth leaves (its name says whose)
    stale.mkdir()
    (stale / "model.safetensors").write_bytes(b"\0" * (1 << 20))
    code, _, err = run_cli(["synth", str(tmp_path / "m"), *SMALL], capsys)
    assert code == 0, err
    assert leftovers(tmp_path) == ["m"]


def test_synth_force_replaces_a_model_directory_but_never_one_holding_other_files(tmp_path, capsys):
    out = tmp_path / "m"
    assert run_cli(["synth", str(out), *SMALL, "--seed", "1"], capsys)[0] == 0
    code, _, err = run_cli(["synth", str(out), *SMALL, "--seed", "2"], capsys)
    assert code == 2 and "--force" in err
    assert run_cli(["synth", str(out), *SMALL, "--seed", "2", "--force"], capsys)[0] == 0
    assert json.loads((out / "config.json").read_text())["seed"] == 2
    (out / "my-notes.txt").write_text("mine")
    code, _, err = run_cli(["synth", str(out), *SMALL, "--force"], capsys)
    assert code == 2 and "my-notes.txt" in err
    assert (out / "my-notes.txt").read_text() == "mine"


def test_a_disk_too_small_for_synth_is_an_output_error_not_a_bad_option(tmp_path, monkeypatch):
    from moerun.errors import BadOption, OutputError

    Usage = collections.namedtuple("Usage", "total used free")
    monkeypatch.setattr(shutil, "disk_usage", lambda path: Usage(10**6, 10**6 - 1000, 1000))
    with pytest.raises(OutputError) as e:
        synth_mod.synthesize(tmp_path / "m", synth_config())
    assert not isinstance(e.value, BadOption)
