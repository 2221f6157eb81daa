"""The saved result of ``moerun probe`` (schema moerun-probe/2): writing it, and reading it back validated.

``moerun plan`` takes a probe result as this machine's page-in costs, so a file is trusted
only after every figure in it was checked (docs/design/architecture.md, invariants): blocks, regimes, runs,
percentiles in order, nothing unverified without a reason.  The measuring itself is ``moerun.prober.pagein``.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from moerun.errors import BadInput, BadOption
from moerun.files.fileio import read_json_file, write_text_atomic
from moerun.units import finite_number, whole_number

SCHEMA = "moerun-probe/2"  # durations in seconds, as in every JSON document of moerun (docs/guide/api.md, "Units")
OLD_SCHEMA = "moerun-probe/1"  # the same document with durations in milliseconds (``_ms``): read, converted
REGIMES = ("warm", "cold")
STAT_KEYS = ("p50_s", "p95_s", "p99_s", "max_s", "mean_s", "gb_s", "of_ceiling")


def save_probe(path: str | os.PathLike, doc: dict, force: bool = True, inputs=()) -> None:
    """Write a probe document as JSON, atomically (``--save``: the output rules of moerun.files.fileio)."""
    write_text_atomic(path, json.dumps(doc, indent=2) + "\n", force=force, inputs=inputs, what="--save")


def _num(x) -> bool:
    return finite_number(x, -1e30, 1e30)


MAX_BLOCK = 1 << 50  # bytes of one probed block (a PiB): anything larger is not a measurement


def validate_probe(doc: object, where: str = "probe result") -> dict:
    """Check a probe document against schema moerun-probe/2 (a moerun-probe/1 document is converted to it
    first: its durations in milliseconds become seconds); raise BadInput naming the first problem."""

    def bad(msg: str):
        raise BadInput(f"{where}: {msg}")

    if not isinstance(doc, dict):
        bad("not a JSON object")
    try:  # labels and reasons are printed: JSON escapes can spell lone surrogates that no output can print
        json.dumps(doc, ensure_ascii=False).encode("utf-8")
    except (UnicodeEncodeError, RecursionError, ValueError):
        bad("holds text that is not valid UTF-8")
    if doc.get("schema") == OLD_SCHEMA:
        doc = _from_milliseconds(doc)
    if doc.get("schema") != SCHEMA:
        bad(f"schema is {doc.get('schema')!r}, expected {SCHEMA!r} (written by 'moerun probe --save')")
    for key in ("machine", "ceiling"):
        if not isinstance(doc.get(key), dict):
            bad(f"{key!r} is missing or not an object")
    if not _num(doc["ceiling"].get("gb_s")) or doc["ceiling"]["gb_s"] <= 0:
        bad("ceiling.gb_s must be a positive number")
    if not whole_number(doc.get("runs"), 1, 1 << 31):
        bad("runs must be a positive integer")
    blocks = doc.get("blocks")
    if not isinstance(blocks, list) or not blocks:
        bad("blocks must be a non-empty list")
    for i, b in enumerate(blocks):
        at = f"blocks[{i}]"
        if not isinstance(b, dict):
            bad(f"{at} is not an object")
        if not whole_number(b.get("bytes"), 1, MAX_BLOCK):
            bad(f"{at}.bytes must be a whole number of bytes from 1 to {MAX_BLOCK}")
        if b.get("source") not in ("model", "tempfile"):
            bad(f"{at}.source must be 'model' or 'tempfile'")
        if not isinstance(b.get("label"), str):
            bad(f"{at}.label must be text")
        for r in REGIMES:
            _check_regime(b.get(r), f"{at}.{r}", r, bad)
    return doc


def _from_milliseconds(doc: dict) -> dict:
    """A moerun-probe/1 document as moerun-probe/2: every ``<name>_ms`` figure becomes ``<name>_s``, divided by
    1000 (a value that is not a number is kept as it is, for the checks to name)."""

    def convert(obj):
        if not isinstance(obj, dict):
            return obj
        out = {}
        for k, v in obj.items():
            if isinstance(k, str) and k.endswith("_ms"):
                is_number = isinstance(v, (int, float)) and not isinstance(v, bool)
                out[k.removesuffix("_ms") + "_s"] = v / 1e3 if is_number else v
            else:
                out[k] = v
        return out

    new = {**doc, "schema": SCHEMA, "ceiling": convert(doc.get("ceiling"))}
    if isinstance(doc.get("blocks"), list):
        new["blocks"] = [{**b, **{r: convert(b.get(r)) for r in REGIMES if r in b}} if isinstance(b, dict) else b
                         for b in doc["blocks"]]
    return new


def _check_regime(g: object, at: str, r: str, bad) -> None:
    """One block's figures for one regime: verified or with a reason, and percentiles in order when measured.

    The planner takes these as the page-in costs of the machine; a result edited by hand must not slip through.
    """
    if not isinstance(g, dict):
        bad(f"{at} is missing or not an object")
    if g.get("regime") != r:
        bad(f"{at}.regime must be {r!r}")
    if not isinstance(g.get("verified"), bool):
        bad(f"{at}.verified must be true or false")
    if g.get("reason") is not None and not isinstance(g["reason"], str):
        bad(f"{at}.reason must be text or null")
    if not g["verified"] and not g.get("reason"):
        bad(f"{at} is unverified but gives no reason")
    n = g.get("runs")
    if not whole_number(n, 0, 1 << 31):
        bad(f"{at}.runs must be a whole number")
    for k in STAT_KEYS:
        v = g.get(k, "missing")
        if v == "missing":
            bad(f"{at}.{k} is missing")
        if n == 0 and v is not None:
            bad(f"{at}.{k} must be null when no run was measured")
        if n > 0 and k != "of_ceiling" and (not _num(v) or v <= 0):
            bad(f"{at}.{k} must be a positive number")
    if n > 0 and not g["p50_s"] <= g["p95_s"] <= g["p99_s"] <= g["max_s"]:
        bad(f"{at}: percentiles are not in order (p50 <= p95 <= p99 <= max)")


def load_probe(path: str | os.PathLike) -> dict:
    """Read and validate a file written by ``moerun probe --save``.

    BadOption if the path is not a readable regular file (it came from an option), BadInput if its content
    is not a valid moerun-probe/2 document (or a moerun-probe/1 one, converted).
    """
    p = Path(path)
    doc = read_json_file(p, BadInput, "probe file", missing=f"{p}: no such probe file (write one with 'moerun probe --save {p}')",
                         file_error=BadOption)
    return validate_probe(doc, str(p))
