"""moerun.runtime.guesses: whether a guess is worth reading, and the running figures the judgement uses.

The running figures are exponential moving averages with weight 1/8 or 1/16 (an EMA moves that share of
the way from its value to each new sample: common practice, no source); the judgement is checked on the
properties its docstring states, not on figures of its own.
"""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from moerun.runtime.guesses import Timing, guess_pays, worth_guessing


def test_running_figures_move_their_weight_of_the_way_to_each_sample():
    t = Timing(read_ns=800.0)
    t.observed(1600)
    assert t.read_ns == 800.0 + (1600 - 800) / 8
    p = t.precision
    t.outcome(True)
    assert t.precision == p + (1.0 - p) / 16
    for _ in range(400):
        t.observed(2000)
        t.copied(30_000)
    assert abs(t.read_ns - 2000) < 1e-6 and abs(t.copy_ns - 30_000) < 1e-3


def test_a_layer_that_is_never_measured_is_taken_to_need_its_guess_never():
    t = Timing(read_ns=1000.0)
    assert t.need_at(5.0, 2) == float("inf")
    t.mark = 100
    t.layer_started(900)
    assert t.gap_ns == 800 / 8 and t.need_at(0.0, 2) == 2 * t.gap_ns


@settings(max_examples=300, deadline=None)
@given(st.floats(1e3, 1e7), st.floats(0, 1e6), st.floats(0, 1), st.floats(0, 1), st.floats(0, 2e7))
def test_a_guess_in_time_pays_exactly_when_guessing_is_worth_it_and_a_later_one_never_pays_more(
        read_ns, place_ns, precision, late_share, lateness):
    t = Timing(read_ns)
    t.precision, t.late = precision, late_share
    in_time = guess_pays(t, read_ns, arrival_ns=0.0, need_ns=1.0, place_ns=place_ns)
    assert in_time == worth_guessing(t, read_ns, place_ns)
    late = guess_pays(t, read_ns, arrival_ns=1.0 + lateness, need_ns=1.0, place_ns=place_ns)
    assert not (late and not in_time)
    if lateness >= read_ns:  # it would arrive after a demand read would have: it saves nothing
        assert not late
