"""A child process's peak resident set, watched from outside it with psutil (not from the tool's own figure)."""

from __future__ import annotations

import subprocess
import time

import psutil


def peak_of_child(argv: list[str], poll_s: float = 0.003) -> tuple[int, str, int, int]:
    """Start ``argv`` (a child that prints "ready", waits for a line "go", then works), and return its exit code,
    the rest of its output, and its resident set when ready and at the highest seen while it worked."""
    child = subprocess.Popen(argv, stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        assert child.stdout.readline().strip() == "ready"
        proc = psutil.Process(child.pid)
        baseline = proc.memory_info().rss
        child.stdin.write("go\n")
        child.stdin.flush()
        peak = baseline
        while child.poll() is None:
            try:
                peak = max(peak, proc.memory_info().rss)
            except psutil.NoSuchProcess:
                break
            time.sleep(poll_s)
        out = child.stdout.read()
    finally:
        if child.poll() is None:
            child.kill()
        child.wait()
    return child.returncode, out, baseline, peak
