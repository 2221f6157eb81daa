"""Atomic file writes: write to a temporary file beside the target, fsync, rename."""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path


def _umask() -> int:
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike, suffix: str = "") -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success rename it into place, else remove it.

    The temporary name starts with ``.moerun-tmp-`` so a crash leaves an obviously
    disposable file, never a half-written file under the final name.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=".moerun-tmp-", suffix=suffix or path.suffix, dir=path.parent)
    os.fchmod(fd, 0o666 & ~_umask())  # mkstemp makes 0600; give the final file ordinary permissions
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        with open(tmp_path, "rb+") as f:
            os.fsync(f.fileno())
        os.replace(tmp_path, path)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp_path.unlink()
        raise


def write_bytes_atomic(path: str | os.PathLike, data: bytes) -> None:
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)


def write_text_atomic(path: str | os.PathLike, text: str) -> None:
    write_bytes_atomic(path, text.encode("utf-8"))


def read_user_file(path: str | os.PathLike, error: type[Exception], what: str = "file", missing_hint: str = "") -> bytes:
    """The bytes of a file the user named; ``error`` (a MoerunError) with one clear line otherwise."""
    path = Path(path)
    try:
        return path.read_bytes()
    except FileNotFoundError:
        raise error(f"{path}: no such {what}{missing_hint}") from None
    except IsADirectoryError:
        raise error(f"{path}: is a directory, expected a {what}") from None
    except OSError as e:
        raise error(f"{path}: cannot read ({e.strerror})") from None
