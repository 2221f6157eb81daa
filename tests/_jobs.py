"""For the tests that compare a library job (moerun.plan, moerun.replay, ...) with its command's --json."""

from __future__ import annotations

import json

from moerun.cli import main as cli


def cli_json(capsys, *argv) -> tuple[int, dict]:
    """Exit code and the parsed --json document of ``moerun ARGV --json``, run in this process."""
    capsys.readouterr()
    code = cli.main([*map(str, argv), "--json"])
    out, err = capsys.readouterr()
    return code, json.loads(out)


def as_json(doc) -> dict:
    """A result's to_json() as the command prints it: through JSON and back (tuples become lists, numpy numbers numbers)."""
    from moerun.cli.report import _default

    return json.loads(json.dumps(doc, default=_default))


def without(doc: dict, *keys) -> dict:
    """The document without the fields measured anew on each run (timings), at the top level or by dotted path."""
    doc = json.loads(json.dumps(doc))
    for key in keys:
        *path, last = key.split(".")
        d = doc
        for p in path:
            d = d.get(p) if isinstance(d, dict) else None
        if isinstance(d, dict):
            d.pop(last, None)
    return doc
