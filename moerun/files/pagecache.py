"""The OS page cache as seen from one file: counting a range's resident pages (mincore) and dropping them.

A cold read must really come from the device and a warm one from memory; ``moerun probe`` checks each timed read
against ``resident_pages`` and the engine's cold-read mode drops each expert's range after reading it.
Linux and other POSIX systems; where a call is missing, the ``*_problem`` functions say why in one line.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import mmap
import os

import numpy as np

PAGE = mmap.PAGESIZE


class ResidencyUnavailable(Exception):
    """Page residency cannot be checked here (the reason is the message)."""


_libc = None


def _c_library():
    """The C library with mmap, munmap and mincore typed for ctypes (loaded once)."""
    global _libc  # a cache that is safe to drop
    if _libc is None:
        name = ctypes.util.find_library("c")
        lib = ctypes.CDLL(name, use_errno=True)
        for fn in ("mmap", "munmap", "mincore"):
            if not hasattr(lib, fn):
                raise ResidencyUnavailable(f"the C library has no {fn}()")
        lib.mmap.restype = ctypes.c_void_p
        lib.mmap.argtypes = [ctypes.c_void_p, ctypes.c_size_t, ctypes.c_int, ctypes.c_int, ctypes.c_int, ctypes.c_int64]
        lib.munmap.restype = ctypes.c_int
        lib.munmap.argtypes = [ctypes.c_void_p, ctypes.c_size_t]
        lib.mincore.restype = ctypes.c_int
        lib.mincore.argtypes = [ctypes.c_void_p, ctypes.c_size_t, ctypes.c_void_p]
        _libc = lib
    return _libc


def residency_problem(path: str | os.PathLike) -> str | None:
    """Why mincore cannot report this file's page-cache state, or None if it can.

    Since Linux 5.2 mincore reports page-cache residency of a file mapping only
    to a process that owns the file or may open it for writing; for anyone else
    it reports every page resident, which would make a cold read look warm.
    """
    if not hasattr(mmap, "MAP_SHARED") or os.name != "posix":
        return "mincore(2) is not available on this system"
    try:
        _c_library()
    except (OSError, ResidencyUnavailable) as e:
        return f"mincore(2) cannot be called ({e})"
    try:
        st = os.stat(path)
    except OSError as e:
        return f"cannot stat {path} ({e.strerror})"
    if st.st_uid != os.geteuid() and os.geteuid() != 0 and not os.access(path, os.W_OK):
        return "the file is neither owned nor writable by this user, so mincore(2) cannot see its page-cache state"
    return None


def resident_pages(fd: int, offset: int, length: int) -> tuple[int, int]:
    """(resident, total) pages of the file range [offset, offset+length), counted with mincore(2).

    The range is mapped read-only for the call (its pages are not touched, so
    the check does not load them) and unmapped before returning.
    """
    if length <= 0:
        return 0, 0
    lib = _c_library()
    lo = offset - offset % PAGE
    span = offset + length - lo
    pages = -(-span // PAGE)
    addr = lib.mmap(None, span, mmap.PROT_READ, mmap.MAP_SHARED, fd, lo)
    if addr is None or addr == ctypes.c_void_p(-1).value:
        err = ctypes.get_errno()
        raise ResidencyUnavailable(f"mmap for mincore failed ({os.strerror(err)})")
    try:
        vec = np.zeros(pages, np.uint8)
        if lib.mincore(addr, span, vec.ctypes.data) != 0:
            err = ctypes.get_errno()
            raise ResidencyUnavailable(f"mincore failed ({os.strerror(err)})")
    finally:
        lib.munmap(addr, span)
    # mincore(2): the least significant bit of each byte is set if the page is resident.
    return int(np.count_nonzero(vec & 1)), pages


def drop_problem() -> str | None:
    """Why this system cannot drop a file's cached pages without root, or None if it can."""
    if not hasattr(os, "posix_fadvise") or not hasattr(os, "POSIX_FADV_DONTNEED"):
        return "posix_fadvise is not available on this system, so pages cannot be dropped without root"
    return None


def drop_pages(fd: int, offset: int = 0, nbytes: int = 0) -> None:
    """Advise the OS to drop the file's cached pages in [offset, offset + nbytes) (nbytes 0: to the end of the file).

    The next read of the range then comes from the device: the probe's and the engine's cold reads.  OSError where
    the system refuses (``drop_problem`` says beforehand whether it can at all).
    """
    os.posix_fadvise(fd, offset, nbytes, os.POSIX_FADV_DONTNEED)
