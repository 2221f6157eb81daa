"""The reader process: pages experts into the shared pool for the engine (standard library only).

``moerun.reader.Reader`` starts this file as ``python -I -S reader_child.py ...``
with four inherited descriptors: the shared memory (control words, then the
pool's slots), the model file, and two doorbells (eventfds): one the engine
rings after each request, one this process rings after each result.  The layout
of the control words is defined here and imported by the parent, so both sides
read one definition.

The engine's compute thread writes requests into a ring and goes on computing;
this process takes them in order of urgency (demand reads and promoted guesses
first, then guesses in the order they were made), drops guesses whose target
layer has already started without using them, reads each expert's bytes into
its slot, and publishes the result by writing the request's generation into the
slot's ``DONE`` word last.

Nothing spins.  With nothing to do this process blocks on its doorbell; the
engine, waiting for a result, blocks on its own.

An emulated link (``rate`` bytes/s) behaves like a DMA engine on a virtual
clock: a transfer occupies the link, not a CPU.  It starts when the link is
free or when it was asked for, whichever is later, and ends ``nbytes / rate``
after that; the next one starts there.  The bytes are copied at once and the
result is published with its end time (``USABLE``): the engine waits for that
time on its own clock.  This process only needs to be awake near the moments
the link frees, to choose what goes next, and it chooses a little ahead
(``COMMIT_AHEAD_NS``) so a late wake-up delays neither the link nor the waiter.
If a read takes longer than its emulated time (a cold file), the link ends when
the read does.

Being a separate process, it never competes for the engine's interpreter lock;
that is its whole point (a reader thread costs the compute thread tens of
microseconds per read on a 2-vCPU machine, see docs/offload.md).  It exits when
told to stop, when the engine's process is gone, or when its descriptors fail.
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
BEAT = 4  # chunks transferred so far: the engine's proof that this process is making progress
JITTER_US = 5  # test hook: a random delay of 0..JITTER_US microseconds before each read
SEED = 6  # test hook: seed of those delays
FAIL_EVERY = 7  # test hook: every FAIL_EVERY-th guess read reports a failure
READS = 8  # reads done
PID = 9  # the reader's pid, written once it is serving
FAIL_DEMAND = 10  # test hook: FAIL_EVERY counts demand reads too
DIE_AFTER = 11  # test hook: the process exits abruptly when it takes a request after this many reads
PUBLISHED = 12  # results published (read, failed or skipped)
SLOT0 = 16  # per-slot words start here
PER_SLOT = 8
DONE, RESULT, USABLE, START, NS, PROMOTE = range(6)  # offsets within a slot's words
ENTRY = 8  # words per ring entry: slot, gen, offset, nbytes, demand, target, asked (ns)
OK, SKIPPED, FAILED = 1, 2, 3

# Transfers go in chunks of at most this size, and an urgent read waits for one chunk at most.
# Smaller chunks measured no faster on the bundled model (64 KiB: about 3% slower), so a
# bundled expert (384 KiB) goes whole; a large model's experts are split.
CHUNK = 1024 * 1024
# With an emulated link, the next transfer is chosen this long before the link frees: a sleep
# here wakes 30-110 us late (measured on a 2-vCPU VM), and choosing late would idle the link.
COMMIT_AHEAD_NS = 150_000
IDLE_CHECK_S = 0.05  # while idle, look this often whether the engine's process is still there
FAULT_AROUND = 64 * 1024  # see moerun.store


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
    __slots__ = ("slot", "gen", "offset", "nbytes", "demand", "target", "asked", "done", "start")

    def __init__(self, words):
        self.slot, self.gen, self.offset, self.nbytes, self.demand, self.target, self.asked = words
        self.done = 0  # bytes transferred so far
        self.start = 0  # when its first chunk started


class Server:
    def __init__(self, mem_fd, model_fd, wake_fd, done_fd, n_slots, slot_size, ring, rate, mechanism, parent):
        self.n_slots, self.slot_size, self.ring = n_slots, slot_size, ring
        self.cb = ctrl_bytes(n_slots, ring)
        self.mem = mmap.mmap(mem_fd, self.cb + n_slots * slot_size)
        mv = memoryview(self.mem)
        self.c = mv[: self.cb].cast("q")
        self.pool = mv[self.cb :]
        self.fd = model_fd
        self.wake_fd = wake_fd
        self.done_fd = done_fd
        self.rate = rate
        self.map = mmap.mmap(model_fd, 0, prot=mmap.PROT_READ) if mechanism == "mmap" else None
        self.parent = parent
        self.r0 = ring_base(n_slots)
        self.pending: list[Request] = []
        self.link_free = 0  # virtual end of the emulated link's last transfer
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
            self.pending.append(Request(c[b : b + 7].tolist()))
            self.seen += 1

    def urgent(self, r: Request) -> bool:
        return bool(r.demand) or self.c[SLOT0 + PER_SLOT * r.slot + PROMOTE] == r.gen

    def pick(self, at: int) -> Request | None:
        """The request to advance at (virtual) time ``at``: among those asked for by then (or
        the first asked for, if none was), the first urgent one, else the first guess still
        fresh.  Guesses whose layer has started without them are dropped on the way, even
        half-read: their remaining chunks would only delay the reads that layer waits for."""
        progress = self.c[PROGRESS]
        while self.pending:
            first = min(r.asked for r in self.pending)
            now = max(at, first)
            ready = [r for r in self.pending if r.asked <= now]
            for r in ready:
                if self.urgent(r):
                    return r
            for r in ready:
                if r.target > progress:
                    return r
                self.pending.remove(r)
                self.publish(r, SKIPPED, 0, 0, 0)
        return None

    def publish(self, r: Request, result: int, usable: int, start: int, ns: int) -> None:
        c = self.c
        b = SLOT0 + PER_SLOT * r.slot
        c[b + RESULT] = result
        c[b + USABLE] = usable
        c[b + START] = start
        c[b + NS] = ns
        c[b + DONE] = r.gen  # last: the engine reads the other words once it sees its generation here
        c[PUBLISHED] += 1
        try:
            os.write(self.done_fd, b"\1\0\0\0\0\0\0\0")  # ring the engine's doorbell (a no-op unless it waits)
        except OSError:
            pass

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

    def advance(self, r: Request, at: int) -> None:
        """Transfer the request's next chunk, starting at ``at`` on the link's clock (or now, with
        no emulated link); publish the request when its last chunk is in or a read fails."""
        c = self.c
        if r.done == 0:
            if c[DIE_AFTER] and c[READS] >= c[DIE_AFTER]:
                os._exit(70)  # a crash with this request outstanding
            jitter = c[JITTER_US]
            if jitter:
                if self.seed != c[SEED]:
                    self.seed = c[SEED]
                    self.rng = random.Random(self.seed)
                time.sleep(self.rng.uniform(0, jitter) / 1e6)
        k = min(CHUNK, r.nbytes - r.done)
        start = max(at, r.asked) if self.rate else time.monotonic_ns()
        if r.done == 0:
            r.start = start
        ok = self.read(r.slot, r.offset + r.done, k, r.done)
        end = time.monotonic_ns()
        if self.rate:
            end = max(end, start + int(k / self.rate * 1e9))
            self.link_free = end
        c[BEAT] += 1
        r.done += k
        if ok and r.done < r.nbytes:
            return
        self.pending.remove(r)
        if ok and (not r.demand or c[FAIL_DEMAND]):
            self.counted_reads += 1
            every = c[FAIL_EVERY]
            if every and self.counted_reads % every == 0:
                ok = False
        self.publish(r, OK if ok else FAILED, end, r.start, end - r.start)
        c[READS] += 1

    # ------------------------------------------------------------------ loop
    def alive_parent(self) -> bool:
        return os.getppid() == self.parent

    def nap(self, until: int) -> None:
        """Sleep until monotonic ``until`` in slices, so a stop request or a dead engine is seen quickly."""
        while not self.c[STOP]:
            left = until - time.monotonic_ns()
            if left <= 0:
                return
            if left > 20_000_000 and not self.alive_parent():
                os._exit(0)
            time.sleep(min(left, 20_000_000) / 1e9)

    def idle(self) -> bool:
        """Block on the doorbell until the engine asks for something; False when the engine is gone."""
        drain(self.wake_fd)
        self.take()  # after the drain: a request written before it is seen here, a later one rings
        if self.pending or self.c[STOP]:
            return True
        select.select([self.wake_fd], [], [], IDLE_CHECK_S)
        return self.alive_parent()

    def run(self) -> None:
        c = self.c
        c[PID] = os.getpid()
        while not c[STOP]:
            self.take()
            if not self.pending:
                if not self.idle():
                    return
                continue
            if self.rate:
                now = time.monotonic_ns()
                if self.link_free - now > COMMIT_AHEAD_NS:
                    self.nap(self.link_free - COMMIT_AHEAD_NS)
                    continue
                at = self.link_free
            else:
                at = time.monotonic_ns()
            r = self.pick(at)
            if r is not None:
                self.advance(r, at)


def main(argv: list[str]) -> int:
    mem_fd, model_fd, wake_fd, done_fd, n_slots, slot_size, ring = (int(a) for a in argv[:7])
    rate = float(argv[7])
    mechanism = argv[8]
    parent = int(argv[9])
    try:
        Server(mem_fd, model_fd, wake_fd, done_fd, n_slots, slot_size, ring, rate, mechanism, parent).run()
    except KeyboardInterrupt:
        return 0
    except OSError:  # a descriptor of the engine's failed: the engine is gone or closing
        return 0
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
