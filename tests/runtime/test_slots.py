"""moerun.runtime.slots: the slot state machine (its one transition table) and the per-slot event record."""

from __future__ import annotations

import numpy as np
import pytest

from moerun.runtime.slots import EMPTY, HIT, LOADING, MISS, PENDING, READY, TRANSITIONS, IllegalTransition, Slot, State


def _slot(state=EMPTY) -> Slot:
    s = Slot(3, np.zeros(8, np.uint8), None)
    s.state = state
    return s


@pytest.mark.parametrize("name", sorted(TRANSITIONS))
@pytest.mark.parametrize("state", list(State), ids=lambda s: s.name)
def test_every_transition_goes_where_the_table_says_and_any_other_raises(name, state):
    s = _slot(state)
    method = getattr(s, name)
    args = {"claim": (1, 2, None), "arrive": (5, 4), "take_over": (5,), "fill": (5, 4)}.get(name, ())
    to = TRANSITIONS[name].get(state)
    if to is None:
        with pytest.raises(IllegalTransition, match=f"{name} from {state.name}"):
            method(*args)
        assert s.state == state  # an illegal transition changes nothing
    else:
        method(*args)
        assert s.state == to


def test_the_reader_owns_a_loading_slot_until_it_answers():
    # LOADING can only be left through the reader's answer or a take-over; never cleared or claimed
    for name in ("clear", "empty", "claim", "fill", "book", "hand_over"):
        assert LOADING not in TRANSITIONS[name]


def test_a_guess_read_here_while_the_reader_holds_it_is_owed_and_clear_forgets_the_expert():
    s = _slot()
    s.claim(1, 2, None)
    s.guess = True
    s.hand_over()
    s.take_over(at=7)
    assert (s.state, s.owed, s.ready_at) == (READY, True, 7)
    s.owed = False
    s.clear()
    assert (s.state, s.layer, s.expert, s.guess) == (EMPTY, -1, -1, False)
    s.claim(0, 5, None)
    s.book()
    assert s.state == PENDING
    s.empty()
    assert (s.state, s.layer, s.expert) == (EMPTY, 0, 5)  # left for its layer to read


def test_each_slot_has_one_event_record_naming_it_and_reset_keeps_the_slot():
    s = _slot()
    ev = s.event
    assert (ev.kind, ev.slot) == (HIT, 3)
    ev.stall_ns = ev.pagein_ns = 9
    assert s.event.reset(MISS) is ev and (ev.kind, ev.slot, ev.pagein_ns, ev.stall_ns) == (MISS, 3, 0, 0)
