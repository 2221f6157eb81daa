"""An emulated link between storage and the pool: one channel, on a virtual clock, like a DMA engine.

``--link-speed RATE`` makes every expert read take ``nbytes / RATE`` on one
shared channel.  The channel's schedule is kept here, by the engine, as
numbers: a transfer starts when the channel frees (or when it was asked for,
if later) and ends ``nbytes / rate`` after; the next one starts there.  No CPU
is occupied meanwhile, and a late wake-up of whoever copies the bytes or waits
for them delays only that waiter, never the channel.

Transfers go in chunks of at most ``chunk`` bytes.  When the channel frees,
the next chunk goes to the first *urgent* transfer asked for by then (a layer
waits for it: a demand read, or a guess the layer now uses), else to the first
other one (a guess).  A guess whose layer has started without it is dropped:
if none of its chunks has started it never takes channel time; one that has begun runs to its end.

The same schedule serves the live pool (``moerun.runtime.pool``) and the planner's
simulation (``moerun.planner.search``), so both follow one rule.  Times are integers in
nanoseconds on any monotonic clock (the planner uses its own).
"""

from __future__ import annotations

from dataclasses import dataclass

CHUNK = 1024 * 1024  # a bundled expert (384 KiB) goes whole; a large model's experts are split


@dataclass(eq=False, slots=True)
class Transfer:
    nbytes: int
    asked: int  # when it was asked for
    urgent: bool  # a layer waits for it
    moved: int = 0  # bytes whose chunk has started
    start: int = -1  # start of its first chunk (-1: not started)
    end: int = -1  # end of its last chunk (-1: not all chunks started yet)
    dropped: bool = False

    @property
    def started(self) -> bool:
        return self.start >= 0


class Link:
    """The channel's schedule: ``book`` a transfer, ``promote`` or ``drop`` it, ask when it ``ends``."""

    def __init__(self, rate: float, chunk: int = CHUNK):
        if not rate > 0:
            raise ValueError(f"link rate must be positive, got {rate!r}")
        self.rate = rate
        self.chunk = chunk
        self.queue: list[Transfer] = []  # booked, with chunks not started yet, in the order asked
        self.free_at = 0  # end of the last chunk started
        self.busy_ns = 0  # channel time of every chunk started so far

    def ns(self, nbytes: int) -> int:
        return int(nbytes / self.rate * 1e9)

    def _next(self, queue: list[Transfer], free_at: int) -> tuple[Transfer, int] | None:
        """The transfer whose chunk goes next, and when it starts; None with nothing booked."""
        if not queue:
            return None
        first = min(t.asked for t in queue)
        at = max(free_at, first)
        best = None
        for t in queue:
            if t.asked <= at:
                if t.urgent:
                    return t, at
                if best is None:
                    best = t
        return best, at

    def run(self, now: int) -> None:
        """Start every chunk whose turn comes at or before ``now`` (they cannot be undone)."""
        q = self.queue
        while q:
            nxt = self._next(q, self.free_at)
            t, at = nxt
            if at > now:
                return
            k = min(self.chunk, t.nbytes - t.moved)
            if t.start < 0:
                t.start = at
            t.moved += k
            d = self.ns(k)
            self.free_at = at + d
            self.busy_ns += d
            if t.moved >= t.nbytes:
                t.end = self.free_at
                q.remove(t)

    def book(self, nbytes: int, now: int, urgent: bool) -> Transfer:
        self.run(now)
        t = Transfer(nbytes, now, urgent)
        self.queue.append(t)
        return t

    def promote(self, t: Transfer, now: int) -> None:
        """A layer now waits for this transfer: its chunks go before other guesses'."""
        self.run(now)
        t.urgent = True

    def drop(self, t: Transfer, now: int) -> bool:
        """Nobody wants the transfer any more: if none of it has started, it is cancelled (True: it never
        takes channel time).  One that has begun runs to its end, its later chunks included (False): the
        callers keep its expert, which arrives, and ask when (``ends``)."""
        self.run(now)
        if t.started:
            return False
        t.dropped = True
        if t in self.queue:
            self.queue.remove(t)
        return True

    def hold(self, t: Transfer, until: int) -> None:
        """The bytes of ``t`` really arrived only at ``until`` (a read slower than the emulated link):
        the transfer, and the channel, are busy until then."""
        if t.end >= 0 and until > t.end:
            t.end = until
            self.free_at = max(self.free_at, until)

    def ends(self, t: Transfer, now: int) -> int:
        """When ``t`` ends if nothing else is booked meanwhile (exact once its last chunk started)."""
        self.run(now)
        if t.end >= 0:
            return t.end
        q = list(self.queue)
        free_at = self.free_at
        moved = {id(x): x.moved for x in q}
        while q:
            x, at = self._next(q, free_at)
            k = min(self.chunk, x.nbytes - moved[id(x)])
            moved[id(x)] += k
            free_at = at + self.ns(k)
            if moved[id(x)] >= x.nbytes:
                if x is t:
                    return free_at
                q.remove(x)
        raise ValueError("the transfer is not booked on this link")

    def backlog_until(self, now: int) -> int:
        """When every transfer booked so far would be done, if nothing else were booked."""
        self.run(now)
        end = max(self.free_at, now)
        for t in self.queue:
            end = max(end, t.asked) + self.ns(t.nbytes - t.moved)
        return end
