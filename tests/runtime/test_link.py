"""moerun.runtime.link: the emulated link's schedule, one channel on a virtual clock.

Queueing on one server with priorities at chunk boundaries (non-preemptive within a
chunk) is common practice, no source; the figures below are worked by hand.
"""

from __future__ import annotations

import pytest

from moerun.runtime.link import Link

MS = 1_000_000


def test_transfers_queue_back_to_back_whatever_the_time_they_are_looked_at():
    link = Link(rate=1e9, chunk=1 << 30)  # 1 byte per ns
    ts = [link.book(1 * MS, 0, True) for _ in range(3)]  # three 1 MB reads asked at t = 0
    # asked about much later (a late wake-up): the schedule does not move
    assert [link.ends(t, 50 * MS) for t in ts] == [1 * MS, 2 * MS, 3 * MS]
    assert [t.start for t in ts] == [0, 1 * MS, 2 * MS]


def test_a_transfer_asked_while_the_link_is_idle_starts_when_asked():
    link = Link(rate=1e9, chunk=1 << 30)
    a = link.book(1 * MS, 0, True)
    b = link.book(1 * MS, 5 * MS, True)  # the link has been idle since 1 ms
    assert link.ends(a, 10 * MS) == 1 * MS
    assert (b.start, link.ends(b, 10 * MS)) == (5 * MS, 6 * MS)


def test_an_urgent_read_goes_before_queued_guesses_at_the_next_chunk_boundary():
    link = Link(rate=1e9, chunk=MS // 2)  # 0.5 ms chunks
    g1 = link.book(1 * MS, 0, False)  # a guess, started at 0: its first chunk ends at 0.5 ms
    g2 = link.book(1 * MS, 0, False)
    d = link.book(1 * MS, MS // 4, True)  # a layer's own miss, asked at 0.25 ms
    assert link.ends(d, MS // 4) == MS // 2 + 1 * MS  # after g1's chunk in progress, before the rest of g1
    assert link.ends(g1, MS // 4) == 2 * MS  # g1's second chunk waits for d
    assert link.ends(g2, MS // 4) == 3 * MS


def test_promoting_a_guess_moves_it_ahead_of_earlier_guesses():
    link = Link(rate=1e9, chunk=1 << 30)
    d = link.book(1 * MS, 0, True)
    g1 = link.book(1 * MS, 0, False)
    g2 = link.book(1 * MS, 0, False)
    link.promote(g2, 0)
    assert link.ends(d, 0) == 1 * MS
    assert link.ends(g2, 0) == 2 * MS and link.ends(g1, 0) == 3 * MS


def test_a_dropped_guess_that_had_not_started_takes_no_link_time():
    link = Link(rate=1e9, chunk=1 << 30)
    link.book(1 * MS, 0, True)
    g = link.book(1 * MS, 0, False)
    b = link.book(1 * MS, 0, False)
    assert link.drop(g, MS // 2) is True
    assert link.ends(b, MS // 2) == 2 * MS
    started = link.book(1 * MS, 10 * MS, False)
    link.run(10 * MS)
    assert link.drop(started, 10 * MS + 1) is False  # begun: it runs to its end
    assert link.busy_ns == 3 * MS


def test_a_dropped_transfer_that_has_begun_runs_to_its_end_over_several_chunks():
    # a 9 MiB expert over 1 MiB chunks (an open checkpoint's size): dropped after its first chunk, it stays booked
    # and arrives, as the pool and the planner assume when drop says False (they keep its expert and ask when)
    link = Link(rate=1e9, chunk=1 << 20)
    t = link.book(9 << 20, 0, False)
    link.run(0)
    assert t.started and t.end < 0
    assert link.drop(t, 1) is False
    assert link.ends(t, 1) == link.ns(9 << 20)
    link.run(link.ns(9 << 20))
    assert t.end == link.ns(9 << 20) and link.busy_ns == link.ns(9 << 20)


def test_a_read_slower_than_the_link_holds_the_channel_until_it_ends():
    link = Link(rate=1e9, chunk=1 << 30)
    a = link.book(1 * MS, 0, True)
    link.run(0)
    link.hold(a, 4 * MS)  # the bytes really took 4 ms (a cold read)
    b = link.book(1 * MS, 2 * MS, True)
    assert a.end == 4 * MS and link.ends(b, 2 * MS) == 5 * MS


def test_a_link_needs_a_positive_rate():
    with pytest.raises(ValueError):
        Link(rate=0)


def test_prefetch_over_an_emulated_link_with_experts_of_several_chunks_keeps_going(tmp_path):
    """Experts larger than a link chunk (1 MiB): a guess dropped after its first chunk still arrives; the live pool
    and the planner's time model used to ask when it ends and find it no longer booked (ValueError)."""
    import numpy as np

    import moerun
    from moerun.makers.synth_open import OpenShape, synthesize_open
    from moerun.model.sampling import Sampling
    from moerun.runtime.budget import minimum_cap

    d = tmp_path / "ck"
    synthesize_open(d, OpenShape("olmoe", layers=3, experts=8, hidden=256, expert_width=2048, top_k=2, heads=4,
                                 kv_heads=2, context=256), seed=1)  # 3 MiB experts
    with moerun.load(d) as eng:
        want = eng.generate(prompt_ids=list(range(2, 20)), max_new=24, sampling=Sampling(seed=3), keep_logits=True)
        s = eng.store
    with moerun.load(d, tokenizer=False, expert_slots="stored") as eng:
        s = eng.store
        cap = minimum_cap(s.config, s.dense_nbytes, s.expert_nbytes, "even", s.codec.scratch_bytes(), s.slot_nbytes)
    with moerun.load(d, mem_cap=cap + 2 * s.slot_nbytes, prefetch=2, link_speed="200MB/s") as eng:
        got = eng.generate(prompt_ids=list(range(2, 20)), max_new=24, sampling=Sampling(seed=3), keep_logits=True)
        assert eng.pool.stats.prefetch_guesses > 0
    assert got.new_ids == want.new_ids and all(np.array_equal(a, b) for a, b in zip(got.logits, want.logits))
