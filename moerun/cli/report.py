"""Output for people: aligned tables and progress lines (stderr), and JSON for machines."""

from __future__ import annotations

import json
import sys
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


class Progress:
    """A single updating progress line on stderr, only when stderr is a terminal (or forced)."""

    def __init__(self, label: str, total: int | None = None, enabled: bool | None = None):
        self.label = label
        self.total = total
        self.enabled = sys.stderr.isatty() if enabled is None else enabled
        self.t0 = time.monotonic()
        self.last = 0.0

    def update(self, done: int, extra: str = "") -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if now - self.last < 0.2 and (self.total is None or done < self.total):
            return
        self.last = now
        frac = f"{done}/{self.total}" if self.total else str(done)
        sys.stderr.write(f"\r{self.label}: {frac}  {now - self.t0:.1f} s  {extra}".ljust(70)[:120])
        sys.stderr.flush()

    def close(self) -> None:
        if self.enabled:
            sys.stderr.write("\r" + " " * 80 + "\r")
            sys.stderr.flush()
