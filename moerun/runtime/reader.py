"""The engine's side of the reader process: shared pool memory, a request ring, result words, doorbells.

With prefetch on, guesses are read by one reader process
(``moerun/runtime/_reader_child.py``): the pool's slots live in shared memory (a
``memfd``), the compute thread writes a request (slot, generation, file range)
into a ring in that memory and carries on (it rings the reader's doorbell only
when the reader has blocked on it); the reader publishes each result in the
slot's words and rings the engine's doorbell.  Both doorbells are eventfds and
both sides block on them when they have nothing to do: nothing spins.  Nothing
is shared but memory, so a background read costs the compute thread a few
microseconds (docs/design/prefetch.md has the measured figures).  A layer's own misses
are read on the compute thread, which would wait for them anyway.

A slot with a request outstanding belongs to the reader until its result is
published (``poll``/``wait``); the pool never evicts or reuses it before.  If
the reader dies, every outstanding request is reported ``FAILED`` and the pool
reads the expert itself.  If it lives but stops making progress for
``timeout_s`` (no chunk transferred while the engine waits), the engine stops
it, says so once (a ``ReaderStalled`` warning), and reads every expert itself
from then on.  Linux only (``memfd_create``, ``eventfd``).
"""

from __future__ import annotations

import mmap
import os
import select
import signal
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np

from moerun.errors import BadOption, ReaderError, ReaderStalled
from moerun.runtime import _reader_child as rc

CHILD = Path(__file__).resolve().parent / "_reader_child.py"
START_TIMEOUT_S = 10.0
# A reader that transfers nothing for this long while the engine waits is taken for stuck.
# Chunks are at most 1 MiB, so this allows a storage path slower than 1 MiB per 2 s.
STALL_TIMEOUT_S = 2.0
NAP_S = 0.05  # longest single block while waiting, so a dead reader is noticed
MAX_PIECES = 3  # ring entries of one request at most: an expert's three parts, each read on its own


def reader_possible() -> bool:
    """Can the reader process run here (Linux: ``memfd_create`` and ``eventfd``)?"""
    return hasattr(os, "memfd_create") and hasattr(os, "eventfd")


class Reader:
    def __init__(self, store, n_slots: int, slot_size: int, timeout_s: float = STALL_TIMEOUT_S):
        if not reader_possible():
            raise BadOption("--prefetch needs Linux (memfd_create, eventfd) for its reader process; run without --prefetch")
        self.n_slots = n_slots
        self.slot_size = slot_size
        self.nbytes = store.expert_nbytes
        self.pieces = store.read_pieces  # (layer, expert) -> ((file, offset, nbytes, at), ...)
        self.timeout_ns = int(timeout_s * 1e9)
        # a slot has at most one request outstanding, of at most MAX_PIECES entries, so the ring never fills
        self.ring = MAX_PIECES * n_slots + 8
        self.r0 = rc.ring_base(n_slots)
        cb = rc.ctrl_bytes(n_slots, self.ring)
        total = cb + n_slots * slot_size
        self._fd = os.memfd_create("moerun-pool", os.MFD_CLOEXEC)
        self._wake = self._done = -1
        self.proc = None
        self._closed = False
        self._dead = False
        self._check_at = 0
        self.stalled = False  # set once the engine has stopped a reader that made no progress
        try:
            os.ftruncate(self._fd, total)
            self._map = mmap.mmap(self._fd, total)
            self.c = memoryview(self._map)[:cb].cast("q")
            self.block = np.frombuffer(self._map, np.uint8, n_slots * slot_size, cb)
            flags = os.EFD_NONBLOCK | os.EFD_CLOEXEC
            self._wake = os.eventfd(0, flags)  # the engine rings it after each request
            self._done = os.eventfd(0, flags)  # the reader rings it after each result
            mechanism = store.mechanism + ("+cold" if store.cold_reads else "")
            fds = tuple(store.fds)
            args = [self._fd, ",".join(map(str, fds)), self._wake, self._done, n_slots, slot_size, self.ring, mechanism, os.getpid()]
            self.proc = subprocess.Popen(
                [sys.executable, "-I", "-S", str(CHILD), *map(str, args)],
                pass_fds=(self._fd, *fds, self._wake, self._done),
                stdin=subprocess.DEVNULL,
                stdout=subprocess.DEVNULL,
                stderr=subprocess.DEVNULL,
                start_new_session=True,  # Ctrl-C at a terminal reaches the engine only; the engine stops the reader
            )
            deadline = time.monotonic() + START_TIMEOUT_S
            while self.c[rc.PID] == 0:  # serving before the first request, so start-up never counts as a stall
                if self.proc.poll() is not None or time.monotonic() > deadline:
                    raise ReaderError(f"the prefetch reader process did not start (exit code {self.proc.poll()})")
                time.sleep(0.001)
        except OSError as e:
            self.close()
            raise ReaderError(f"the prefetch reader process could not be started ({e.strerror or e})") from None
        except BaseException:
            self.close()
            raise

    # ------------------------------------------------------------------ requests
    def submit(self, slot: int, gen: int, layer: int, expert: int) -> None:
        c = self.c
        pieces = self.pieces(layer, expert)
        h = c[rc.HEAD]
        n = len(pieces)
        for i, (file, offset, nbytes, at) in enumerate(pieces):
            b = self.r0 + rc.ENTRY * ((h + i) % self.ring)
            c[b] = slot
            c[b + 1] = gen
            c[b + 2] = offset
            c[b + 3] = nbytes
            c[b + 4] = file
            c[b + 5] = at
            c[b + 6] = i == n - 1
        c[rc.HEAD] = h + n  # last: the reader takes entries up to HEAD
        if c[rc.BLOCKED]:  # a lingering or busy reader finds the request itself; ringing costs 12-80 us here
            try:
                os.write(self._wake, b"\1\0\0\0\0\0\0\0")
            except OSError:
                pass

    def expect(self, at_ns: int) -> None:
        """Tell a lingering reader when the next requests are likely (it sleeps until then)."""
        self.c[rc.EXPECT] = at_ns

    def promote(self, slot: int, gen: int) -> None:
        """A layer now waits for this read: the reader takes it before the others."""
        self.c[rc.SLOT0 + rc.PER_SLOT * slot + rc.PROMOTE] = gen

    def cancel(self, slot: int, gen: int) -> None:
        """Nobody wants this read any more: the reader skips it if it has not started it (it still
        publishes a result, SKIPPED or OK, and the slot is the reader's until then)."""
        self.c[rc.SLOT0 + rc.PER_SLOT * slot + rc.CANCEL] = gen

    def poll(self, slot: int, gen: int):
        """(result, start_ns, ns) once the request ``gen`` of ``slot`` is done, else None."""
        c = self.c
        b = rc.SLOT0 + rc.PER_SLOT * slot
        if c[b + rc.DONE] != gen:
            return None
        return c[b + rc.RESULT], c[b + rc.START], c[b + rc.NS]

    def wait(self, slot: int, gen: int):
        """Block until the request is done (``poll``'s tuple).  A dead reader reports FAILED; so does
        one that transfers nothing for ``timeout_s``: it is stopped first, so it never writes again."""
        got = self.poll(slot, gen)
        if got is not None:
            return got
        return self._block(lambda: self.poll(slot, gen))

    def published(self) -> int:
        """How many results the reader has published so far."""
        return int(self.c[rc.PUBLISHED])

    def wait_any(self, since: int) -> None:
        """Block until the reader has published more than ``since`` results (or is gone): a slot may
        have come free.  Take ``since`` from ``published`` before looking at the slots."""
        self._block(lambda: True if self.published() != since else None)

    def _block(self, check):
        beat, beat_at = self.c[rc.BEAT], time.monotonic_ns()
        while True:
            rc.drain(self._done)
            got = check()  # after the drain: a result published before it is seen here, a later one rings
            if got is not None:
                return got
            if not self.alive:
                return rc.FAILED, 0, 0
            now = time.monotonic_ns()
            if self.c[rc.BEAT] != beat:
                beat, beat_at = self.c[rc.BEAT], now
            elif now - beat_at > self.timeout_ns:
                self._stop_stalled()
                return rc.FAILED, 0, 0
            try:
                select.select([self._done], [], [], NAP_S)
            except (OSError, ValueError):
                return rc.FAILED, 0, 0

    def _stop_stalled(self) -> None:
        self.stalled = True
        self.kill()
        self._dead = True
        warnings.warn(
            ReaderStalled(
                f"the prefetch reader made no progress for {self.timeout_ns / 1e9:g} s; it was stopped and the rest "
                "of the run reads experts on the compute thread (output is unaffected)"
            ),
            stacklevel=4,
        )

    # ------------------------------------------------------------------ test hooks
    def set_faults(self, jitter_us: int = 0, seed: int = 0, fail_every: int = 0, demand_too: bool = False,
                   die_after: int = 0) -> None:
        """Test hook: random 0..jitter_us delays before each read; every fail_every-th read reports a
        failure; the process exits abruptly, a request outstanding, once it has done ``die_after``
        reads.  (``demand_too`` is accepted for old callers: demand reads happen on the compute
        thread, where ``ModelStore.fault_hook`` injects faults.)"""
        c = self.c
        c[rc.SEED] = seed
        c[rc.FAIL_EVERY] = fail_every
        c[rc.JITTER_US] = jitter_us
        c[rc.DIE_AFTER] = die_after

    def freeze(self) -> None:
        """Test hook: stop the reader process where it stands (SIGSTOP), alive but answering nothing."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGSTOP)

    def kill(self) -> None:
        """Test hook (and the stall fallback): kill the reader process now, as a crash would."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait()
        self._check_at = 0

    # ------------------------------------------------------------------ life
    @property
    def alive(self) -> bool:
        if self._dead:
            return False
        now = time.monotonic_ns()
        if now < self._check_at:  # asking the OS costs a system call; once a millisecond is enough
            return True
        self._check_at = now + 1_000_000
        if self.proc is None or self._closed or self.proc.poll() is not None:
            self._dead = True
        return not self._dead

    def rss_bytes(self) -> int | None:
        """The reader process's own resident memory (the shared pool excluded), None if unknown."""
        if not self.alive:
            return None
        try:
            import psutil

            mi = psutil.Process(self.proc.pid).memory_info()
            return max(0, mi.rss - getattr(mi, "shared", 0))
        except Exception:
            return None

    def cpu_seconds(self) -> float | None:
        """CPU time (user + system) the reader process has used so far, None if unknown."""
        if self.proc is None or self.proc.poll() is not None:
            return None
        try:
            import psutil

            t = psutil.Process(self.proc.pid).cpu_times()
            return t.user + t.system
        except Exception:
            return None

    def close(self, timeout: float = 2.0) -> None:
        if self._closed:
            return
        self._closed = True
        self._dead = True
        if self.proc is not None:
            try:
                self.c[rc.STOP] = 1
                os.write(self._wake, b"\1\0\0\0\0\0\0\0")
            except (OSError, ValueError):
                pass
            try:
                self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        for fd in (self._wake, self._done, self._fd):
            if fd >= 0:
                try:
                    os.close(fd)
                except OSError:
                    pass
        self._wake = self._done = self._fd = -1
        # the mapping itself goes with the last view of it (the pool's slots)

    def __del__(self):
        try:
            self.close(0.5)
        except Exception:
            pass
