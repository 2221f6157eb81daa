"""Packaging: a wheel carries the bundled models (every directory under tiny_models/) and the package's data.

Built with pip (``pip wheel --no-deps``), as CI does (.ci/run), from a copy of the source tree, so that a
model directory added later under tiny_models/ can be checked without touching the repository.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest
from conftest import ROOT


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> zipfile.ZipFile:
    src = tmp_path_factory.mktemp("src") / "moerun"
    ignore = shutil.ignore_patterns(".git", ".venv", "build", "dist", "*.egg-info", "__pycache__", ".pytest_cache",
                                    ".ruff_cache", ".hypothesis", "data", "reference.npz")
    shutil.copytree(ROOT, src, ignore=ignore)
    shutil.copytree(ROOT / "moerun" / "data", src / "moerun" / "data")  # (the ignore above drops every "data")
    extra = src / "tiny_models" / "later"
    extra.mkdir()
    (extra / "CARD.md").write_text("a model directory added after the packaging was written\n")
    (extra / "config.json").write_text("{}\n")
    out = tmp_path_factory.mktemp("dist")
    proc = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(out), str(src)],
                          capture_output=True, text=True, timeout=600)
    if proc.returncode != 0:
        pytest.skip(f"cannot build a wheel here: {proc.stderr.strip().splitlines()[-1:] }")
    (whl,) = out.glob("moerun-*.whl")
    return zipfile.ZipFile(whl)


def test_a_wheel_carries_the_bundled_model(wheel):
    names = set(wheel.namelist())
    for f in ("config.json", "model.safetensors", "tokenizer.json", "heldout.txt", "CARD.md"):
        assert f"moerun_models/pebble/{f}" in names


def test_a_wheel_carries_every_subpackage_of_the_tree(wheel):
    names = set(wheel.namelist())
    for init in sorted((ROOT / "moerun").rglob("__init__.py")):
        rel = init.relative_to(ROOT).as_posix()
        assert rel in names, f"the wheel lacks {rel}: add its package to pyproject.toml"


def test_pyprojects_package_list_is_the_tree():
    import tomllib

    listed = set(tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"])
    tree = {".".join(init.relative_to(ROOT).parent.parts) for init in (ROOT / "moerun").rglob("__init__.py")}
    assert listed - {"moerun_models"} == tree


def test_a_model_directory_added_later_under_tiny_models_ships_too(wheel):
    names = set(wheel.namelist())
    assert {"moerun_models/later/CARD.md", "moerun_models/later/config.json"} <= names


def test_a_wheel_carries_the_quantization_benchmark_rows_the_cards_quote(wheel):
    assert "moerun/data/quant_bench.json" in wheel.namelist()


def test_ci_builds_installs_and_runs_a_wheel():
    ci = (ROOT / ".ci" / "run").read_text()
    assert "pip wheel" in ci and "venv" in ci and "generate --max-new 4" in ci
    assert "pkgutil.walk_packages" in ci  # the installed wheel imports every subpackage of the tree
    readme = (ROOT / "README.md").read_text()
    assert "python3 -m pip install -e '.[test]' && python3 -m pytest" in readme
    assert "python3 -m pip install -e '.[test]' && python3 -m pytest" in ci  # CI runs the README's test command


def test_library_code_reads_no_file_from_docs():
    for path in sorted((ROOT / "moerun").rglob("*.py")):
        text = path.read_text()
        assert '"docs"' not in text and "'docs'" not in text, path
    assert not (Path(ROOT) / "docs" / "quant_bench.json").exists()
