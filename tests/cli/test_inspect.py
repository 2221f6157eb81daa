"""moerun inspect reads every file of the model directory the way the other commands read it."""

from __future__ import annotations

import json
import shutil

import pytest

from moerun.cli import main as cli


def _inspect(capsys, *argv) -> tuple[int, str, str]:
    code = cli.main(["inspect", *argv])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture
def model_copy(small_model, tmp_path):
    d = tmp_path / "m"
    shutil.copytree(small_model, d)
    return d


@pytest.mark.parametrize("check", [[], ["--check"]], ids=["inspect", "inspect --check"])
@pytest.mark.parametrize(("name", "content", "phrase"), [
    ("tokenizer.json", b'{"version": "1.0", "model": ', "tokenizer"),
    ("tokenizer.json", b"\xff\xfe not utf-8", "UTF-8"),
    ("heldout.txt", b"caf\xe9 latin-1", "UTF-8"),
    ("CARD.md", b"\xff", "UTF-8"),
    ("reference.npz", b"PK\x03\x04 not a zip at all", "reference.npz"),
])
def test_a_damaged_file_beside_the_weights_fails_inspect_as_it_fails_the_commands(model_copy, capsys, check, name, content, phrase):
    (model_copy / name).write_bytes(content)
    code, out, err = _inspect(capsys, "--model", str(model_copy), *check)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and phrase in err and name in err


def test_a_garbage_tokenizer_that_generate_refuses_is_refused_by_inspect_too(model_copy, capsys):
    (model_copy / "tokenizer.json").write_text('{"version": "1.0", "model": ')
    assert cli.main(["generate", "--model", str(model_copy), "--prompt", "hi", "--max-new", "1"]) == 2
    capsys.readouterr()
    assert _inspect(capsys, "--model", str(model_copy))[0] == 2


def test_inspect_reports_every_file_of_the_directory(model_copy, capsys):
    (model_copy / "heldout.txt").write_text("some held-out text")
    (model_copy / "notes.md").write_text("mine")
    code, out, err = _inspect(capsys, "--model", str(model_copy), "--json")
    assert code == 0, err
    files = json.loads(out)["files"]
    assert set(files) == {p.name for p in model_copy.iterdir()}
    assert files["notes.md"] == "not read by moerun" and files["tokenizer.json"].startswith("valid")


def test_a_fifo_beside_the_weights_is_refused_without_blocking(model_copy, capsys):
    from conftest import fifo

    (model_copy / "heldout.txt").unlink(missing_ok=True)
    fifo(model_copy / "heldout.txt")
    code, _, err = _inspect(capsys, "--model", str(model_copy))
    assert code == 2 and "FIFO" in err
