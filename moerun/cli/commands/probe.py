"""moerun probe: how fast an expert-sized block reaches a pool slot here, warm and cold, against memory copy."""

from __future__ import annotations

import sys

from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, table, written
from moerun.prober.jobs import probe
from moerun.prober.pagein import DEFAULT_RUNS
from moerun.units import fmt_bytes

HELP = (
    "time the engine's page-in read (os.preadv into an aligned slot) for expert-sized blocks, "
    "warm (page cache) and cold (pages dropped, checked with mincore), against this machine's memory-copy speed"
)


def add_arguments(p) -> None:
    cli.add_model(p)
    p.add_argument(
        "--sizes",
        metavar="LIST",
        help="block sizes to time on temporary files instead of the model's experts, e.g. 1MiB,16MiB,256MiB "
        "(with --model as well, both are timed)",
    )
    p.add_argument("--dir", metavar="DIR", help="where the temporary files go (default: a new temporary directory); "
                   "put it on the disk you mean to load models from")
    p.add_argument("--runs", type=int, default=DEFAULT_RUNS, metavar="N", help=f"timed reads per block and regime (default {DEFAULT_RUNS})")
    p.add_argument("--save", metavar="FILE", help="also write the results to FILE (JSON, schema moerun-probe/2) for 'moerun plan'")
    cli.add_force(p, "the --save file")
    cli.add_json(p)


def _ms(seconds: float | None) -> str:
    """A duration (seconds, as the JSON holds it) in milliseconds, for the table."""
    if seconds is None:
        return "-"
    x = seconds * 1e3
    if x < 1:
        return f"{x:.3f}"
    if x < 100:
        return f"{x:.2f}"
    return f"{x:.1f}"


def _check_cell(g: dict) -> str:
    if g["runs"] == 0:
        return "NOT MEASURED"
    if not g["verified"]:
        return "UNVERIFIED"
    want = "all pages resident" if g["regime"] == "warm" else "no page resident"
    return want + (f", {g['discarded']} runs discarded" if g["discarded"] else "")


def render(doc: dict) -> str:
    c = doc["ceiling"]
    lines = [
        f"page-in read: {doc['read']}",
        f"memory-copy ceiling: {c['gb_s']:.2f} GB/s ({c['method']} of {fmt_bytes(c['bytes'])}, best of {c['repeats']})",
    ]
    if doc.get("note"):
        lines.append(f"note: {doc['note']}")
    lines.append("")
    rows = []
    notes: list[str] = []
    above = False
    for b in doc["blocks"]:
        first = True
        for r in ("warm", "cold"):
            g = b[r]
            name = b["label"] if first else ""
            size = f"{b['bytes']:,} B" if first else ""
            first = False
            share = "-" if g["of_ceiling"] is None else f"{100 * g['of_ceiling']:.0f}%"
            above = above or (g["of_ceiling"] or 0) > 1
            rows.append([
                name, size, r, str(g["runs"]), _ms(g["p50_s"]), _ms(g["p95_s"]), _ms(g["p99_s"]), _ms(g["max_s"]),
                "-" if g["gb_s"] is None else f"{g['gb_s']:.2f}", share, _check_cell(g),
            ])
            if g["reason"]:
                notes.append(f"{b['label']}, {r}: {g['reason']}")
    lines.append(table(
        ["block", "size", "regime", "runs", "p50 ms", "p95 ms", "p99 ms", "max ms", "GB/s", "of copy", "checked before each read"],
        rows, "lllrrrrrrrl",
    ))
    lines.append("")
    lines.append("GB/s = block bytes / p50 time; 'of copy' = that rate over the memory-copy ceiling.")
    lines.append(f"cold: {doc['cold_method']}; {doc['cold_scope']}.")
    if above:
        lines.append("above 100%: small blocks stay in CPU caches, and the kernel's copy routine can beat numpy's; the ceiling is a yardstick, not a hard limit.")
    for b in doc["blocks"]:
        if b["source"] == "model":
            m = b["model"]
            lines.append(f"{b['label']}: {m['experts']} experts in {m['dir']}, {b['distinct_offsets']} of them read last to first")
        else:
            lines.append(f"{b['label']}: temporary file of {b['distinct_offsets']} blocks ({fmt_bytes(b['file_bytes'])}), read last to first, removed afterwards")
    lines.extend(notes)
    return "\n".join(lines) + "\n"


def run(args) -> int:
    progress = Progress("probe")

    def report(done: int, total: int, what: str) -> None:
        progress.total = total
        progress.update(done, what)

    try:
        result = probe(args.model, args.sizes, runs=args.runs, work_dir=args.dir, save=args.save, force=args.force,
                       progress=report)
    finally:
        progress.close()
    if args.json:
        emit_json(result.to_json())
    else:
        sys.stdout.write(render(result.to_json()))
    if args.save:
        written("probe", "results", args.save)
    return 0
