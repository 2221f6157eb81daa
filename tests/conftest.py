"""Shared fixtures: tiny synthetic models written into temporary directories, the bundled model, header surgery.

The repository root goes first on sys.path so the suite runs without installing moerun.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import stat
import struct
import subprocess
import sys
from pathlib import Path

# One BLAS thread, as DEVELOPERS.md (Benchmarks) prescribes for decode: small matmuls are
# faster and steadier that way on the shared 2-core machines.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import pytest  # noqa: E402

from moerun.makers.synthetic import synth_config, write_model  # noqa: E402

PEBBLE = ROOT / "tiny_models" / "pebble"
SCREE = ROOT / "tiny_models" / "scree"  # many small experts and a shared one (its CARD.md)
BUNDLED = {"pebble": PEBBLE, "scree": SCREE}


# ---------------------------------------------------------------------------- the cache directory


@pytest.fixture(scope="session", autouse=True)
def private_cache_dir(tmp_path_factory):
    """Every test (and every process a test starts) caches into a temporary directory, never the user's own.

    moerun caches calibration files under $XDG_CACHE_HOME/moerun (moerun.planner.search); the variable is set for the
    whole session so child processes inherit it.
    """
    cache = tmp_path_factory.mktemp("cache")
    old = os.environ.get("XDG_CACHE_HOME")
    os.environ["XDG_CACHE_HOME"] = str(cache)
    yield cache
    if old is None:
        os.environ.pop("XDG_CACHE_HOME", None)
    else:
        os.environ["XDG_CACHE_HOME"] = old


# ---------------------------------------------------------------------------- models


@pytest.fixture(scope="session")
def synth_models(tmp_path_factory):
    """Factory: ``make(seed=0, **synth_config kwargs)`` -> directory of a synthetic model (cached, read-only use)."""
    cache: dict = {}

    def make(seed: int = 0, **kw) -> Path:
        key = (seed, tuple(sorted(kw.items())))
        if key not in cache:
            d = tmp_path_factory.mktemp("synth")
            write_model(d, synth_config(**kw), seed=seed)
            cache[key] = d
        return cache[key]

    return make


@pytest.fixture(scope="session")
def small_model(synth_models) -> Path:
    """3 layers, 8 experts, top-2, d_model 32: the workhorse for offloading checks (do not modify)."""
    return synth_models(layers=3, experts=8, top_k=2)


@pytest.fixture
def fresh_model(tmp_path) -> Path:
    """A synthetic model of our own (2 layers, 4 experts) that a test may corrupt."""
    d = tmp_path / "model"
    write_model(d, synth_config(layers=2, experts=4, top_k=2), seed=3)
    return d


def _bundled_or_skip(d: Path) -> Path:
    if not (d / "model.safetensors").is_file() or not (d / "config.json").is_file():
        pytest.skip(f"bundled model tiny_models/{d.name}/model.safetensors is absent (not trained yet)")
    return d


@pytest.fixture(scope="session")
def pebble() -> Path:
    """The bundled tiny model, or skip when it has not been trained into the tree yet."""
    return _bundled_or_skip(PEBBLE)


@pytest.fixture(scope="session")
def scree() -> Path:
    """The second bundled model (32 experts top-4 and a shared expert), or skip when absent."""
    return _bundled_or_skip(SCREE)


@pytest.fixture(scope="session", params=sorted(BUNDLED))
def bundled(request) -> Path:
    """Each bundled model in turn (pebble, scree)."""
    return _bundled_or_skip(BUNDLED[request.param])


def copy_model(src: Path, dst: Path) -> Path:
    shutil.copytree(src, dst)
    return dst


# ---------------------------------------------------------------------------- header surgery


def read_raw(path: Path) -> tuple[dict, bytes]:
    """(header document, data bytes) of a safetensors file."""
    blob = Path(path).read_bytes()
    (n,) = struct.unpack("<Q", blob[:8])
    return json.loads(blob[8 : 8 + n]), blob[8 + n :]


def write_raw(path: Path, doc: dict | bytes, data: bytes) -> None:
    """Write a safetensors file from a header (dict or raw bytes) and the data bytes."""
    head = doc if isinstance(doc, bytes) else json.dumps(doc).encode()
    Path(path).write_bytes(struct.pack("<Q", len(head)) + head + data)


def edit_header(path: Path, edit) -> None:
    """Apply ``edit(doc)`` to the header of a safetensors file, keeping its data bytes."""
    doc, data = read_raw(path)
    edit(doc)
    write_raw(path, doc, data)


def edit_config(model_dir: Path, edit) -> None:
    path = Path(model_dir) / "config.json"
    doc = json.loads(path.read_text())
    edit(doc)
    path.write_text(json.dumps(doc))


def reader_processes() -> list:
    """Prefetch reader processes (moerun/runtime/_reader_child.py) this test process has running."""
    import psutil

    out = []
    for p in psutil.Process().children():
        try:
            if any(a.endswith("reader_child.py") for a in p.cmdline()) and p.status() != psutil.STATUS_ZOMBIE:
                out.append(p)
        except psutil.Error:
            pass
    return out


# ---------------------------------------------------------------------------- destinations that are not regular files


def char_device(path: Path, minor: int = 3) -> Path:
    """A character device node with the numbers of /dev/null (1, 3; /dev/zero is 1, 5), made in the test's
    own directory (never the real /dev).  Skips where device nodes cannot be made."""
    try:
        os.mknod(path, 0o666 | stat.S_IFCHR, os.makedev(1, minor))
    except OSError as e:
        pytest.skip(f"cannot make a device node here ({e})")
    return path


def fifo(path: Path) -> Path:
    try:
        os.mkfifo(path)
    except OSError as e:
        pytest.skip(f"cannot make a FIFO here ({e})")
    return path


@contextlib.contextmanager
def tmpfs(where: Path, size: str = "64k", read_only: bool = False):
    """A small tmpfs at ``where`` (a real full disk, or a read-only file system); skips where mounting is refused."""
    where.mkdir()
    opts = f"size={size}" + (",ro" if read_only else "")
    proc = subprocess.run(["mount", "-t", "tmpfs", "-o", opts, "tmpfs", str(where)], capture_output=True, text=True)
    if proc.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here ({proc.stderr.strip()[:80]})")
    try:
        yield where
    finally:
        subprocess.run(["umount", "-l", str(where)], capture_output=True)


@pytest.fixture
def every_guess_read(monkeypatch):
    """Guesses are read whatever they would cost: the prefetch machinery runs on any model and link.

    The pool normally reads a guess only if it pays (moerun.runtime.pool.ExpertPool.place_ns); on the tiny
    test models and fast links few would, and tests of what guesses must never break would test little.
    """
    from moerun.runtime.pool import ExpertPool

    monkeypatch.setattr(ExpertPool, "place_ns", -(10**15))


@pytest.fixture(autouse=True)
def plan_check_stand_in(request, monkeypatch):
    """plan runs its recommendation to check it (moerun.planner.selfcheck): seconds of timed decode whose figures
    differ from run to run.  Outside the tests marked ``plan_runs`` the runs are stood in for by ones that measure
    exactly the prediction, so every other plan test stays fast and its results comparable from run to run; the
    rest of the check (its prompt, the result's fields, the command's line) still runs."""
    if request.node.get_closest_marker("plan_runs"):
        return
    from moerun.planner import selfcheck

    def stand_in(model_dir, pr, cap, prompt_ids, link_speed=None, cold=False, rounds=selfcheck.ROUNDS, progress=None, **extra):
        return selfcheck.PlanCheck(pr.tok_s, [pr.tok_s] * rounds, [pr.hit_rate] * rounds, pr.hit_rate,
                                   selfcheck.tokens_per_run(pr.tok_s))

    monkeypatch.setattr(selfcheck, "measure", stand_in)
