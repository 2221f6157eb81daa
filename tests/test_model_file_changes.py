"""The model file changed while a run uses it (issue 23, item 10).

A run reads experts from the model file all along (and, with prefetch, so does the reader process, through a
descriptor of the same open file).  Rewriting that file in place -- same size, expert bytes zeroed, even with
the modification time put back by ``os.utime`` -- would give other numbers and exit 0, silently.  The store
(``moerun.files.store.ModelStore.check_unchanged``) compares the open file's identity, size, modification
and change time with those at opening, after every read and after every forward pass: such a run stops with
``ModelFileChanged``, one line and exit 2.  ``os.utime`` cannot put the change time back (POSIX: utimensat
marks the last file status change time for update), so a same-size rewrite is seen.  A new file renamed over
the path is another inode: the open descriptor keeps the old file, and the run is unaffected.
"""

from __future__ import annotations

import json
import os
import time

import pytest
from conftest import copy_model

import moerun
from moerun.cli import main as cli
from moerun.errors import ModelFileChanged, PageInError
from moerun.model.sampling import Sampling
from moerun.runtime.budget import minimum_cap

PROMPT = "fog nets at dawn"
PROMPT_IDS = [0, 12, 40, 7, 99, 150, 3, 61]
MAX_NEW = 16
CHANGE_AT_STEP = 3


@pytest.fixture(scope="module")
def model(synth_models):
    return synth_models(layers=3, experts=8, top_k=2)


@pytest.fixture(scope="module")
def cap(model) -> int:
    with moerun.load(model, tokenizer=False) as eng:
        s = eng.store
        return minimum_cap(s.config, s.dense_nbytes, s.expert_nbytes, "even", s.codec.scratch_bytes())


def zero_experts_in_place(store) -> None:
    """Write zeros over every expert's bytes of the store's file, through the same inode, keeping its size
    and putting its access and modification times back as they were."""
    path = store.path
    before = os.stat(path)
    # a coarse file-system clock ticks every few milliseconds: let the change time move for sure
    time.sleep(0.02)
    with open(path, "r+b") as f:
        for row in store.ranges:
            for r in row:
                f.seek(r.start)
                f.write(bytes(r.nbytes))
    os.utime(path, ns=(before.st_atime_ns, before.st_mtime_ns))
    after = os.stat(path)
    assert (after.st_ino, after.st_size, after.st_mtime_ns) == (before.st_ino, before.st_size, before.st_mtime_ns)


def rename_a_zeroed_copy_over(store) -> None:
    """Replace the file the way atomic writers do: a new file (here with zeroed experts) renamed over the path."""
    path = store.path
    new = path.with_name("model.safetensors.new")
    blob = bytearray(path.read_bytes())
    for row in store.ranges:
        for r in row:
            blob[r.start : r.start + r.nbytes] = bytes(r.nbytes)
    new.write_bytes(bytes(blob))
    os.replace(new, path)


def read_it_whole(store) -> None:
    """Reading the file (from another descriptor) changes nothing in it."""
    with open(store.path, "rb") as f:
        while f.read(1 << 20):
            pass


def at_step(eng, change, step: int = CHANGE_AT_STEP):
    """Apply ``change(store)`` once, at the first expert read (or hand-over to the reader) of decode step ``step``."""
    done = [False]

    def hook(layer, expert, guess):
        if not done[0] and eng.experts.step >= step:
            done[0] = True
            change(eng.store)

    eng.store.fault_hook = hook
    return done


def _generate(eng):
    return eng.generate(prompt_ids=PROMPT_IDS, max_new=MAX_NEW, sampling=Sampling(0.8, 0.95, 3))


@pytest.mark.parametrize("prefetch", [0, 2])
def test_model_file_rewritten_in_place_during_a_run_stops_it_with_model_file_changed(model, cap, tmp_path, prefetch):
    d = copy_model(model, tmp_path / "m")
    with moerun.load(d, tokenizer=False, mem_cap=cap, prefetch=prefetch) as eng:
        done = at_step(eng, zero_experts_in_place)
        with pytest.raises(ModelFileChanged) as err:
            _generate(eng)
    assert done[0]
    msg = str(err.value)
    assert isinstance(err.value, PageInError)  # the family of a failed read: exit 2
    assert "\n" not in msg and str(d / "model.safetensors") in msg
    assert "changed while this run was using it" in msg and "rewritten in place" in msg


def test_a_change_before_the_next_pass_is_caught_even_with_every_expert_resident(model, tmp_path):
    # nothing is read during decode here, so only the check after each forward pass sees it
    d = copy_model(model, tmp_path / "m")
    with moerun.load(d, tokenizer=False) as eng:
        eng.generate(prompt_ids=PROMPT_IDS, max_new=2)
        zero_experts_in_place(eng.store)
        with pytest.raises(ModelFileChanged):
            eng.generate(prompt_ids=PROMPT_IDS, max_new=2)


def test_a_model_file_that_grew_names_both_sizes(model, cap, tmp_path):
    d = copy_model(model, tmp_path / "m")
    with moerun.load(d, tokenizer=False, mem_cap=cap) as eng:
        size = os.path.getsize(eng.store.path)
        with open(eng.store.path, "ab") as f:
            f.write(b"\0" * 100)
        with pytest.raises(ModelFileChanged, match=f"{size:,} bytes when opened, {size + 100:,} now"):
            _generate(eng)


@pytest.mark.parametrize(("change", "prefetch"), [(rename_a_zeroed_copy_over, 0), (rename_a_zeroed_copy_over, 2),
                                                  (read_it_whole, 0), (None, 0), (None, 2)])
def test_a_file_renamed_over_the_path_or_left_unchanged_never_stops_the_run(model, cap, tmp_path, change, prefetch):
    with moerun.load(model, tokenizer=False, mem_cap=cap, prefetch=prefetch) as eng:
        want = _generate(eng).new_ids
    d = copy_model(model, tmp_path / "m")
    with moerun.load(d, tokenizer=False, mem_cap=cap, prefetch=prefetch) as eng:
        done = at_step(eng, change) if change is not None else [True]
        got = _generate(eng).new_ids
    assert done[0] and got == want


# ---------------------------------------------------------------------------- through `moerun generate`


def _cli_generate(monkeypatch, model_dir, cap, change, extra=()):
    """`moerun generate --json` in this process, with ``change`` applied at decode step CHANGE_AT_STEP."""
    import moerun.cli.commands.generate as generate_cmd

    real_load = generate_cmd.load

    def load(**kw):
        eng = real_load(**kw)
        if change is not None:
            at_step(eng, change)
        return eng

    monkeypatch.setattr(generate_cmd, "load", load)
    argv = ["generate", "--model", str(model_dir), "--prompt", PROMPT, "--max-new", str(MAX_NEW), "--seed", "3",
            "--mem-cap", str(cap), *extra]
    try:
        return cli.main(argv)
    except SystemExit as e:
        return e.code


@pytest.mark.parametrize("extra", [("--json",), ("--json", "--prefetch", "2"), ()])
def test_generate_with_the_model_file_rewritten_in_place_exits_2_with_one_line(model, cap, tmp_path, monkeypatch,
                                                                              capsys, extra):
    d = copy_model(model, tmp_path / "m")
    code = _cli_generate(monkeypatch, d, cap, zero_experts_in_place, extra)
    out, err = capsys.readouterr()
    assert code == 2
    if "--json" in extra:
        assert out == ""  # no document computed from a changed file
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("moerun generate: ") and "model file changed while this run was using it" in lines[0]
    assert "Traceback" not in err


@pytest.mark.parametrize("change", [rename_a_zeroed_copy_over, None])
def test_generate_with_the_model_file_renamed_over_or_unchanged_exits_0_with_the_same_text(model, cap, tmp_path,
                                                                                         monkeypatch, capsys, change):
    assert _cli_generate(monkeypatch, model, cap, None, ("--json",)) == 0
    want = json.loads(capsys.readouterr().out)["text"]
    d = copy_model(model, tmp_path / "m")
    code = _cli_generate(monkeypatch, d, cap, change, ("--json",))
    out, err = capsys.readouterr()
    assert code == 0, err
    assert json.loads(out)["text"] == want and "changed" not in err
