"""The reader process: pages experts into the shared pool for the engine (standard library only).

``moerun.reader.Reader`` starts this file as ``python -I -S reader_child.py ...``
with three inherited descriptors: the shared memory (control words, then the
pool's slots), the model file, and the read end of a doorbell pipe.  The layout
of the control words is defined here and imported by the parent, so both sides
read one definition.

The engine's compute thread writes requests into a ring and goes on computing;
this process takes them in order of urgency (demand reads and promoted guesses
first, then guesses in the order they were made), drops guesses whose target
layer has already started without using them, reads each expert's bytes into
its slot, and publishes the result by writing the request's generation into the
slot's ``DONE`` word last.  With an emulated link every read occupies one
channel for ``nbytes / rate`` seconds: the slot is usable from the end of that
window and the next read starts no earlier.

Being a separate process, it never competes for the engine's interpreter lock;
that is its whole point (a reader thread costs the compute thread tens of
microseconds per read on a 2-vCPU machine, see docs/offload.md).  It spins while
requests flow and blocks on the doorbell after ``SPIN_NS`` of idleness; it exits
when told to stop, when the engine's process is gone, or when its parent's
descriptors close.
"""

from __future__ import annotations

import mmap
import os
import random
import select
import sys
import time

# control words (int64) at the start of the shared memory
HEAD = 0  # requests written by the engine
STOP = 2  # the engine asks the reader to exit
PROGRESS = 3  # step * n_layers + layer of the layer the engine is computing
SLEEPING = 4  # the reader is blocked on the doorbell
JITTER_US = 5  # test hook: a random delay of 0..JITTER_US microseconds before each read
SEED = 6  # test hook: seed of those delays
FAIL_EVERY = 7  # test hook: every FAIL_EVERY-th guess read reports a failure
READS = 8  # reads done
PID = 9  # the reader's pid, written once it is serving
FAIL_DEMAND = 10  # test hook: FAIL_EVERY counts demand reads too
DIE_AFTER = 11  # test hook: the process exits abruptly when it takes a request after this many reads
SLOT0 = 16  # per-slot words start here
PER_SLOT = 8
DONE, RESULT, USABLE, START, NS, PROMOTE = range(6)  # offsets within a slot's words
ENTRY = 8  # words per ring entry: slot, gen, offset, nbytes, demand, target
OK, SKIPPED, FAILED = 1, 2, 3

SPIN_NS = 20_000_000  # spin this long after the last request before blocking on the doorbell
# Transfers go in chunks of at most this size, and an urgent read waits for one chunk at most.
# Smaller chunks measured no faster on the bundled model (64 KiB: about 3% slower), so a
# bundled expert (384 KiB) goes whole; a large model's experts are split.
CHUNK = 1024 * 1024
SPIN_TAIL_NS = 200_000  # see moerun.store.wait_until
FAULT_AROUND = 64 * 1024  # see moerun.store


def ctrl_words(n_slots: int, ring: int) -> int:
    return SLOT0 + PER_SLOT * n_slots + ENTRY * ring


def ring_base(n_slots: int) -> int:
    return SLOT0 + PER_SLOT * n_slots


def ctrl_bytes(n_slots: int, ring: int) -> int:
    return -(-ctrl_words(n_slots, ring) * 8 // 4096) * 4096


class Server:
    def __init__(self, mem_fd, model_fd, wake_fd, n_slots, slot_size, ring, rate, mechanism, parent):
        self.n_slots, self.slot_size, self.ring = n_slots, slot_size, ring
        self.cb = ctrl_bytes(n_slots, ring)
        self.mem = mmap.mmap(mem_fd, self.cb + n_slots * slot_size)
        mv = memoryview(self.mem)
        self.c = mv[: self.cb].cast("q")
        self.pool = mv[self.cb :]
        self.fd = model_fd
        self.wake_fd = wake_fd
        os.set_blocking(wake_fd, False)
        self.rate = rate
        self.map = mmap.mmap(model_fd, 0, prot=mmap.PROT_READ) if mechanism == "mmap" else None
        self.parent = parent
        self.r0 = ring_base(n_slots)
        self.pending: list[list[int]] = []
        self.link_free = 0  # end of the emulated channel's last chunk while work is queued, else 0
        self.seen = 0
        self.counted_reads = 0
        self.rng = None
        self.seed = None

    # ------------------------------------------------------------------ requests
    def take(self) -> None:
        c = self.c
        h = c[HEAD]
        while self.seen < h:
            b = self.r0 + ENTRY * (self.seen % self.ring)
            self.pending.append(c[b : b + 6].tolist() + [0, 0])  # + bytes done, start ns
            self.seen += 1

    def urgent(self, r) -> bool:
        return bool(r[4]) or self.c[SLOT0 + PER_SLOT * r[0] + PROMOTE] == r[1]

    def pick(self):
        """Request to advance: the first urgent one, else the first guess still fresh; stale guesses are dropped.

        A guess whose layer has started without it is dropped even half-read:
        its remaining chunks would only delay the reads that layer waits for.
        """
        for r in self.pending:
            if self.urgent(r):
                return r
        progress = self.c[PROGRESS]
        while self.pending:
            r = self.pending[0]
            if r[5] > progress or self.urgent(r):
                return r
            self.pending.pop(0)
            self.publish(r, SKIPPED, 0, 0, 0)
        return None

    def publish(self, r, result, usable, start, ns) -> None:
        c = self.c
        b = SLOT0 + PER_SLOT * r[0]
        c[b + RESULT] = result
        c[b + USABLE] = usable
        c[b + START] = start
        c[b + NS] = ns
        c[b + DONE] = r[1]  # last: the engine reads the other words once it sees its generation here

    # ------------------------------------------------------------------ reads
    def read(self, slot: int, off: int, n: int, at: int) -> bool:
        """Read file bytes [off, off + n) into the slot at byte ``at``."""
        base = slot * self.slot_size + at
        dst = self.pool[base : base + n]
        try:
            if self.map is None:
                return os.preadv(self.fd, [dst], off) == n
            if off + n > len(self.map) or off + n > os.fstat(self.fd).st_size:
                return False  # a shrunk file: touching pages past its end would kill this process
            dst[:] = memoryview(self.map)[off : off + n]
            lo = off - off % FAULT_AROUND
            hi = min(len(self.map), -(-(off + n) // FAULT_AROUND) * FAULT_AROUND)
            try:
                self.map.madvise(mmap.MADV_DONTNEED, lo, hi - lo)
            except (OSError, ValueError):
                pass
            return True
        except (OSError, ValueError):
            return False

    def advance(self, r) -> None:
        """Transfer the request's next chunk; publish it when its last chunk is in (or a read fails)."""
        c = self.c
        slot, off, n, done = r[0], r[2], r[3], r[6]
        if done == 0:
            if c[DIE_AFTER] and c[READS] >= c[DIE_AFTER]:
                os._exit(70)  # a crash with this request outstanding
            jitter = c[JITTER_US]
            if jitter:
                if self.seed != c[SEED]:
                    self.seed = c[SEED]
                    self.rng = random.Random(self.seed)
                time.sleep(self.rng.uniform(0, jitter) / 1e6)
                self.link_free = 0
        k = min(CHUNK, n - done)
        # back to back with the previous chunk while work is queued: this loop's own
        # overhead is not link time (a device queue would hold the next chunk already)
        start = self.link_free or time.monotonic_ns()
        if done == 0:
            r[7] = start
        ok = self.read(slot, off + done, k, done)
        now = time.monotonic_ns()
        end = max(now, start + int(k / self.rate * 1e9)) if self.rate else now
        self.link_free = end
        r[6] = done = done + k
        if ok and done < n:
            self.wait(end)
            return
        self.pending.remove(r)
        if ok and (not r[4] or c[FAIL_DEMAND]):
            self.counted_reads += 1
            every = c[FAIL_EVERY]
            if every and self.counted_reads % every == 0:
                ok = False
        self.publish(r, OK if ok else FAILED, end, r[7], end - r[7])
        c[READS] += 1
        if ok:
            self.wait(end)

    def wait(self, end: int) -> None:
        """The emulated channel is busy until ``end`` (as ``moerun.store.wait_until``)."""
        if not self.rate:
            return
        while True:  # long waits (a slow emulated link) in slices, so a stop request or a dead engine is seen quickly
            left = end - time.monotonic_ns()
            if left <= SPIN_TAIL_NS or self.c[STOP]:
                break
            if left > 20_000_000 and not self.alive_parent():
                os._exit(0)
            time.sleep(min(left - SPIN_TAIL_NS, 20_000_000) / 1e9)
        while time.monotonic_ns() < end and not self.c[STOP]:
            pass

    # ------------------------------------------------------------------ loop
    def alive_parent(self) -> bool:
        return os.getppid() == self.parent

    def run(self) -> None:
        c = self.c
        c[PID] = os.getpid()
        last = time.monotonic_ns()
        check_at = 0
        while not c[STOP]:
            self.take()
            if self.pending:
                r = self.pick()
                if r is not None:
                    self.advance(r)
                    last = time.monotonic_ns()
                continue
            self.link_free = 0  # idle: the next transfer starts when it is asked for
            now = time.monotonic_ns()
            if now >= check_at:
                if not self.alive_parent():
                    return
                check_at = now + 50_000_000
            if now - last < SPIN_NS:
                continue
            c[SLEEPING] = 1
            if c[HEAD] == self.seen and not c[STOP]:
                select.select([self.wake_fd], [], [], 0.05)
            c[SLEEPING] = 0
            try:
                while os.read(self.wake_fd, 4096):
                    pass
            except BlockingIOError:
                pass
            except OSError:
                return
            if not self.alive_parent():
                return


def main(argv: list[str]) -> int:
    mem_fd, model_fd, wake_fd, n_slots, slot_size, ring = (int(a) for a in argv[:6])
    rate = float(argv[6])
    mechanism = argv[7]
    parent = int(argv[8])
    try:
        Server(mem_fd, model_fd, wake_fd, n_slots, slot_size, ring, rate, mechanism, parent).run()
    except KeyboardInterrupt:
        return 0
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
