"""The engine's side of the reader process: shared pool memory, a request ring, result words.

With prefetch on, every page-in of a run goes through one reader process
(``moerun/reader_child.py``): the pool's slots live in shared memory (a
``memfd``), the compute thread writes a request (slot, generation, file range,
demand or guess, target layer) into a ring in that memory and carries on, and
the reader publishes each result in the slot's words.  Nothing is shared but
memory, so background reads cost the compute thread a few microseconds
instead of the interpreter-lock hand-offs a reader thread would need.

A slot with a request outstanding belongs to the reader until its result is
published (``poll``/``wait``); the pool never evicts or reuses it before.  If
the reader dies, every outstanding request is reported ``FAILED`` and the pool
reads the expert itself.  Linux only (``memfd_create``).
"""

from __future__ import annotations

import mmap
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from . import reader_child as rc
from .errors import BadOption

CHILD = Path(__file__).resolve().parent / "reader_child.py"
START_TIMEOUT_S = 10.0


class Reader:
    def __init__(self, store, n_slots: int, slot_size: int):
        if not hasattr(os, "memfd_create"):
            raise BadOption("--prefetch needs Linux (memfd_create) for its reader process; run without --prefetch")
        self.n_slots = n_slots
        self.slot_size = slot_size
        self.nbytes = store.expert_nbytes
        self.ranges = store.ranges
        self.ring = n_slots + 8  # a slot has at most one request outstanding, so the ring never fills
        self.r0 = rc.ring_base(n_slots)
        cb = rc.ctrl_bytes(n_slots, self.ring)
        total = cb + n_slots * slot_size
        self._fd = os.memfd_create("moerun-pool", os.MFD_CLOEXEC)
        self._wake_r = self._wake_w = -1
        self.proc = None
        self._closed = False
        self._dead = False
        self._check_at = 0
        try:
            os.ftruncate(self._fd, total)
            self._map = mmap.mmap(self._fd, total)
            self.c = memoryview(self._map)[:cb].cast("q")
            self.block = np.frombuffer(self._map, np.uint8, n_slots * slot_size, cb)
            self._wake_r, self._wake_w = os.pipe()
            os.set_blocking(self._wake_w, False)
            args = [self._fd, store._fd, self._wake_r, n_slots, slot_size, self.ring, store.link_rate or 0.0, store.mechanism, os.getpid()]
            self.proc = subprocess.Popen(
                [sys.executable, "-I", "-S", str(CHILD), *map(str, args)],
                pass_fds=(self._fd, store._fd, self._wake_r),
                stdin=subprocess.DEVNULL,
                stdout=subprocess.DEVNULL,
                stderr=subprocess.DEVNULL,
                start_new_session=True,  # Ctrl-C at a terminal reaches the engine only; the engine stops the reader
            )
            os.close(self._wake_r)
            self._wake_r = -1
            deadline = time.monotonic() + START_TIMEOUT_S
            while self.c[rc.PID] == 0:  # serving before the first request, so start-up never counts as a stall
                if self.proc.poll() is not None or time.monotonic() > deadline:
                    raise BadOption(f"the prefetch reader process did not start (exit code {self.proc.poll()})")
                time.sleep(0.001)
        except BaseException:
            self.close()
            raise

    # ------------------------------------------------------------------ requests
    def submit(self, slot: int, gen: int, layer: int, expert: int, demand: bool, target: int) -> None:
        c = self.c
        r = self.ranges[layer][expert]
        h = c[rc.HEAD]
        b = self.r0 + rc.ENTRY * (h % self.ring)
        c[b] = slot
        c[b + 1] = gen
        c[b + 2] = r.start
        c[b + 3] = r.nbytes
        c[b + 4] = 1 if demand else 0
        c[b + 5] = target
        c[rc.HEAD] = h + 1  # last: the reader takes entries up to HEAD
        if c[rc.SLEEPING]:
            try:
                os.write(self._wake_w, b"\0")
            except (BlockingIOError, OSError):
                pass

    def promote(self, slot: int, gen: int) -> None:
        """A layer now needs this guess: the reader serves it before other guesses."""
        self.c[rc.SLOT0 + rc.PER_SLOT * slot + rc.PROMOTE] = gen

    def set_progress(self, progress: int) -> None:
        self.c[rc.PROGRESS] = progress

    def poll(self, slot: int, gen: int):
        """(result, usable_at_ns, start_ns, ns) once the request ``gen`` of ``slot`` is done, else None."""
        c = self.c
        b = rc.SLOT0 + rc.PER_SLOT * slot
        if c[b + rc.DONE] != gen:
            return None
        return c[b + rc.RESULT], c[b + rc.USABLE], c[b + rc.START], c[b + rc.NS]

    def wait(self, slot: int, gen: int):
        """Wait until the request is done (spinning for the first millisecond, then in 0.2 ms naps);
        a dead reader reports FAILED."""
        got = self.poll(slot, gen)
        if got is not None:
            return got
        nap_from = time.monotonic_ns() + 1_000_000
        while got is None:
            if not self.alive:
                return rc.FAILED, 0, 0, 0
            if time.monotonic_ns() > nap_from:
                time.sleep(0.0002)
            got = self.poll(slot, gen)
        return got

    # ------------------------------------------------------------------ test hooks
    def set_faults(self, jitter_us: int = 0, seed: int = 0, fail_every: int = 0, demand_too: bool = False,
                   die_after: int = 0) -> None:
        """Test hook: random 0..jitter_us delays before each read; every fail_every-th guess read (every
        read with ``demand_too``) reports a failure; the process exits abruptly, a request outstanding,
        once it has done ``die_after`` reads."""
        c = self.c
        c[rc.SEED] = seed
        c[rc.FAIL_DEMAND] = 1 if demand_too else 0
        c[rc.FAIL_EVERY] = fail_every
        c[rc.JITTER_US] = jitter_us
        c[rc.DIE_AFTER] = die_after

    def kill(self) -> None:
        """Test hook: kill the reader process now, as a crash would."""
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

    def close(self, timeout: float = 2.0) -> None:
        if self._closed:
            return
        self._closed = True
        self._dead = True
        if self.proc is not None:
            try:
                self.c[rc.STOP] = 1
                os.write(self._wake_w, b"\0")
            except (OSError, ValueError):
                pass
            try:
                self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        for fd in (self._wake_r, self._wake_w, self._fd):
            if fd >= 0:
                try:
                    os.close(fd)
                except OSError:
                    pass
        self._wake_r = self._wake_w = self._fd = -1
        # the mapping itself goes with the last view of it (the pool's slots)

    def __del__(self):
        try:
            self.close(0.5)
        except Exception:
            pass
