"""Every file moerun writes or reads for the user goes through this module (docs/guide/hardening.md, "Outputs" and "Inputs").

Outputs, one rule for all of them:

* a destination that exists must be a regular file (a model directory of ours, for directory outputs);
  a device, FIFO, socket, symbolic link or a directory where a file is expected is refused, with or
  without ``force``: moerun never replaces what it does not own;
* an existing destination is replaced only with ``force`` (the ``--force`` option);
* a destination that is one of the run's inputs (the model's weights, the text being read) is refused,
  ``force`` or not;
* the parent directory must exist: moerun never creates it (a typo would make a new directory tree);
* the data goes to a temporary name beside the destination (``.moerun-tmp-<pid>-<name>-<random>``), is
  fsynced and renamed into place.  Without ``force`` the rename refuses to replace anything, so a file
  or directory that appeared at the destination while the command ran is kept and the command fails;
  with ``force`` the new output is exchanged with the old one in one step, so there is no moment
  without a destination;
* temporaries of the same destination left by a killed run (their process is gone and their lock is
  free) are removed before a new one is made.

Failures are ``OutputError`` (one line; not a bad option).  Inputs: ``read_user_file`` accepts regular
files only (a FIFO or ``/dev/zero`` would block or never end) up to a size limit.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import fcntl
import os
import re
import shutil
import signal
import stat
import tempfile
import threading
from collections.abc import Iterable, Iterator
from pathlib import Path

from moerun.errors import OutputError

TMP_PREFIX = ".moerun-tmp-"
# Files a model directory written by moerun may hold; a directory holding anything else is not ours to replace.
MODEL_FILES = frozenset({"config.json", "model.safetensors", "tokenizer.json", "heldout.txt", "CARD.md", "reference.npz",
                         # and those of an open checkpoint (moerun synth --open-type writes them)
                         "model.safetensors.index.json", "generation_config.json", "tokenizer_config.json"})
SHARD_NAME = re.compile(r"model-\d{5}-of-\d{5}\.safetensors")  # an open checkpoint's weight shards
TEXT_LIMIT = 1 << 30  # bytes of a text file the user names (--prompt-file, --text)
JSON_LIMIT = 64 << 20  # bytes of a small JSON document (config, probe result, shape file, calibration cache)
_NAME_CHARS = 60  # of the destination's name kept in a temporary's name (file names are limited to 255 bytes)


def _umask() -> int:
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _kind(mode: int) -> str:
    for test, name in (
        (stat.S_ISDIR, "a directory"),
        (stat.S_ISCHR, "a character device"),
        (stat.S_ISBLK, "a block device"),
        (stat.S_ISFIFO, "a FIFO (named pipe)"),
        (stat.S_ISSOCK, "a socket"),
        (stat.S_ISLNK, "a symbolic link"),
    ):
        if test(mode):
            return name
    return "not a regular file"


def _label(path: Path, what: str) -> str:
    return f"{what} {path}" if what else str(path)


def _os_reason(e: OSError) -> str:
    return e.strerror or str(e)


def _same(a: os.stat_result, b: os.stat_result) -> bool:
    return (a.st_dev, a.st_ino) == (b.st_dev, b.st_ino)


def _inside(inner: Path, outer: Path) -> bool:
    return inner == outer or outer in inner.parents


# ---------------------------------------------------------------------------- renames that never destroy


_RENAME_NOREPLACE = 1  # linux/fs.h
_RENAME_EXCHANGE = 2
_AT_FDCWD = -100
_renameat2_fn = None


def _renameat2(src: Path, dst: Path, flags: int) -> bool:
    """renameat2(2) through the C library; False where the system or the file system lacks it."""
    global _renameat2_fn  # a cache that is safe to drop
    if _renameat2_fn is None:
        try:
            fn = ctypes.CDLL(None, use_errno=True).renameat2
            fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
            fn.restype = ctypes.c_int
            _renameat2_fn = fn
        except (OSError, AttributeError):
            _renameat2_fn = False
    if not _renameat2_fn:
        return False
    if _renameat2_fn(_AT_FDCWD, os.fsencode(src), _AT_FDCWD, os.fsencode(dst), flags) == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.ENOSYS, errno.EINVAL, errno.ENOTSUP):
        return False
    raise OSError(err, os.strerror(err), str(dst))


def rename_noreplace(src: Path, dst: Path) -> None:
    """Rename ``src`` to ``dst`` unless something exists at ``dst`` (then FileExistsError), in one step."""
    if _renameat2(src, dst, _RENAME_NOREPLACE):
        return
    if src.is_dir():  # no atomic way here: check, then rename (a directory appearing in between could be lost)
        if os.path.lexists(dst):
            raise FileExistsError(errno.EEXIST, os.strerror(errno.EEXIST), str(dst))
        os.rename(src, dst)
        return
    os.link(src, dst)  # fails if dst exists
    os.unlink(src)


def rename_exchange(src: Path, dst: Path) -> bool:
    """Swap ``src`` and ``dst`` in one step (both must exist); False where the system cannot."""
    return _renameat2(src, dst, _RENAME_EXCHANGE)


def _fsync_dir(d: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(d, os.O_RDONLY | os.O_DIRECTORY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


# ---------------------------------------------------------------------------- temporaries and their clean-up


def _tmp_prefix(target: Path) -> str:
    return f"{TMP_PREFIX}{os.getpid()}-{target.name[:_NAME_CHARS]}-"


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _lock(path: Path) -> int | None:
    """An fd holding an exclusive lock on ``path`` (a file or a directory), or None if it is locked."""
    fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW | os.O_CLOEXEC | os.O_NONBLOCK)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        os.close(fd)
        return None
    return fd


def remove_stale_temporaries(target: str | os.PathLike) -> list[str]:
    """Remove temporaries of ``target`` that a killed run left beside it; return their names.

    A temporary is stale when its name says it belongs to this destination, it belongs to this user, the
    process that made it no longer runs and nobody holds its lock.  Others (a run still going, another
    user's, anything not named like ours) are never touched.
    """
    target = Path(target)
    parent = target.parent
    want = f"-{target.name[:_NAME_CHARS]}-"
    removed = []
    try:
        entries = list(os.scandir(parent))
    except OSError:
        return removed
    for entry in entries:
        name = entry.name
        if not name.startswith(TMP_PREFIX):
            continue
        pid_text, _, rest = name[len(TMP_PREFIX) :].partition("-")
        if not pid_text.isdigit() or not ("-" + rest).startswith(want):
            continue
        if _pid_alive(int(pid_text)):
            continue
        try:
            st = entry.stat(follow_symlinks=False)
            if st.st_uid != os.geteuid() or not (stat.S_ISREG(st.st_mode) or stat.S_ISDIR(st.st_mode)):
                continue
            fd = _lock(Path(entry.path))
        except OSError:
            continue
        if fd is None:
            continue
        try:
            if stat.S_ISDIR(st.st_mode):
                shutil.rmtree(entry.path, ignore_errors=True)
            else:
                os.unlink(entry.path)
            removed.append(name)
        except OSError:
            pass
        finally:
            os.close(fd)
    return removed


# ---------------------------------------------------------------------------- checking a destination


def _check_parent(path: Path, what: str) -> None:
    parent = path.parent
    try:
        st = os.stat(parent)
    except FileNotFoundError:
        raise OutputError(f"{_label(path, what)}: cannot write: directory {parent} does not exist (moerun does not create it)") from None
    except OSError as e:
        raise OutputError(f"{_label(path, what)}: cannot write in {parent} ({_os_reason(e)})") from None
    if not stat.S_ISDIR(st.st_mode):
        raise OutputError(f"{_label(path, what)}: cannot write: {parent} is not a directory")


def _check_inputs(path: Path, what: str, inputs: Iterable) -> None:
    try:
        st = os.stat(path)
    except OSError:
        return
    for src in inputs:
        if src is None:
            continue
        try:
            if _same(st, os.stat(src)):
                raise OutputError(f"{_label(path, what)}: is {src}, an input of this run; choose another name")
        except OSError:
            continue


def _existing(path: Path, what: str) -> os.stat_result | None:
    """What is at ``path`` itself (a link is not followed), or None if nothing is."""
    try:
        return os.lstat(path)
    except FileNotFoundError:
        return None
    except OSError as e:
        raise OutputError(f"{_label(path, what)}: cannot check it ({_os_reason(e)})") from None


def check_output(path: str | os.PathLike, force: bool = False, inputs: Iterable = (), what: str = "") -> Path:
    """Refuse now a file destination that the final rename would refuse (see the module docstring).

    ``inputs``: files the run reads; ``what``: the option that named the path, for the message.
    """
    path = Path(path)
    if path.name in ("", ".", ".."):
        raise OutputError(f"{_label(path, what)}: not a file name")
    _check_parent(path, what)
    st = _existing(path, what)
    if st is None:
        return path
    if not stat.S_ISREG(st.st_mode):
        raise OutputError(f"{_label(path, what)}: is {_kind(st.st_mode)}, not a regular file; refusing to replace it")
    _check_inputs(path, what, inputs)
    if not force:
        raise OutputError(f"{_label(path, what)}: already exists; pass --force to replace it")
    return path


class SignalsHeld:
    """Ctrl-C and SIGTERM wait from here until ``release()``: for the instant between making a temporary
    file or directory and entering the ``try`` that removes it, where an interruption would leave it behind,
    and for the renames that install an output (an interruption between two of them could leave neither the
    old output nor the new one).

    Python runs signal handlers in the main thread only, between instructions; while held, the handlers
    only note the signal, and ``release()`` puts the handlers back and calls the first noted one, so its
    KeyboardInterrupt (or the command line's ``Terminated``) is raised there, inside that ``try``.  Outside
    the main thread nothing can be interrupted this way and nothing is held.  A handler that was the
    system default (SIGTERM in a program that set none) is delivered again with ``os.kill``, so the
    process still ends as it would have.
    """

    SIGNALS = (signal.SIGINT, signal.SIGTERM)

    def __init__(self):
        self.noted: list[int] = []
        self.saved: dict | None = None
        if threading.current_thread() is threading.main_thread():
            self.saved = {s: signal.getsignal(s) for s in self.SIGNALS}
            for s in self.SIGNALS:
                signal.signal(s, self._note)

    def _note(self, signum, frame) -> None:
        self.noted.append(signum)

    def release(self) -> None:
        if self.saved is None:
            return
        saved, self.saved = self.saved, None
        for s, handler in saved.items():
            signal.signal(s, handler)
        if not self.noted:
            return
        signum = self.noted[0]
        handler = saved[signum]
        if callable(handler):
            handler(signum, None)
        elif handler == signal.SIG_DFL:
            os.kill(os.getpid(), signum)


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike, suffix: str = "", force: bool = True, inputs: Iterable = (),
                what: str = "") -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success rename it into place, else remove it.

    The module's rules apply: ``force`` (default True for library callers; commands pass ``--force``)
    allows replacing an existing regular file; ``inputs`` are never replaced.  An ``OSError`` while
    writing (a full disk, a read-only file system) becomes ``OutputError``.
    """
    path = Path(path)
    inputs = list(inputs)
    check_output(path, force, inputs, what)
    remove_stale_temporaries(path)
    held = SignalsHeld()
    try:
        fd, tmp = tempfile.mkstemp(prefix=_tmp_prefix(path), suffix=suffix or path.suffix, dir=path.parent)
    except OSError as e:
        held.release()
        raise OutputError(f"{_label(path, what)}: cannot write in {path.parent} ({_os_reason(e)})", e.errno) from None
    tmp_path = Path(tmp)
    try:
        held.release()  # an interruption since mkstemp is raised here, where the temporary is removed
        fcntl.flock(fd, fcntl.LOCK_EX)  # a run still writing it holds this; see remove_stale_temporaries
        os.fchmod(fd, 0o666 & ~_umask())  # mkstemp makes 0600; give the final file ordinary permissions
        yield tmp_path
        with open(tmp_path, "rb+") as f:
            os.fsync(f.fileno())
        installing = SignalsHeld()  # a signal during the renames waits: the output is installed whole, then it acts
        try:
            _install(tmp_path, path, force, inputs, what)
        finally:
            installing.release()
    except OSError as e:
        with contextlib.suppress(OSError):
            tmp_path.unlink()
        raise OutputError(f"{_label(path, what)}: writing failed ({_os_reason(e)}); nothing was written", e.errno) from None
    except BaseException:
        with contextlib.suppress(OSError):
            tmp_path.unlink()
        raise
    finally:
        os.close(fd)


def _install(tmp: Path, path: Path, force: bool, inputs: list, what: str) -> None:
    """Put the finished temporary file at ``path`` by the module's rules (checked again: things change meanwhile)."""
    if not force:
        try:
            _check_parent(path, what)
            rename_noreplace(tmp, path)
        except FileExistsError:
            raise OutputError(_appeared(path, what)) from None
        _fsync_dir(path.parent)
        return
    check_output(path, force, inputs, what)
    if os.path.lexists(path) and rename_exchange(tmp, path):
        st = os.lstat(tmp)  # what we just swapped out
        if not stat.S_ISREG(st.st_mode):  # replaced by something else since the check: put it back
            rename_exchange(tmp, path)
            raise OutputError(f"{_label(path, what)}: became {_kind(st.st_mode)} while this command ran; left it alone")
        os.unlink(tmp)
    else:
        os.replace(tmp, path)
    _fsync_dir(path.parent)


def write_bytes_atomic(path: str | os.PathLike, data: bytes, force: bool = True, inputs: Iterable = (), what: str = "") -> None:
    with atomic_path(path, force=force, inputs=inputs, what=what) as tmp:
        tmp.write_bytes(data)


def write_text_atomic(path: str | os.PathLike, text: str, force: bool = True, inputs: Iterable = (), what: str = "") -> None:
    write_bytes_atomic(path, text.encode("utf-8"), force, inputs, what)


# ---------------------------------------------------------------------------- directory outputs (a model directory)


def _model_dir_problem(d: Path) -> str | None:
    """Why ``d`` is not a model directory moerun may replace, or None if it is one."""
    try:
        entries = list(os.scandir(d))
    except OSError as e:
        return f"cannot list it ({_os_reason(e)})"
    names = {e.name for e in entries}
    if "config.json" not in names:
        return "it holds no config.json"
    for e in entries:
        if (e.name not in MODEL_FILES and not SHARD_NAME.fullmatch(e.name)) or not e.is_file(follow_symlinks=False):
            return f"it holds {e.name!r}, which is not part of a model"
    return None


def check_output_dir(path: str | os.PathLike, force: bool = False, protect: Iterable = (), what: str = "",
                     allow_empty: bool = False) -> Path:
    """Refuse now a directory destination the final rename would refuse.

    ``protect``: directories the run reads (a source model): the destination may not be, contain or lie
    inside any of them.  ``allow_empty``: an existing empty directory counts as absent.
    """
    path = Path(path)
    if path.name in ("", ".", ".."):
        path = Path(os.path.abspath(path))
    _check_parent(path, what)
    real = Path(os.path.realpath(path))
    for src in protect:
        if src is None:
            continue
        src_real = Path(os.path.realpath(src))
        if _inside(real, src_real) or _inside(src_real, real):
            where = "is" if real == src_real else ("lies inside" if _inside(real, src_real) else "contains")
            raise OutputError(f"{_label(path, what)}: {where} the source model {src}; choose a directory outside it")
    st = _existing(path, what)
    if st is None:
        return path
    if not stat.S_ISDIR(st.st_mode):
        raise OutputError(f"{_label(path, what)}: is {_kind(st.st_mode)}, not a directory; refusing to replace it")
    empty = not any(os.scandir(path))
    if empty and allow_empty:
        return path
    problem = None if empty else _model_dir_problem(path)
    if problem is not None:
        raise OutputError(f"{_label(path, what)}: already exists and is not an empty directory or a model directory "
                          f"({problem}); refusing to replace it")
    if not force:
        raise OutputError(f"{_label(path, what)}: already exists; choose a new directory or pass --force to replace it")
    return path


def _ordinary_modes(d: Path) -> None:
    """Temporary names are created private (0700/0600); give the finished directory the modes of ordinary files."""
    mask = _umask()
    for f in d.iterdir():
        if f.is_file() and not f.is_symlink():
            os.chmod(f, 0o666 & ~mask)
    os.chmod(d, 0o777 & ~mask)


@contextlib.contextmanager
def atomic_dir(path: str | os.PathLike, force: bool = False, protect: Iterable = (), what: str = "",
               allow_empty: bool = False) -> Iterator[Path]:
    """Yield a temporary directory beside ``path``; on success it becomes ``path`` (the rules of ``check_output_dir``).

    Without ``force`` nothing that exists at ``path`` at the end is replaced (a directory that appeared
    meanwhile is kept and the new one discarded).  With ``force`` the old directory is exchanged with
    the new one in one step and then removed, so ``path`` always holds a whole model.
    """
    path = Path(path)
    protect = list(protect)
    check_output_dir(path, force, protect, what, allow_empty)
    remove_stale_temporaries(path)
    held = SignalsHeld()
    try:
        tmp = Path(tempfile.mkdtemp(prefix=_tmp_prefix(path), dir=path.parent))
    except OSError as e:
        held.release()
        raise OutputError(f"{_label(path, what)}: cannot write in {path.parent} ({_os_reason(e)})", e.errno) from None
    fd = None
    try:
        fd = _lock(tmp)
        held.release()  # an interruption since mkdtemp is raised here, where the temporary is removed
        yield tmp
        _ordinary_modes(tmp)
        installing = SignalsHeld()  # as atomic_path: the renames (and the old model's removal) are not cut short
        try:
            _install_dir(tmp, path, force, protect, what, allow_empty)
        finally:
            installing.release()
    except OSError as e:
        shutil.rmtree(tmp, ignore_errors=True)
        raise OutputError(f"{_label(path, what)}: writing failed ({_os_reason(e)}); nothing was written", e.errno) from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    finally:
        if fd is not None:
            os.close(fd)


def _appeared(path: Path, what: str) -> str:
    return f"{_label(path, what)}: appeared while this command ran; kept it, and discarded the new output"


def _install_dir(tmp: Path, path: Path, force: bool, protect: list, what: str, allow_empty: bool) -> None:
    if not force and os.path.lexists(path) and not (allow_empty and path.is_dir() and not any(os.scandir(path))):
        raise OutputError(_appeared(path, what))
    check_output_dir(path, force, protect, what, allow_empty)
    if os.path.lexists(path):
        if any(os.scandir(path)):  # a model of ours, and force (checked just now)
            if rename_exchange(tmp, path):
                # tmp now holds the previous model; a kill before it is removed leaves a stale temporary, cleaned next time
                shutil.rmtree(tmp, ignore_errors=True)
                _fsync_dir(path.parent)
                return
            old = Path(tempfile.mkdtemp(prefix=_tmp_prefix(path), dir=path.parent))  # no exchange on this system
            os.rename(path, old / "model")
            shutil.rmtree(old, ignore_errors=True)
        else:
            try:
                os.rmdir(path)  # empty: nothing is lost; fails if something arrived meanwhile
            except OSError:
                raise OutputError(f"{_label(path, what)}: filled while this command ran; kept it, and discarded the new output") from None
    try:
        rename_noreplace(tmp, path)
    except FileExistsError:
        raise OutputError(_appeared(path, what)) from None
    _fsync_dir(path.parent)


# ---------------------------------------------------------------------------- inputs


def open_regular(path: str | os.PathLike, error: type[Exception], what: str = "file", missing: str | None = None,
                 limit: int | None = None):
    """Open a file the user named for reading in binary: regular files only, at most ``limit`` bytes.

    Opening does not block on a FIFO (O_NONBLOCK) and a device is refused before any byte is read.
    ``error`` (a MoerunError class) carries the one-line message; ``missing`` replaces the message for a
    file that does not exist.
    """
    path = Path(path)
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | os.O_CLOEXEC)
    except FileNotFoundError:
        raise error(missing or f"{path}: no such {what}") from None
    except OSError as e:
        raise error(f"{path}: cannot read ({_os_reason(e)})") from None
    try:
        st = os.fstat(fd)
        if not stat.S_ISREG(st.st_mode):
            raise error(f"{path}: is {_kind(st.st_mode)}, expected a {what} (a regular file)")
        if limit is not None and st.st_size > limit:
            raise error(f"{path}: {st.st_size:,} bytes, more than the {limit:,} a {what} may hold")
        os.set_blocking(fd, True)
        return os.fdopen(fd, "rb")
    except BaseException:
        os.close(fd)
        raise


def read_user_file(path: str | os.PathLike, error: type[Exception], what: str = "file", missing_hint: str = "",
                   limit: int = TEXT_LIMIT, missing: str | None = None) -> bytes:
    """The bytes of a regular file the user named (at most ``limit``); ``error`` with one clear line otherwise."""
    path = Path(path)
    with open_regular(path, error, what, missing or f"{path}: no such {what}{missing_hint}", limit) as f:
        size = os.fstat(f.fileno()).st_size
        try:
            data = f.read(size)  # what fstat promised (read(n) sizes its buffer by n: never ask for the limit)
            more = f.read(1)
            if not more:
                return data
            parts, total = [data, more], len(data) + len(more)  # it grew while being read: go on, within the limit
            while more:
                if total > limit:
                    raise error(f"{path}: more than the {limit:,} bytes a {what} may hold")
                more = f.read(1 << 16)
                parts.append(more)
                total += len(more)
        except OSError as e:
            raise error(f"{path}: cannot read ({_os_reason(e)})") from None
    return b"".join(parts)


def read_json_file(path: str | os.PathLike, error: type[Exception], what: str = "JSON file", missing: str | None = None,
                   limit: int = JSON_LIMIT, file_error: type[Exception] | None = None):
    """A JSON document from a regular file the user named (UTF-8, at most ``limit`` bytes); ``error`` otherwise
    (``file_error``, if given, for a file that is missing or cannot be read at all).

    Nesting past the recursion limit and integers past Python's digit limit are refused, not raised.
    """
    import json

    path = Path(path)
    raw = read_user_file(path, file_error or error, what, limit=limit, missing=missing)
    try:
        return json.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as e:
        raise error(f"{path}: not UTF-8 text (bad byte at offset {e.start})") from None
    except RecursionError:
        raise error(f"{path}: not a JSON document (nested too deeply), expected a {what}") from None
    except ValueError as e:  # JSONDecodeError, and integers longer than Python converts
        raise error(f"{path}: not a JSON document ({str(e).splitlines()[0][:120]}), expected a {what}") from None
