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
