"""Huge inputs are worked on only as far as the context or --max-tokens needs (issue 23, item 1).

A prompt file far past the context is refused after reading and encoding its first pieces; score and
record with --max-tokens read the text only as far as those tokens need, and give the numbers of the text
cut by hand.  Each run is a child process, so its peak resident set is its own (``VmHWM``: ``ru_maxrss``
would keep the peak of the pytest process that forked it): a run on the huge text is compared with the
same run on a small one.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time

import pytest
from conftest import ROOT

pytestmark = pytest.mark.skipif(not os.path.exists("/proc/self/status"), reason="peak memory is read from /proc (Linux)")

HUGE_BYTES = 30 << 20  # the text whose whole reading (a str and its bytes: 60 MB and more) the runs must not show
WORDS = "the stone river runs under a bright cold lamp; Grüße aus Köln, 日本語 🦔\n"

# Runs moerun's command line in this interpreter and prints the exit code, the peak resident set and stdout.
_RUNNER = """
import io, json, sys
from contextlib import redirect_stdout
from moerun.cli.main import main
out = io.StringIO()
with redirect_stdout(out):
    code = main(sys.argv[1:])
with open("/proc/self/status") as f:
    peak = next(int(line.split()[1]) for line in f if line.startswith("VmHWM:"))
print(json.dumps({"code": code, "maxrss_kib": peak, "out": out.getvalue()}))
"""


def _run(*argv) -> tuple[dict, str, float]:
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    t0 = time.monotonic()
    proc = subprocess.run([sys.executable, "-c", _RUNNER, *map(str, argv)], capture_output=True, text=True, env=env,
                          timeout=300)
    elapsed = time.monotonic() - t0
    return json.loads(proc.stdout.strip().splitlines()[-1]), proc.stderr, elapsed


@pytest.fixture(scope="module")
def texts(tmp_path_factory):
    """A huge text of words, a huge text without a space, and the first 64 KiB of the first (cut by hand)."""
    d = tmp_path_factory.mktemp("huge")
    words = (WORDS * (HUGE_BYTES // len(WORDS.encode()) + 1)).encode()
    (d / "huge.txt").write_bytes(words[:HUGE_BYTES])
    (d / "head.txt").write_bytes(words[: 1 << 16].decode("utf-8", "ignore").encode())
    (d / "nospace.txt").write_bytes(b"x" * HUGE_BYTES)
    (d / "short-nospace.txt").write_bytes(b"x" * 5000)
    return d


def _mib(kib: int) -> float:
    return kib / 1024


@pytest.mark.parametrize("kind", ["huge", "nospace"])
def test_a_huge_prompt_file_is_refused_without_tokenizing_it_whole(small_model, texts, kind):
    # before: the whole file was read, decoded and encoded (a 10 MB file took 28 s, 100 MB 16 minutes and 2 GB)
    small = texts / ("head.txt" if kind == "huge" else "short-nospace.txt")
    doc_small, _, _ = _run("generate", "--model", small_model, "--prompt-file", small, "--max-new", "2")
    doc, err, elapsed = _run("generate", "--model", small_model, "--prompt-file", texts / f"{kind}.txt", "--max-new", "2")
    assert doc["code"] == 2 and doc["out"] == ""
    assert err.strip().splitlines() == [err.strip()] and "tokens exceed the model's context of 64" in err
    assert "at least" in err  # it stopped early: it never counted them all
    assert elapsed < 10, f"{elapsed:.1f} s"
    growth = _mib(doc["maxrss_kib"] - doc_small["maxrss_kib"])
    assert growth < 8, f"peak resident set {growth:.1f} MiB above the run on a small prompt (the file is 30 MiB)"


def test_verify_refuses_a_huge_prompt_file_without_tokenizing_it_whole(small_model, texts):
    doc, err, elapsed = _run("verify", "--model", small_model, "--prompt-file", texts / "huge.txt", "--max-new", "2")
    assert doc["code"] == 2 and "at least" in err and "exceed the model's context of 64" in err
    assert elapsed < 10, f"{elapsed:.1f} s"


@pytest.mark.parametrize("command", ["score", "record"])
def test_max_tokens_reads_a_huge_text_only_as_far_as_the_tokens_need_with_the_numbers_of_the_hand_cut_text(
        small_model, texts, tmp_path, command):
    # before: score --max-tokens 300 and record --max-tokens 300 read a 100 MB text whole (+202 MiB over the cap)
    def run(name: str):
        extra = ("--trace", tmp_path / f"{name}.npz") if command == "record" else ()
        doc, err, _ = _run(command, "--model", small_model, "--text", texts / name, "--max-tokens", 300, "--json", *extra)
        assert doc["code"] == 0, err
        return doc, json.loads(doc["out"])

    small, want = run("head.txt")
    huge, got = run("huge.txt")
    drop = {"score": ("text", "forward_s", "tok_s", "stall_s", "peak_rss_growth_bytes", "budget", "options"),
            "record": ("text", "trace", "seconds", "tok_s", "file_bytes")}[command]
    assert {k: v for k, v in got.items() if k not in drop} == {k: v for k, v in want.items() if k not in drop}
    key = "predicted_tokens" if command == "score" else "text_tokens"
    assert got[key] >= 299
    growth = _mib(huge["maxrss_kib"] - small["maxrss_kib"])
    assert growth < 8, f"peak resident set {growth:.1f} MiB above the run on the hand-cut text (the text is 30 MiB)"
    if command == "record":
        from moerun.files.trace import read_trace

        a, b = read_trace(tmp_path / "head.txt.npz"), read_trace(tmp_path / "huge.txt.npz")
        assert (a.experts == b.experts).all() and a.n_tokens == b.n_tokens


def test_a_text_valid_where_it_is_read_and_invalid_past_max_tokens_is_scored(small_model, texts, tmp_path):
    # only what is used is read and checked (docs/guide/hardening.md, inputs): the bad byte lies past the tokens asked for
    p = tmp_path / "late-bad.txt"
    p.write_bytes((texts / "head.txt").read_bytes() * 4 + b"\xff")
    doc, err, _ = _run("score", "--model", small_model, "--text", p, "--max-tokens", 300, "--json")
    assert doc["code"] == 0, err
    doc, err, _ = _run("score", "--model", small_model, "--text", p, "--json")
    assert doc["code"] == 2 and err.strip().splitlines() == [err.strip()] and "not UTF-8" in err and doc["out"] == ""
    trace = tmp_path / "t.npz"
    doc, err, _ = _run("record", "--model", small_model, "--text", p, "--trace", trace, "--json")
    assert doc["code"] == 2 and err.strip().splitlines() == [err.strip()] and "not UTF-8" in err and doc["out"] == ""
    assert not trace.exists() and list(tmp_path.iterdir()) == [p]  # no trace, partial or whole, and no temporary


def test_a_huge_prompt_given_to_the_engine_is_refused_without_encoding_it_whole(small_model):
    import moerun
    from moerun.errors import BadOption

    with moerun.load(small_model) as eng:
        t0 = time.monotonic()
        with pytest.raises(BadOption, match="^at least [0-9]+ tokens exceed the model's context of 64$"):
            eng.generate("stone river " * 3_000_000, max_new=1)
        assert time.monotonic() - t0 < 10
