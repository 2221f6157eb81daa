"""Waiting for a moment on the monotonic clock without spinning: the end of an emulated transfer.

An emulated link says when a transfer ends; the compute thread then has to
wait until that moment.  A plain sleep here wakes 30-110 us late (measured on
a 2-vCPU VM with 1 ns timer slack), which would add a delay no real link has
to every wait, and spinning out the last part of the wait would burn a CPU
that other programs on the machine need.  So ``wait_until`` sleeps for the
time left minus its current estimate of how late a sleep wakes (learned from
every sleep it makes), and returns at the deadline on average.  When less
than half that estimate is left it returns at once: it never spins.

``waits`` keeps the count of waits and the sum and largest of how far each
ended from its deadline, so outputs can say how faithful the emulation was.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass

LEAD_START_NS = 50_000  # first guess of a sleep's lateness, before any is measured
LEAD_MAX_NS = 300_000
_timer = threading.local()


def fine_timer() -> None:
    """Ask Linux for 1 ns timer slack on this thread (default 50 us), so sleeps end as close as they can."""
    if getattr(_timer, "done", False):
        return
    _timer.done = True
    try:
        import ctypes

        ctypes.CDLL(None).prctl(29, 1, 0, 0, 0)  # PR_SET_TIMERSLACK
    except (OSError, AttributeError):
        pass


@dataclass
class WaitStats:
    """How emulated waits ended against their deadlines (positive: late)."""

    count: int = 0
    error_ns: int = 0  # sum of (end - deadline)
    worst_late_ns: int = 0
    lead_ns: int = LEAD_START_NS  # the current estimate of a sleep's lateness

    @property
    def mean_error_ns(self) -> float:
        return self.error_ns / self.count if self.count else 0.0

    def to_json(self) -> dict:
        return {"waits": self.count, "mean_end_error_us": self.mean_error_ns / 1e3, "worst_late_us": self.worst_late_ns / 1e3,
                "sleep_lateness_us": self.lead_ns / 1e3}


waits = WaitStats()


def wait_until(deadline_ns: int) -> int:
    """Sleep until monotonic time ``deadline_ns`` (on average); returns the ns actually waited."""
    t0 = time.monotonic_ns()
    left = deadline_ns - t0
    if left <= 0:
        return 0
    w = waits
    if 2 * left > w.lead_ns:
        fine_timer()
        target = max(t0, deadline_ns - w.lead_ns)
        time.sleep((target - t0) / 1e9)
        end = time.monotonic_ns()
        if target > t0:
            w.lead_ns = min(LEAD_MAX_NS, max(0, w.lead_ns + (end - target - w.lead_ns) // 8))
    else:
        end = t0  # less than half a sleep's lateness left: going on now ends closer to the deadline
    err = end - deadline_ns
    w.count += 1
    w.error_ns += err
    if err > w.worst_late_ns:
        w.worst_late_ns = err
    return end - t0
