#!/usr/bin/env python3
"""One benchmark, two checkouts, runs interleaved: is a change faster or slower than its base?

    git worktree add /tmp/moerun-base REV
    python3 scripts/bench_ab.py --base /tmp/moerun-base --rounds 5 bench_policies.py -- --repeats 1

Each round runs the benchmark script once from the base checkout and once from this one (the order
alternates from round to round), each as ``python SCRIPT --json ARGS`` with that checkout first on
``PYTHONPATH``, so each run imports its own moerun.  Every number in the JSON documents is matched
by its path (list items named by their ``policy`` and ``slots_per_layer`` fields where they have
them); the table gives, for the paths that ``--keys`` selects, the median over the rounds of each
side, the ratio this/base, and each side's spread ((worst - best) / median).  A ratio is only a
result where it is larger than both spreads.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import statistics
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent.parent


def flatten(doc, prefix: str = "") -> dict[str, float]:
    """Numeric leaves of a JSON document by path; list items by their policy/slots fields, else index."""
    out: dict[str, float] = {}
    if isinstance(doc, dict):
        for k, v in doc.items():
            out.update(flatten(v, f"{prefix}/{k}"))
    elif isinstance(doc, list):
        for i, v in enumerate(doc):
            name = str(i)
            if isinstance(v, dict) and "policy" in v:
                name = str(v["policy"]) + (f"@{v['slots_per_layer']}" if "slots_per_layer" in v else "")
            out.update(flatten(v, f"{prefix}/{name}"))
    elif isinstance(doc, (int, float)) and not isinstance(doc, bool):
        out[prefix] = float(doc)
    return out


def run_once(tree: Path, script: str, args: list[str]) -> dict[str, float]:
    env = dict(os.environ, PYTHONPATH=str(tree) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.run([sys.executable, str(tree / "scripts" / script), "--json", *args], env=env,
                          capture_output=True, text=True, check=False)
    if proc.returncode != 0:
        raise SystemExit(f"{tree}: {script} failed: {proc.stderr.strip().splitlines()[-1:]}")
    return flatten(json.loads(proc.stdout))


def spread(values: list[float]) -> float:
    med = statistics.median(values)
    return (max(values) - min(values)) / med if med else 0.0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--base", required=True, type=Path, help="the base checkout (a git worktree of the base revision)")
    ap.add_argument("--rounds", type=int, default=5, help="rounds; each runs both sides once (default 5)")
    ap.add_argument("--keys", default=r"tok_s|median|us_per_access", help="regex of the paths to report")
    ap.add_argument("--json", action="store_true", help="print the table as JSON")
    ap.add_argument("script", help="a benchmark in scripts/ of both checkouts that takes --json")
    ap.add_argument("args", nargs="*", help="its arguments (after --)")
    a = ap.parse_args()
    sides = {"base": a.base.resolve(), "this": HERE}
    runs: dict[str, list[dict[str, float]]] = {"base": [], "this": []}
    for r in range(a.rounds):
        order = ("base", "this") if r % 2 == 0 else ("this", "base")
        for side in order:
            runs[side].append(run_once(sides[side], a.script, a.args))
        print(f"round {r + 1}/{a.rounds} done", file=sys.stderr, flush=True)
    keys = re.compile(a.keys)
    common = sorted(set.intersection(*(set(d) for d in runs["base"] + runs["this"])))
    rows = []
    for path in common:
        if not keys.search(path):
            continue
        b = [d[path] for d in runs["base"]]
        t = [d[path] for d in runs["this"]]
        mb, mt = statistics.median(b), statistics.median(t)
        rows.append({"path": path, "base": mb, "this": mt, "ratio": mt / mb if mb else None,
                     "spread_base": spread(b), "spread_this": spread(t)})
    if a.json:
        print(json.dumps({"script": a.script, "args": a.args, "rounds": a.rounds, "rows": rows}, indent=2))
        return
    print(f"{a.script} {' '.join(a.args)}: {a.rounds} rounds, sides interleaved; medians")
    print(f"{'path':<44} {'base':>12} {'this':>12} {'this/base':>10} {'spread':>15}")
    for row in rows:
        ratio = f"{row['ratio']:.3f}" if row["ratio"] is not None else "-"
        print(f"{row['path']:<44} {row['base']:>12.4g} {row['this']:>12.4g} {ratio:>10} "
              f"{row['spread_base']:>7.0%} {row['spread_this']:>7.0%}")


if __name__ == "__main__":
    main()
