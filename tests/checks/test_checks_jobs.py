"""moerun.inspect, moerun.verify and moerun.score: each returns what its command's --json prints (timings aside)."""

from __future__ import annotations

from _jobs import as_json, cli_json, without

import moerun
from moerun.files.store import ModelStore
from moerun.runtime.budget import minimum_cap


def _smallest_cap(model) -> int:
    st = ModelStore.open(model)
    try:
        return minimum_cap(st.config, st.dense_nbytes, st.expert_nbytes, "even", st.codec.scratch_bytes())
    finally:
        st.close()


def test_inspect_returns_what_the_command_prints(small_model, capsys):
    result = moerun.inspect(small_model, check=True)
    assert isinstance(result, moerun.InspectResult) and result.ok and result.config.n_layers == 3
    code, doc = cli_json(capsys, "inspect", "--model", small_model, "--check")
    assert code == 0
    assert as_json(result.to_json()) == doc  # nothing in it is a timing


def _hit_rates_of_timed_rows_dropped(doc: dict) -> dict:
    """With prefetch on, which guesses arrive before their layer depends on the reader's timing, and so does
    the hit rate of those rows (never the numbers compared): the one field of verify's document measured anew."""
    for row in doc["results"]:
        if row["options"].get("prefetch"):
            row.pop("hit_rate", None)
    return doc


def test_verify_with_verify_s_own_settings_returns_what_the_command_prints(small_model, capsys):
    result = moerun.verify(small_model, prompts=2, max_new=4)
    assert isinstance(result, moerun.VerifyResult) and result.ok and len(result.outcomes) > 5
    code, doc = cli_json(capsys, "verify", "--model", small_model, "--prompts", 2, "--max-new", 4)
    assert code == 0
    assert _hit_rates_of_timed_rows_dropped(as_json(result.to_json())) == _hit_rates_of_timed_rows_dropped(doc)


def test_verify_of_one_given_setting_returns_what_the_command_prints(small_model, capsys):
    cap = _smallest_cap(small_model)
    result = moerun.verify(small_model, "stone river", max_new=6, temperature=0, mem_cap=cap, evict="lfu", prefetch=1,
                           link_speed="4GB/s")
    assert [o.setting.label for o in result.outcomes] == ["as given"] and result.ok
    code, doc = cli_json(capsys, "verify", "--model", small_model, "--prompt", "stone river", "--max-new", 6,
                         "--temperature", 0, "--mem-cap", cap, "--evict", "lfu", "--prefetch", 1, "--link-speed", "4GB/s")
    assert code == 0
    assert _hit_rates_of_timed_rows_dropped(as_json(result.to_json())) == _hit_rates_of_timed_rows_dropped(doc)


# measured anew on each run: the time in forward passes, the speed, the stalls, and the process's memory
SCORE_TIMINGS = ("forward_s", "tok_s", "stall_s", "peak_rss_growth_bytes", "reader_rss_bytes", "cap_exceeded")


def test_score_returns_what_the_command_prints(small_model, tmp_path, capsys):
    text = tmp_path / "text.txt"
    text.write_text("the bright lamp runs under the cold river; " * 20)
    cap = _smallest_cap(small_model)
    result = moerun.score(small_model, text, max_tokens=300, mem_cap=cap, evict="lru", prefetch=1)
    assert isinstance(result, moerun.ScoreResult) and result.score.predicted == 300
    code, doc = cli_json(capsys, "score", "--model", small_model, "--text", text, "--max-tokens", 300,
                         "--mem-cap", cap, "--prefetch", 1)
    assert code == 0
    assert without(as_json(result.to_json()), *SCORE_TIMINGS) == without(doc, *SCORE_TIMINGS)
