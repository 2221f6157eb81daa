"""Progress of long commands on stderr when it is not a terminal, ``--json`` included (issue 23, item 17).

``moerun.cli.report.Progress`` is the one mechanism: a live line on a terminal; anywhere else a plain line
(no carriage return, no escape code) every ``MOERUN_PROGRESS_EVERY`` seconds (5 s by default), nothing at all
for a command that ends sooner; stdout keeps only its document.  The tests shorten the interval through the
environment variable instead of running for many seconds.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import time

import numpy as np
import pytest
from conftest import ROOT

from moerun.cli import report
from moerun.cli.report import Progress
from moerun.files.trace import Trace, write_trace

PLAIN = re.compile(r"^[a-z][^\r\x1b]*: .*\d+ s\b")


def _env(every: str | None) -> dict:
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    env.pop(report.PLAIN_EVERY_VARIABLE, None)
    if every is not None:
        env[report.PLAIN_EVERY_VARIABLE] = every
    return env


def _moerun(argv, every: str | None) -> subprocess.CompletedProcess:
    """``python -m moerun ARGV`` with stdout and stderr both pipes (not terminals)."""
    return subprocess.run([sys.executable, "-m", "moerun", *map(str, argv)], stdin=subprocess.DEVNULL,
                          capture_output=True, text=True, env=_env(every), timeout=300)


@pytest.fixture(scope="module")
def long_trace(tmp_path_factory):
    """A routing trace whose shared-pool replay takes a good fraction of a second here."""
    rng = np.random.default_rng(3)
    tokens, layers, experts, k = 1500, 4, 16, 2
    ex = np.sort(np.stack([rng.choice(experts, (k,), replace=False) for _ in range(tokens * layers)]), axis=1)
    path = tmp_path_factory.mktemp("progress") / "long.npz"
    write_trace(path, Trace(ex.reshape(tokens, layers, k).astype(np.int64), meta={"n_experts": experts, "prefill_tokens": 0}))
    return path


@pytest.mark.parametrize("json_flag", [["--json"], []])
def test_a_long_replay_writes_plain_progress_lines_to_a_pipe_and_json_only_on_stdout(long_trace, json_flag):
    proc = _moerun(["replay", "--routing", long_trace, "--shared-pool", "--generic", *json_flag], every="0.02")
    assert proc.returncode == 0, proc.stderr[-500:]
    assert "\r" not in proc.stderr and "\x1b" not in proc.stderr  # plain lines only: no live line, no escapes
    lines = proc.stderr.splitlines()
    assert len(lines) >= 2, proc.stderr
    assert all(PLAIN.match(line) and line.startswith("replay:") for line in lines), proc.stderr[-500:]
    if json_flag:
        doc = json.loads(proc.stdout)  # exactly one document: anything else on stdout would not parse
        assert doc["split"] == "shared"
    else:
        assert "hit rate" in proc.stdout and not re.search(r"^replay: \d+  \d+ s", proc.stdout, re.M)


def test_generate_json_writes_plain_progress_lines_and_one_document(small_model):
    proc = _moerun(["generate", "--model", small_model, "--prompt", "a", "--max-new", "200", "--json"], every="0.01")
    assert proc.returncode == 0, proc.stderr[-500:]
    lines = proc.stderr.splitlines()
    assert lines and all(PLAIN.match(line) and line.startswith("generate:") for line in lines), proc.stderr[-500:]
    assert "\r" not in proc.stderr
    assert json.loads(proc.stdout)["text"] is not None  # one document, nothing else on stdout


def test_a_short_command_prints_no_progress_line(long_trace):
    # the default interval (5 s): a replay that ends sooner writes nothing to stderr, --json or not
    for json_flag in (["--json"], []):
        t0 = time.monotonic()
        proc = _moerun(["replay", "--routing", long_trace, "--slots", "2", "--evict", "lru", "--no-baselines", *json_flag], every=None)
        if time.monotonic() - t0 > report.PLAIN_EVERY_S:  # a machine too busy to show it: nothing to check
            pytest.skip("the short command took longer than the progress interval on this machine")
        assert proc.returncode == 0 and proc.stderr == "", proc.stderr[-500:]


def test_plain_progress_lines_come_every_interval_and_say_what_the_last_update_said(monkeypatch, capsys):
    monkeypatch.setenv(report.PLAIN_EVERY_VARIABLE, "0.02")
    p = Progress("job", total=3)  # stderr is captured here: not a terminal
    assert p.mode == "plain"
    p.update(2, "windows")
    time.sleep(0.2)
    p.close()
    time.sleep(0.05)
    err = capsys.readouterr().err
    lines = err.splitlines()
    assert len(lines) >= 2 and "\r" not in err
    assert all(re.fullmatch(r"job: 2/3  \d+ s  windows", line) for line in lines), err
    assert capsys.readouterr().err == ""  # nothing after close


def test_a_progress_closed_within_the_interval_writes_nothing(monkeypatch, capsys):
    monkeypatch.delenv(report.PLAIN_EVERY_VARIABLE, raising=False)
    p = Progress("job", total=3)
    p.update(1)
    p.close()
    assert capsys.readouterr().err == ""


@pytest.mark.parametrize("value", ["", "0", "-1", "nan", "inf", "fast"])
def test_an_unusable_interval_falls_back_to_the_default(monkeypatch, value):
    monkeypatch.setenv(report.PLAIN_EVERY_VARIABLE, value)
    assert report.plain_every() == report.PLAIN_EVERY_S


def test_on_a_terminal_the_line_is_live_and_cleared(monkeypatch):
    import pty

    master, slave = pty.openpty()
    try:
        stream = os.fdopen(slave, "w", closefd=True)
        monkeypatch.setattr(sys, "stderr", stream)
        p = Progress("job", total=2)
        assert p.mode == "live"
        p.update(2, "done")
        p.close()
        stream.flush()
        import select

        got = ""
        while select.select([master], [], [], 0.5)[0]:  # a pseudo-terminal may hand the text over in parts
            got += os.read(master, 4096).decode()
    finally:
        stream.close()
        os.close(master)
    assert got.startswith("\rjob: 2/2") and "done" in got and got.endswith("\r")
