"""moerun.record and moerun.replay: each returns what its command's --json prints (timings aside)."""

from __future__ import annotations

import numpy as np
import pytest
from _jobs import as_json, cli_json, without

import moerun
from moerun.files.trace import read_trace


@pytest.fixture(scope="module")
def text_file(tmp_path_factory):
    d = tmp_path_factory.mktemp("text")
    rng = np.random.default_rng(7)
    words = ["stone", "river", "lamp", "the", "a", "bright", "cold", "runs", "under", "over"]
    (d / "text.txt").write_text(" ".join(rng.choice(words, 120)))
    return d / "text.txt"


def test_record_returns_what_the_command_prints(small_model, text_file, tmp_path, capsys):
    out = tmp_path / "rec.npz"
    result = moerun.record(out, small_model, text_file, max_tokens=200)
    assert isinstance(result, moerun.RecordResult) and result.tokens == read_trace(out).n_tokens
    code, doc = cli_json(capsys, "record", "--model", small_model, "--text", text_file, "--trace", out,
                         "--max-tokens", 200, "--force")
    assert code == 0
    # seconds and tok_s: the time of each run
    assert without(as_json(result.to_json()), "seconds", "tok_s") == without(doc, "seconds", "tok_s")


@pytest.mark.parametrize("extra", [
    {},
    {"slots": [1, 2, 4], "prefetch": 2, "lookahead": 2, "evict": ["lru", "optimal"], "expert_bytes": "1MiB"},
    {"shared_pool": True, "baselines": False, "seed": 3},
])
def test_replay_returns_what_the_command_prints(small_model, text_file, tmp_path, capsys, extra):
    trace = tmp_path / "rec.npz"
    moerun.record(trace, small_model, text_file)
    result = moerun.replay(str(trace), **extra)
    assert isinstance(result, moerun.ReplayResult)
    argv = ["replay", "--routing", trace]
    for key, value in extra.items():
        flag = "--" + key.replace("_", "-")
        if key == "baselines":
            argv.append("--no-baselines")
        elif value is True:
            argv.append(flag)
        else:
            argv += [flag, ",".join(map(str, value)) if isinstance(value, list) else value]
    code, doc = cli_json(capsys, *argv)
    assert code == 0
    assert as_json(result.to_json()) == doc  # nothing in it is a timing


def test_record_under_a_cap_writes_the_routing_a_resident_record_writes(tmp_path):
    """A model larger than memory is recorded under --mem-cap: the same experts, weights and guesses, bit for bit."""
    from pathlib import Path

    d = Path(__file__).resolve().parent.parent / "fixtures" / "open" / "qwen2_moe-bf16-sharded-v4"
    text = d.parent / "README.md"
    moerun.record(tmp_path / "resident.npz", d, text, max_tokens=300)
    moerun.record(tmp_path / "capped.npz", d, text, max_tokens=300, mem_cap="1900KiB")
    a, c = read_trace(tmp_path / "resident.npz"), read_trace(tmp_path / "capped.npz")
    assert np.array_equal(a.experts, c.experts) and np.array_equal(a.weights, c.weights)
    assert np.array_equal(a.guesses, c.guesses)
    short = moerun.record(tmp_path / "short.npz", d, text, max_tokens=300, mem_cap="1900KiB", max_context=96)
    assert short.window_tokens == 96 and not short.window_bos  # this tokenizer puts no bos token before a text
