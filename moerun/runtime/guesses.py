"""Whether a guess is worth reading: the one judgement the decision core asks, in the live pool and the planner.

A guess costs the compute thread something whether or not it is used (placing it, handing it
over, the reader's copy competing with compute, and a copy of its own when the reader is late).
It saves its layer the read time it would otherwise wait for, if the layer uses it.  ``Timing``
keeps the running figures the judgement needs, measured as the run goes (or, in the planner,
simulated); ``guess_pays`` and ``worth_guessing`` are the judgement itself.
"""

from __future__ import annotations


class Timing:
    """Running averages (1/8 or 1/16 weight) the pool judges guesses by: one read's time, one copy's
    time, the time from a layer's prefetch point to the next layer's routing, the share of read
    guesses a layer then used (``precision``), and the share of used guesses the compute thread had
    to copy itself because the reader had not (``late``)."""

    __slots__ = ("read_ns", "copy_ns", "gap_ns", "mark", "outstanding", "every_ns", "last_point", "precision", "late")

    def __init__(self, read_ns: float):
        self.read_ns = read_ns
        self.copy_ns = 50_000.0  # a copy from the page cache, before any is measured
        self.gap_ns = 0.0
        self.mark = 0  # time of the last prefetch point
        self.outstanding = 0  # guess reads handed to the reader and not settled
        self.every_ns = 0.0  # time from one prefetch point to the next
        self.last_point = 0
        self.precision = 0.6  # before any outcome is seen: about the router's first guess on the bundled model
        self.late = 0.5

    def need_at(self, now: float, layers_ahead: int) -> float:
        """When a layer ``layers_ahead`` from the current one will route; before any gap is measured, never
        (a first guess is taken to arrive in time)."""
        return now + self.gap_ns * layers_ahead if self.gap_ns else float("inf")

    def outcome(self, used: bool) -> None:
        self.precision += ((1.0 if used else 0.0) - self.precision) / 16

    def copied_here(self, late: bool) -> None:
        self.late += ((1.0 if late else 0.0) - self.late) / 16

    def point(self, now: int) -> int:
        """A prefetch point now: returns when the next one is expected."""
        if self.last_point and now - self.last_point < 50_000_000:
            self.every_ns += (now - self.last_point - self.every_ns) / 8
        self.last_point = now
        return now + int(self.every_ns)

    def copied(self, ns: int) -> None:
        self.copy_ns += (ns - self.copy_ns) / 8

    def observed(self, read_ns: int) -> None:
        self.read_ns += (read_ns - self.read_ns) / 8

    def layer_started(self, now: int) -> None:
        if self.mark:
            self.gap_ns += (now - self.mark - self.gap_ns) / 8
            self.mark = 0


def guess_pays(timing: Timing, read_ns: float, arrival_ns: float, need_ns: float, place_ns: float) -> bool:
    """Does reading a guess that would arrive at ``arrival_ns``, for a layer that needs it at ``need_ns``,
    pay?  The read time it would save if used (all of one read if it arrives in time, less its lateness
    if not), times the share of read guesses used so far, against what it costs the compute thread:
    ``place_ns`` and a copy of its own as often as the reader has been late."""
    late = max(0.0, arrival_ns - need_ns)
    return timing.precision * max(0.0, read_ns - late) > place_ns + timing.late * timing.copy_ns


def worth_guessing(timing: Timing, read_ns: float, place_ns: float) -> bool:
    """Could any guess pay, even one that arrives in time?  If not, the prefetch point is skipped."""
    return timing.precision * read_ns > place_ns + timing.late * timing.copy_ns
