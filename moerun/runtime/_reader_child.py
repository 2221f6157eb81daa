"""The reader process: copies guessed experts into the shared pool for the engine (standard library only).

``moerun.runtime.reader.Reader`` starts this file as ``python -I -S reader_child.py ...``
with inherited descriptors: the shared memory (control words, then the
pool's slots), the model's weight files (one, or an open checkpoint's shards), and two doorbells (eventfds): one the engine
rings when this process is blocked and a request comes, one this process rings
after each result.  The layout of the control words is defined here and
imported by the parent, so both sides read one definition.

The engine's compute thread writes requests into a ring and goes on computing;
this process reads them in the order asked (a request the engine has promoted,
because a layer now waits for it, first), skips those the engine has cancelled
before they started, copies each expert's bytes into its slot in chunks, and
publishes the result by writing the request's generation into the slot's
``DONE`` word last.  It only moves bytes: an emulated link's timing is kept by
the engine (``moerun.runtime.link``), so how quickly this process wakes up never
changes when a transfer ends.

Nothing spins.  After its last request this process naps (``LINGER_NS``, in
``LINGER_NAP_S`` sleeps) and then blocks on its doorbell; the engine, waiting
for a result, blocks on its own.

Being a separate process, it never competes for the engine's interpreter lock;
that is its whole point (a reader thread costs the compute thread tens of
microseconds per read on a 2-vCPU machine, see docs/design/prefetch.md).  It exits when
told to stop, when the engine's process is gone, or when its descriptors fail.  On Linux the
kernel also ends it when the engine's thread that started it ends (a parent-death signal,
SIGKILL), so a reader that is stopped (SIGSTOP) or stuck cannot outlive its engine.
"""

from __future__ import annotations

import ctypes
import mmap
import os
import random
import select
import sys
import time

# control words (int64) at the start of the shared memory
HEAD = 0  # requests written by the engine
BLOCKED = 1  # the reader is blocked on its doorbell: the engine rings it after a request
STOP = 2  # the engine asks the reader to exit
BEAT = 4  # chunks copied so far: the engine's proof that this process is making progress
JITTER_US = 5  # test hook: a random delay of 0..JITTER_US microseconds before each read
SEED = 6  # test hook: seed of those delays
FAIL_EVERY = 7  # test hook: every FAIL_EVERY-th read reports a failure
READS = 8  # reads done
PID = 9  # the reader's pid, written once it is serving
DIE_AFTER = 11  # test hook: the process exits abruptly when it takes a request after this many reads
PUBLISHED = 12  # results published (read, failed or skipped)
EXPECT = 13  # when the engine expects to ask for more (monotonic ns): a lingering reader sleeps till then
SLOT0 = 16  # per-slot words start here
PER_SLOT = 8
DONE, RESULT, START, NS, PROMOTE, CANCEL = range(6)  # offsets within a slot's words
ENTRY = 8  # words per ring entry: slot, gen, offset, nbytes, file, at, last
# A request is one entry or several in a row (an expert stored in several places): each copies ``nbytes`` from
# byte ``offset`` of weight file ``file`` to byte ``at`` of the slot, and the one with ``last`` set ends it.
OK, SKIPPED, FAILED = 1, 2, 3

CHUNK = 1024 * 1024  # copies go in chunks, so a cancel or a promotion is seen within one chunk
# After its last request the reader lingers this long before it blocks on its doorbell.  While it
# lingers the engine does not ring: waking a blocked process on another vCPU costs the waker
# 12-80 us on a 2-vCPU VM (measured), more than a guess is worth.  Lingering is sleeping: until
# the moment the engine said it expects to ask again (EXPECT), then naps that double from
# LINGER_NAP_S up to LINGER_NAP_MAX_S.  Each wake-up costs this process tens of microseconds here.
LINGER_NS = 5_000_000
LINGER_NAP_S = 0.0001
LINGER_NAP_MAX_S = 0.0008
# A request can slip past the moment the reader blocks (the engine saw it still lingering), so
# the first block after lingering is short.
FIRST_BLOCK_S = 0.001
# The reader runs at the lowest priority: on an idle core it runs as soon as it wakes, and on a busy
# machine it never takes a core from the engine or another program (the engine copies what it has
# not reached in time itself).
NICE = 19
IDLE_CHECK_S = 0.05  # while blocked, look this often whether the engine's process is still there


def ctrl_words(n_slots: int, ring: int) -> int:
    return SLOT0 + PER_SLOT * n_slots + ENTRY * ring


def ring_base(n_slots: int) -> int:
    return SLOT0 + PER_SLOT * n_slots


def ctrl_bytes(n_slots: int, ring: int) -> int:
    return -(-ctrl_words(n_slots, ring) * 8 // 4096) * 4096


def drain(fd: int) -> None:
    """Reset an eventfd doorbell (non-blocking)."""
    try:
        os.read(fd, 8)
    except BlockingIOError:
        pass


class Request:
    """One expert to copy: its pieces ((file, offset, nbytes, at) each), copied in order, a chunk at a time."""

    __slots__ = ("slot", "gen", "pieces", "nbytes", "piece", "done", "start")

    def __init__(self, slot: int, gen: int):
        self.slot, self.gen = slot, gen
        self.pieces: list[tuple[int, int, int, int]] = []
        self.nbytes = 0
        self.piece = 0  # the piece being copied
        self.done = 0  # bytes of it copied so far
        self.start = 0


class Server:
    def __init__(self, mem_fd, model_fds, wake_fd, done_fd, n_slots, slot_size, ring, mechanism, parent):
        self.n_slots, self.slot_size, self.ring = n_slots, slot_size, ring
        self.cb = ctrl_bytes(n_slots, ring)
        self.mem = mmap.mmap(mem_fd, self.cb + n_slots * slot_size)
        mv = memoryview(self.mem)
        self.c = mv[: self.cb].cast("q")
        self.pool = mv[self.cb :]
        self.fds = list(model_fds)
        self.wake_fd = wake_fd
        self.done_fd = done_fd
        # This process always reads with preadv, whatever the engine's own mechanism: a mapped copy
        # would die of SIGBUS if the file shrank under it, and nothing is mapped here to keep resident.
        self.mechanism = mechanism.split("+")[0]
        self.cold = mechanism.endswith("+cold")
        self.parent = parent
        self.r0 = ring_base(n_slots)
        self.pending: list[Request] = []
        self.partial: Request | None = None  # a request whose last entry has not been taken yet
        self.seen = 0
        self.rng = None
        self.seed = None
        self.nap = LINGER_NAP_S

    def word(self, slot: int, which: int) -> int:
        return self.c[SLOT0 + PER_SLOT * slot + which]

    # ------------------------------------------------------------------ requests
    def take(self) -> None:
        c = self.c
        h = c[HEAD]
        while self.seen < h:
            b = self.r0 + ENTRY * (self.seen % self.ring)
            slot, gen, offset, nbytes, file, at, last = c[b : b + 7].tolist()
            r = self.partial or Request(slot, gen)
            r.pieces.append((file, offset, nbytes, at))
            r.nbytes += nbytes
            self.partial = None if last else r
            if last:
                self.pending.append(r)
            self.seen += 1

    def pick(self) -> Request | None:
        """The first promoted request, else the first one asked; cancelled ones are skipped."""
        first = None
        for r in list(self.pending):
            if self.word(r.slot, CANCEL) == r.gen:
                self.pending.remove(r)
                self.publish(r, SKIPPED, 0, 0)
                continue
            if self.word(r.slot, PROMOTE) == r.gen:
                return r
            if first is None:
                first = r
        return first

    def publish(self, r: Request, result: int, start: int, ns: int) -> None:
        c = self.c
        b = SLOT0 + PER_SLOT * r.slot
        c[b + RESULT] = result
        c[b + START] = start
        c[b + NS] = ns
        c[b + DONE] = r.gen  # last: the engine reads the other words once it sees its generation here
        c[PUBLISHED] += 1
        try:
            os.write(self.done_fd, b"\1\0\0\0\0\0\0\0")  # ring the engine's doorbell (a counter bump unless it waits)
        except OSError:
            pass

    # ------------------------------------------------------------------ reads
    def read(self, slot: int, file: int, off: int, n: int, at: int) -> bool:
        """Read bytes [off, off + n) of weight file ``file`` into the slot at byte ``at`` (a short read is a failure)."""
        base = slot * self.slot_size + at
        dst = self.pool[base : base + n]
        try:
            fd = self.fds[file]
            got = 0
            while got < n:
                k = os.preadv(fd, [dst[got:]], off + got)
                if k == 0:
                    return False  # the file ended early (it shrank)
                got += k
            if self.cold:  # every read from the device: drop what was just read from the page cache
                os.posix_fadvise(fd, off, n, os.POSIX_FADV_DONTNEED)
            return True
        except (OSError, ValueError, IndexError):
            return False

    def advance(self, r: Request) -> None:
        """Copy the request's next chunk; publish the request when its last chunk is in or a read fails."""
        c = self.c
        if r.piece == 0 and r.done == 0:
            if c[DIE_AFTER] and c[READS] >= c[DIE_AFTER]:
                os._exit(70)  # a crash with this request outstanding
            jitter = c[JITTER_US]
            if jitter:
                if self.seed != c[SEED]:
                    self.seed = c[SEED]
                    self.rng = random.Random(self.seed)
                time.sleep(self.rng.uniform(0, jitter) / 1e6)
            r.start = time.monotonic_ns()
        file, offset, nbytes, at = r.pieces[r.piece]
        k = min(CHUNK, nbytes - r.done)
        ok = self.read(r.slot, file, offset + r.done, k, at + r.done)
        c[BEAT] += 1
        r.done += k
        if ok and r.done == nbytes and r.piece + 1 < len(r.pieces):
            r.piece += 1
            r.done = 0
        if ok and r.done < nbytes:
            return
        self.pending.remove(r)
        c[READS] += 1
        every = c[FAIL_EVERY]
        if ok and every and c[READS] % every == 0:
            ok = False
        self.publish(r, OK if ok else FAILED, r.start, time.monotonic_ns() - r.start)

    # ------------------------------------------------------------------ loop
    def alive_parent(self) -> bool:
        return os.getppid() == self.parent

    def idle(self, last_work: int) -> bool:
        """Nothing to do: linger, then block on the doorbell until the engine asks for something.
        False when the engine is gone."""
        c = self.c
        now = time.monotonic_ns()
        if now - last_work < LINGER_NS:
            wait = (c[EXPECT] - now) / 1e9
            if wait > LINGER_NAP_S:
                time.sleep(min(wait, LINGER_NAP_MAX_S))
                self.nap = LINGER_NAP_S
            else:
                time.sleep(self.nap)
                self.nap = min(2 * self.nap, LINGER_NAP_MAX_S)
            return True
        c[BLOCKED] = 1
        drain(self.wake_fd)  # a system call between raising the flag and reading HEAD again
        self.take()
        if not self.pending and not c[STOP]:
            select.select([self.wake_fd], [], [], FIRST_BLOCK_S)
            self.take()
            while not self.pending and not c[STOP] and self.alive_parent():
                select.select([self.wake_fd], [], [], IDLE_CHECK_S)
                drain(self.wake_fd)
                self.take()
        c[BLOCKED] = 0
        return self.alive_parent()

    def run(self) -> None:
        c = self.c
        try:  # background work: on a busy machine this process yields to everything else, the engine included
            os.nice(NICE)
        except OSError:
            pass
        c[PID] = os.getpid()
        last_work = 0  # so the reader blocks at once until the first request
        while not c[STOP]:
            self.take()
            r = self.pick() if self.pending else None
            if r is None:
                if not self.idle(last_work):
                    return
                continue
            self.advance(r)
            last_work = time.monotonic_ns()
            self.nap = LINGER_NAP_S


PR_SET_PDEATHSIG = 1  # prctl(2), <linux/prctl.h>
SIGKILL = 9


def die_with_parent(parent: int) -> bool:
    """Ask the kernel for SIGKILL when the engine goes (prctl PR_SET_PDEATHSIG): it is delivered
    whatever state this process is in, stopped included.  False when the engine is already gone
    (it may have died before the request took effect).  Elsewhere than Linux, the checks of
    ``alive_parent`` remain the only guard."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(PR_SET_PDEATHSIG, SIGKILL, 0, 0, 0)
    except (OSError, AttributeError):
        pass
    return os.getppid() == parent


def main(argv: list[str]) -> int:
    mem_fd, wake_fd, done_fd, n_slots, slot_size, ring = (int(argv[i]) for i in (0, 2, 3, 4, 5, 6))
    model_fds = [int(a) for a in argv[1].split(",")]
    mechanism = argv[7]
    parent = int(argv[8])
    if not die_with_parent(parent):
        return 0
    try:
        Server(mem_fd, model_fds, wake_fd, done_fd, n_slots, slot_size, ring, mechanism, parent).run()
    except KeyboardInterrupt:
        return 0
    except OSError:  # a descriptor of the engine's failed: the engine is gone or closing
        return 0
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
