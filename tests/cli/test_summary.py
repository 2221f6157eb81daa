"""moerun.cli.summary: the cap check and the caveats printed with a run.

The cap check compares the measured peak resident-set growth with the cap plus a fixed allowance
(docs/guide/offload.md, "What the cap covers"); the figures here are the check's own inputs, fed directly.
"""

from __future__ import annotations

from types import SimpleNamespace

from moerun.cli.summary import CAP_ALLOWANCE_BYTES, NOT_ADVICE, RANDOM_NOTE, cap_check, cap_warning, model_note

MiB = 1 << 20


def _engine(cap, growth):
    return SimpleNamespace(budget=SimpleNamespace(cap=cap), memwatch=SimpleNamespace(peak_growth=lambda: growth))


def test_no_cap_no_check():
    assert cap_check(_engine(None, 10 * MiB)) is None and cap_warning(_engine(None, 10 * MiB)) is None


def test_growth_up_to_the_cap_plus_the_allowance_passes_and_one_byte_more_is_flagged():
    cap = 20 * MiB
    at = cap_check(_engine(cap, cap + CAP_ALLOWANCE_BYTES))
    assert at == {"cap_bytes": cap, "allowance_bytes": CAP_ALLOWANCE_BYTES,
                  "peak_rss_growth_bytes": cap + CAP_ALLOWANCE_BYTES, "exceeded": False}
    assert cap_warning(_engine(cap, cap + CAP_ALLOWANCE_BYTES)) is None
    over = _engine(cap, cap + CAP_ALLOWANCE_BYTES + 1)
    assert cap_check(over)["exceeded"] is True
    line = cap_warning(over)
    assert "exceeded the memory cap" in line and "\n" not in line


def test_a_synthetic_model_says_its_routing_is_meaningless():
    assert model_note(SimpleNamespace(extra={"synthetic": True}, arch="")) == RANDOM_NOTE
    assert model_note(SimpleNamespace(extra={"synthetic": True}, arch="olmoe")) == RANDOM_NOTE
    assert model_note(SimpleNamespace(extra={}, arch="")) == NOT_ADVICE


def test_an_open_checkpoints_text_is_not_called_a_toys():
    from moerun.cli.summary import OPEN_NOTE

    assert model_note(SimpleNamespace(extra={}, arch="qwen3_moe")) == OPEN_NOTE
    assert "not advice" not in OPEN_NOTE and "tiny" not in OPEN_NOTE
