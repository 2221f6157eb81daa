#!/usr/bin/env python3
"""Build moerun/data/quant_bench.json, the quantization table shipped in the package, on purpose.

``moerun quantize`` quotes the row of this table that matches its setting in the card it writes
(moerun/makers/_card.py), labelled as not measured in that run. The table is the JSON document of
one ``scripts/bench_quant.py`` run. This script is the only writer of the file:

    python scripts/make_quant_table.py                        # run bench_quant.py --json now (minutes)
    python scripts/make_quant_table.py -- --score-tokens 4000 # options after -- go to bench_quant.py
    python scripts/make_quant_table.py --from bench.json      # convert a saved bench_quant.py --json output

Before writing, it checks that the document has every field the card reads (``check``), so a
benchmark run that lost a field cannot ship. tests/makers/test_quant_table.py checks the shipped
file the same way and renders a card from it. The benchmark itself only prints (and rewrites its
block in docs/research/quant.md with --write-docs).

It imports ``_bench`` first, before numpy and moerun: one BLAS thread for the measurement.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
from pathlib import Path

import _bench

from moerun.files.fileio import write_text_atomic

ROOT = Path(__file__).resolve().parent.parent
OUT = ROOT / "moerun" / "data" / "quant_bench.json"

# What moerun/makers/_card.py reads: the run's provenance, fp32's perplexity, and per row the
# setting it matches on and the figures it prints.
DOC_FIELDS = {"date": str, "machine": str, "blas_threads": str, "fp32": dict, "rows": list}
ROW_KEYS = {"model": str, "expert_bits": int, "attn_bits": int, "method": str, "group": int}
ROW_FIGURES = ("file_bytes", "expert_bytes", "perplexity", "cap_bytes", "decode_tok_s")


def check(doc: object) -> list[str]:
    """What is wrong with a benchmark document as the card's table (empty when nothing is)."""
    if not isinstance(doc, dict):
        return ["not a JSON object"]
    bad = [f"{k}: missing or not {t.__name__}" for k, t in DOC_FIELDS.items() if not isinstance(doc.get(k), t)]
    if bad:
        return bad
    link = doc.get("link_speed_emulated")
    if link is not None and not (isinstance(link, (int, float)) and link > 0):
        bad.append("link_speed_emulated: neither null nor a positive rate")
    if not isinstance(doc["fp32"].get("perplexity"), (int, float)):
        bad.append("fp32.perplexity: missing")
    if not doc["rows"]:
        bad.append("rows: empty")
    for i, row in enumerate(doc["rows"]):
        if not isinstance(row, dict):
            bad.append(f"rows[{i}]: not an object")
            continue
        bad += [f"rows[{i}].{k}: missing or not {t.__name__}" for k, t in ROW_KEYS.items()
                if not isinstance(row.get(k), t) or isinstance(row.get(k), bool)]
        figures = ROW_FIGURES + (("decode_tok_s_link",) if link else ())
        bad += [f"rows[{i}].{k}: missing or not a positive number" for k in figures
                if not isinstance(row.get(k), (int, float)) or not row[k] > 0]
    return bad


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--from", dest="src", help="a saved `bench_quant.py --json` document (default: run the benchmark now)")
    ap.add_argument("--out", default=str(OUT), help=f"where to write (default {OUT.relative_to(ROOT)})")
    ap.add_argument("bench_args", nargs="*", help="after --: options for bench_quant.py")
    a = ap.parse_args()
    if a.src:
        if a.bench_args:
            ap.error("options for bench_quant.py mean nothing with --from")
        text = Path(a.src).read_text(encoding="utf-8")
    else:
        cmd = [sys.executable, str(Path(__file__).with_name("bench_quant.py")), "--json", *a.bench_args]
        _bench.log("running " + " ".join(cmd[1:]))
        text = subprocess.run(cmd, check=True, stdout=subprocess.PIPE, text=True).stdout
    try:
        doc = json.loads(text)
    except ValueError as e:
        raise SystemExit(f"make_quant_table: not a JSON document: {e}") from None
    bad = check(doc)
    if bad:
        raise SystemExit("make_quant_table: not written, the card could not use it:\n  " + "\n  ".join(bad))
    write_text_atomic(a.out, json.dumps(doc, indent=2) + "\n")
    _bench.log(f"wrote {a.out}: {len(doc['rows'])} rows, measured {doc['date']}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
