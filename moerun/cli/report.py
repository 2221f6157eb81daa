"""Output for people: aligned tables and progress lines (stderr), and JSON for machines."""

from __future__ import annotations

import json
import math
import os
import signal
import sys
import threading
import time


def table(headers: list[str], rows: list[list], align: str | None = None) -> str:
    """A compact aligned table; ``align`` holds 'l' or 'r' per column (default: first left, rest right)."""
    cells = [[str(h) for h in headers]] + [["" if c is None else str(c) for c in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(headers))]
    align = align or ("l" + "r" * (len(headers) - 1))
    out = []
    for n, r in enumerate(cells):
        parts = [c.ljust(w) if a == "l" else c.rjust(w) for c, w, a in zip(r, widths, align)]
        out.append("  ".join(parts).rstrip())
        if n == 0:
            out.append("  ".join("-" * w for w in widths))
    return "\n".join(out)


def pct(x: float | None) -> str:
    return "-" if x is None else f"{100 * x:.1f}%"


def written(command: str, what: str, path, detail: str = "") -> None:
    """The one "written to" notice of a command's output file or directory: one line on stderr, with or
    without --json, so that stdout holds only the command's text or its JSON document."""
    sys.stderr.write(f"moerun {command}: {what} written to {path}" + (f" ({detail})" if detail else "") + "\n")
    sys.stderr.flush()


def emit_json(doc: dict) -> None:
    sys.stdout.write(json.dumps(doc, indent=2, default=_default) + "\n")
    sys.stdout.flush()


def _default(o):
    import numpy as np

    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return float(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(type(o).__name__)


# Away from a terminal (a pipe, a file, a CI log), a long command writes a plain progress line this often,
# and nothing at all when it ends sooner.  MOERUN_PROGRESS_EVERY (seconds) overrides it (the tests use it).
PLAIN_EVERY_S = 5.0
PLAIN_EVERY_VARIABLE = "MOERUN_PROGRESS_EVERY"


def plain_every() -> float:
    """Seconds between plain progress lines: $MOERUN_PROGRESS_EVERY if it is a positive number, else PLAIN_EVERY_S."""
    try:
        every = float(os.environ.get(PLAIN_EVERY_VARIABLE, ""))
    except ValueError:
        return PLAIN_EVERY_S
    return every if every > 0 and math.isfinite(every) else PLAIN_EVERY_S


def _is_terminal(stream) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, OSError, ValueError):
        return False


class Progress:
    """The progress of a long command, on stderr: the one mechanism every long command uses.

    On a terminal: one live line, redrawn as the work advances (``update``) and cleared by ``close``.
    Anywhere else (a pipe, a file, a CI log; ``--json`` or not): a plain line -- no carriage return, no
    escape code -- every ``plain_every()`` seconds (5 s) while the command runs, saying what the last
    ``update`` said and the time so far; a command that ends sooner writes nothing.  The plain lines come
    from a timer thread, so a single step that takes minutes still shows that the command is alive.
    stdout is never touched.  ``enabled``: None (default) chooses by stderr as above, True forces the
    live line, False writes nothing at all.
    """

    def __init__(self, label: str, total: int | None = None, enabled: bool | None = None):
        self.label = label
        self.total = total
        self.stream = sys.stderr
        if self.stream is None:
            enabled = False
        self.mode = ("live" if _is_terminal(self.stream) else "plain") if enabled is None else ("live" if enabled else "off")
        self.enabled = self.mode != "off"
        self.t0 = time.monotonic()
        self.last = 0.0
        self.done: int | None = None
        self.extra = ""
        self._drawn = False
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread = None
        if self.mode == "plain":
            self._thread = threading.Thread(target=self._tick, args=(plain_every(),), name="moerun-progress", daemon=True)
            self._thread.start()

    def _text(self, seconds: str) -> str:
        head = f"{self.label}:"
        if self.done is not None:
            head += f" {self.done}/{self.total}" if self.total else f" {self.done}"
        return "  ".join(part for part in (head, f"{seconds} s", self.extra) if part)

    def update(self, done: int, extra: str = "") -> None:
        if self.mode == "off":
            return
        self.done, self.extra = done, extra  # what the next plain line says
        if self.mode != "live":
            return
        now = time.monotonic()
        if now - self.last < 0.2 and (self.total is None or done < self.total):
            return
        self.last = now
        self._write(f"\r{self._text(f'{now - self.t0:.1f}')}".ljust(70)[:120])
        self._drawn = True

    def _tick(self, every: float) -> None:
        """The plain lines (a daemon thread): one every ``every`` seconds until ``close``."""
        try:  # Ctrl-C and SIGTERM are the main thread's to handle
            signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT, signal.SIGTERM})
        except (AttributeError, OSError, ValueError):
            pass
        while not self._stop.wait(every):
            with self._lock:
                if self._stop.is_set():
                    return
                now = time.monotonic()
                line = self._text(f"{now - self.t0:.0f}").replace("\r", " ").replace("\n", " ")
                if not self._write(line + "\n"):
                    return

    def _write(self, text: str) -> bool:
        try:
            self.stream.write(text)
            self.stream.flush()
            return True
        except (OSError, ValueError):  # stderr closed or gone: progress is not worth an error
            return False

    def note(self, line: str) -> None:
        """One line of its own on the stream (a notice), between progress lines: a live line is cleared
        first and drawn again at the next update; a plain line never lands inside it."""
        with self._lock:
            if self.mode == "live" and self._drawn:
                self._write("\r" + " " * 80 + "\r")
                self._drawn = False
            self._write(line.rstrip("\n") + "\n")

    def close(self) -> None:
        if self._thread is not None:
            with self._lock:
                self._stop.set()
            if self._thread is not threading.current_thread():
                self._thread.join(1.0)
            self._thread = None
        if self.mode == "live" and self._drawn:
            self._write("\r" + " " * 80 + "\r")
            self._drawn = False
