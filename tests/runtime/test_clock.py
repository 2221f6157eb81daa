"""moerun.runtime.clock: waiting for an emulated transfer's end sleeps, never spins, and learns how late sleeps wake."""

from __future__ import annotations

import time

from moerun.runtime import clock


def test_waits_for_emulated_transfers_sleep_instead_of_spinning():
    # docs/design/architecture.md, invariants (nothing spins): a side with nothing to do blocks.  Spinning would use about all of the wall time.
    cpu0, t0 = time.process_time(), time.monotonic()
    for _ in range(40):
        clock.wait_until(time.monotonic_ns() + 5_000_000)
    cpu, wall = time.process_time() - cpu0, time.monotonic() - t0
    assert wall >= 40 * 0.005 * 0.9
    assert cpu < 0.2 * wall, f"{cpu:.3f} s of CPU during {wall:.3f} s of waiting"


def test_a_deadline_already_past_returns_at_once_and_waits_are_counted():
    n = clock.waits.count
    assert clock.wait_until(time.monotonic_ns() - 1_000) == 0
    waited = clock.wait_until(time.monotonic_ns() + 2_000_000)
    assert waited > 0 and clock.waits.count == n + 1  # the past deadline was no wait at all
    assert 0 <= clock.waits.lead_ns <= clock.LEAD_MAX_NS
    doc = clock.waits.to_json()
    assert set(doc) == {"waits", "mean_end_error_us", "worst_late_us", "sleep_lateness_us"}
