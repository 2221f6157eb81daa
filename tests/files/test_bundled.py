"""moerun.files.bundled: the bundled models by short name, in every command and in load()."""

from __future__ import annotations

import json
import os
import re

import pytest

import moerun
from moerun.cli import main as cli
from moerun.files.bundled import bundled_models, resolve_model


def test_the_bundled_models_are_found_by_their_short_names():
    models = bundled_models()
    assert {"pebble", "scree"} <= set(models)
    for name, d in models.items():
        assert (d / "config.json").is_file() and d.name == name


def test_a_short_name_works_from_any_directory_in_every_command_and_in_load(tmp_path, monkeypatch, capsys):
    # issue 23, item 16: after a normal install `--model tiny_models/scree` only works inside the clone
    monkeypatch.chdir(tmp_path)
    assert cli.main(["inspect", "--model", "scree", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["config"]["n_experts"] == 32
    with moerun.load("scree", tokenizer=False) as eng:
        assert eng.config.n_experts == 32


def test_a_directory_of_that_name_here_wins_over_the_bundled_model(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "scree").mkdir()
    assert resolve_model("scree") == tmp_path.joinpath("scree").relative_to(tmp_path)


def test_every_command_lists_the_bundled_models_in_its_help(capsys):
    for command in cli.COMMANDS:
        try:
            cli.main([command, "--help"])
        except SystemExit:
            pass
        out = capsys.readouterr().out
        if "--model DIR" in out:
            assert "pebble, scree" in re.sub(r"\s+", " ", out), command


@pytest.mark.parametrize("name", ["nonesuch", "pebble/"])
def test_a_name_that_is_neither_a_directory_nor_a_bundled_model_is_reported_as_a_missing_directory(name, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    os.environ.pop("MOERUN_MODEL", None)
    assert cli.main(["inspect", "--model", name]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and name.rstrip("/") in err
