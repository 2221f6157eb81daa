"""moerun.files.fileio: the one set of rules every output and every user-named input goes through.

Device nodes are made with os.mknod and FIFOs with os.mkfifo inside the test's temporary directory, never
in the real /dev.  A full disk and a read-only file system are real: small tmpfs mounts (skipped where the
test may not mount).
"""

from __future__ import annotations

import os
import stat
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import char_device, fifo, tmpfs

from moerun.errors import BadInput, OutputError
from moerun.files import fileio
from moerun.files.fileio import (
    atomic_dir,
    atomic_path,
    check_output,
    read_user_file,
    remove_stale_temporaries,
    write_text_atomic,
)


def _temporaries(d: Path) -> list[str]:
    return sorted(p.name for p in d.iterdir() if p.name.startswith(fileio.TMP_PREFIX))


# ---------------------------------------------------------------------------- destinations that are not ours


def test_a_character_device_destination_is_refused_and_stays_a_device(tmp_path):
    dev = char_device(tmp_path / "null")
    for force in (False, True):
        with pytest.raises(OutputError, match="character device"):
            write_text_atomic(dev, "x", force=force)
    assert stat.S_ISCHR(os.lstat(dev).st_mode)
    assert _temporaries(tmp_path) == []


def test_a_fifo_destination_is_refused_without_blocking_and_stays_a_fifo(tmp_path):
    pipe = fifo(tmp_path / "pipe")
    with pytest.raises(OutputError, match="FIFO"):
        write_text_atomic(pipe, "x", force=True)
    assert stat.S_ISFIFO(os.lstat(pipe).st_mode)


def test_a_directory_where_a_file_is_expected_is_refused(tmp_path):
    (tmp_path / "d").mkdir()
    with pytest.raises(OutputError, match="directory"):
        write_text_atomic(tmp_path / "d", "x", force=True)
    assert (tmp_path / "d").is_dir()


def test_a_symbolic_link_destination_is_refused_and_its_target_kept(tmp_path):
    target = tmp_path / "real.txt"
    target.write_text("keep")
    link = tmp_path / "link.txt"
    link.symlink_to(target)
    with pytest.raises(OutputError, match="symbolic link"):
        write_text_atomic(link, "x", force=True)
    assert link.is_symlink() and target.read_text() == "keep"


def test_a_missing_parent_directory_is_refused_not_created(tmp_path):
    with pytest.raises(OutputError, match="does not exist"):
        write_text_atomic(tmp_path / "typo" / "deeper" / "out.txt", "x")
    assert not (tmp_path / "typo").exists()


def test_a_parent_that_is_a_file_is_refused(tmp_path):
    (tmp_path / "f").write_text("a file")
    with pytest.raises(OutputError, match="not a directory"):
        write_text_atomic(tmp_path / "f" / "out.txt", "x")


def test_an_existing_file_is_replaced_only_with_force(tmp_path):
    out = tmp_path / "out.txt"
    out.write_text("old")
    with pytest.raises(OutputError, match="--force"):
        write_text_atomic(out, "new", force=False)
    assert out.read_text() == "old"
    write_text_atomic(out, "new", force=True)
    assert out.read_text() == "new"
    assert _temporaries(tmp_path) == []


def test_an_input_of_the_run_is_never_the_destination_even_with_force(tmp_path):
    src = tmp_path / "weights.bin"
    src.write_bytes(b"precious")
    alias = tmp_path / "alias.bin"
    os.link(src, alias)  # another name of the same file
    for dest in (src, alias):
        with pytest.raises(OutputError, match="input of this run"):
            write_text_atomic(dest, "x", force=True, inputs=[src])
    assert src.read_bytes() == b"precious"


def test_a_file_that_appears_during_the_write_is_kept_without_force(tmp_path):
    out = tmp_path / "out.txt"
    with pytest.raises(OutputError, match="appeared"):
        with atomic_path(out, force=False) as tmp:
            tmp.write_text("mine")
            out.write_text("someone else's")
    assert out.read_text() == "someone else's"
    assert _temporaries(tmp_path) == []


def test_a_destination_that_becomes_a_fifo_during_the_write_is_left_alone(tmp_path):
    out = tmp_path / "out.txt"
    out.write_text("old")
    with pytest.raises(OutputError):
        with atomic_path(out, force=True) as tmp:
            tmp.write_text("new")
            out.unlink()
            fifo(out)
    assert stat.S_ISFIFO(os.lstat(out).st_mode)
    assert _temporaries(tmp_path) == []


def test_the_option_name_leads_the_message(tmp_path):
    with pytest.raises(OutputError) as e:
        check_output(tmp_path / "nope" / "t.npz", what="--trace")
    assert str(e.value).startswith("--trace ")


# ---------------------------------------------------------------------------- disks that refuse


def test_a_full_disk_gives_output_error_and_leaves_no_temporary(tmp_path):
    with tmpfs(tmp_path / "small", "64k") as d:
        with pytest.raises(OutputError, match="No space left"):
            write_text_atomic(d / "big.txt", "x" * (1 << 20))
        assert not (d / "big.txt").exists()
        assert list(d.iterdir()) == []


def test_a_read_only_file_system_gives_output_error(tmp_path):
    with tmpfs(tmp_path / "ro", read_only=True) as d:
        with pytest.raises(OutputError, match="Read-only"):
            write_text_atomic(d / "out.txt", "x")


# ---------------------------------------------------------------------------- stale temporaries


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_stale_temporaries_of_a_killed_run_are_removed_by_the_next_write(tmp_path):
    out = tmp_path / "model"
    dead = _dead_pid()
    stale_dir = tmp_path / f"{fileio.TMP_PREFIX}{dead}-model-abc123"
    stale_dir.mkdir()
    (stale_dir / "model.safetensors").write_bytes(b"\0" * 4096)
    stale_file = tmp_path / f"{fileio.TMP_PREFIX}{dead}-model-xyz.bin"
    stale_file.write_bytes(b"partial")
    with atomic_dir(out) as tmp:
        (tmp / "config.json").write_text("{}")
    assert not stale_dir.exists() and not stale_file.exists()
    assert (out / "config.json").is_file()


def test_temporaries_of_a_live_run_or_of_another_name_are_kept(tmp_path):
    live = tmp_path / f"{fileio.TMP_PREFIX}{os.getpid()}-out.txt-live"
    live.write_text("in progress")
    other = tmp_path / f"{fileio.TMP_PREFIX}{_dead_pid()}-other.txt-x"
    other.write_text("not this target's")
    foreign = tmp_path / ".moerun-tmp-notapid-out.txt-x"
    foreign.write_text("not named like ours")
    assert remove_stale_temporaries(tmp_path / "out.txt") == []
    assert live.exists() and other.exists() and foreign.exists()


def test_a_locked_temporary_is_kept_even_if_its_process_seems_gone(tmp_path):
    import fcntl

    t = tmp_path / f"{fileio.TMP_PREFIX}{_dead_pid()}-out.txt-x"
    t.write_text("held")
    fd = os.open(t, os.O_RDONLY)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        assert remove_stale_temporaries(tmp_path / "out.txt") == []
        assert t.exists()
    finally:
        os.close(fd)


# ---------------------------------------------------------------------------- directory outputs


def _model_dir(d: Path, extra: str | None = None) -> Path:
    d.mkdir()
    (d / "config.json").write_text('{"format": "moerun/1"}')
    (d / "model.safetensors").write_bytes(b"old weights")
    if extra:
        (d / extra).write_text("the user's")
    return d


def test_a_directory_output_replaces_only_a_model_directory_with_force(tmp_path):
    out = _model_dir(tmp_path / "m")
    with pytest.raises(OutputError, match="--force"):
        with atomic_dir(out) as tmp:
            (tmp / "config.json").write_text("{}")
    with atomic_dir(out, force=True) as tmp:
        (tmp / "config.json").write_text('{"new": 1}')
    assert (out / "config.json").read_text() == '{"new": 1}' and not (out / "model.safetensors").exists()
    assert _temporaries(tmp_path) == []


def test_a_directory_holding_other_files_is_never_replaced_even_with_force(tmp_path):
    out = _model_dir(tmp_path / "m", extra="notes.txt")
    with pytest.raises(OutputError, match="notes.txt"):
        with atomic_dir(out, force=True) as tmp:
            (tmp / "config.json").write_text("{}")
    assert (out / "notes.txt").read_text() == "the user's"


def test_a_directory_output_inside_or_around_its_source_is_refused(tmp_path):
    src = _model_dir(tmp_path / "src")
    for out in (src, src / "inner", tmp_path):
        with pytest.raises(OutputError, match="source model"):
            with atomic_dir(out, force=True, protect=[src]):
                pass
    assert (src / "model.safetensors").read_bytes() == b"old weights"


def test_a_directory_that_appears_during_the_run_is_kept(tmp_path):
    out = tmp_path / "m"
    with pytest.raises(OutputError, match="appeared"):
        with atomic_dir(out) as tmp:
            (tmp / "config.json").write_text("{}")
            _model_dir(out)
    assert (out / "model.safetensors").read_bytes() == b"old weights"
    assert _temporaries(tmp_path) == []


def test_a_failed_directory_write_leaves_nothing(tmp_path):
    out = tmp_path / "m"
    with pytest.raises(RuntimeError):
        with atomic_dir(out) as tmp:
            (tmp / "config.json").write_text("{}")
            raise RuntimeError("injected")
    assert list(tmp_path.iterdir()) == []


# ---------------------------------------------------------------------------- inputs


def test_a_fifo_input_is_refused_at_once_instead_of_blocking(tmp_path):
    pipe = fifo(tmp_path / "in.txt")
    with pytest.raises(BadInput, match="FIFO"):
        read_user_file(pipe, BadInput)


def test_a_device_input_is_refused_instead_of_read_without_end(tmp_path):
    dev = char_device(tmp_path / "zero", minor=5)
    with pytest.raises(BadInput, match="character device"):
        read_user_file(dev, BadInput)


def test_an_input_larger_than_its_limit_is_refused(tmp_path):
    f = tmp_path / "big.txt"
    f.write_bytes(b"x" * 1000)
    with pytest.raises(BadInput, match="more than"):
        read_user_file(f, BadInput, limit=999)
    assert read_user_file(f, BadInput, limit=1000) == b"x" * 1000
