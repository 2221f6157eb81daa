"""moerun.cli.report: tables and percentages for people, JSON for machines.

The JSON reference is the standard library's json module (RFC 8259 text): what ``emit_json`` writes must
parse back to the same values, numpy scalars and arrays as plain numbers and lists.
"""

from __future__ import annotations

import json

import numpy as np

from moerun.cli.report import Progress, emit_json, pct, table


def test_a_table_aligns_columns_and_underlines_the_header():
    out = table(["name", "n"], [["a", 1], ["longer", 22], ["b", None]]).splitlines()
    assert out[0] == "name     n"
    assert out[1] == "------  --"
    assert out[2] == "a        1" and out[3] == "longer  22" and out[4] == "b"  # None prints as nothing
    assert len({len(line) for line in out[:4]}) == 1


def test_a_table_takes_an_alignment_per_column():
    out = table(["xx", "y"], [["1", "abc"]], "rl").splitlines()
    assert out[2] == " 1  abc"


def test_pct():
    assert pct(None) == "-" and pct(0.1234) == "12.3%" and pct(1) == "100.0%"


def test_emit_json_writes_numpy_values_as_json_numbers_and_lists(capsys):
    doc = {"i": np.int64(3), "f": np.float32(0.5), "a": np.arange(3), "s": "é"}
    emit_json(doc)
    back = json.loads(capsys.readouterr().out)
    assert back == {"i": 3, "f": 0.5, "a": [0, 1, 2], "s": "é"}


def test_progress_writes_nothing_unless_enabled(capsys):
    p = Progress("x", total=3, enabled=False)
    p.update(1)
    p.close()
    assert capsys.readouterr().err == ""
    p = Progress("job", total=2, enabled=True)
    p.update(2, "done")
    p.close()
    err = capsys.readouterr().err
    assert "job: 2/2" in err and "done" in err
