"""moerun profile: count how often each layer chose each expert on a text (or in a trace) and write a routing profile."""

from __future__ import annotations

import sys

from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, pct, written
from moerun.sim.jobs import profile

HELP = "count each layer's expert choices on a text (or in a trace) and write a routing profile for warm starts"


def add_arguments(p) -> None:
    cli.add_model(p)
    p.add_argument("--out", metavar="FILE", required=True, help="routing profile to write (JSON)")
    p.add_argument("--text", metavar="FILE", help="UTF-8 text to route (default: the model directory's heldout.txt)")
    p.add_argument("--from-trace", metavar="FILE", help="count a routing trace of this model instead (no model run)")
    cli.add_force(p, "the --out file")
    cli.add_max_tokens(p, "route at most the first N tokens of the text")
    p.add_argument("--mem-cap", metavar="SIZE", help="memory cap of the engine that routes (as generate's); default: every expert resident")
    p.add_argument("--max-context", type=int, metavar="N", help="the engine's context, and so each window's length (as generate's)")
    cli.add_json(p)


def _summary_text(doc: dict) -> str:
    where = "routed through the model" if doc["source"] == "text" else "counted from the trace"
    hot = ", ".join(f"{h['expert']} ({pct(h['share'])})" for h in doc["hottest"])
    return (f"{doc['tokens']} tokens of {doc['file']} {where}: {doc['expert_accesses']} expert accesses, "
            f"{doc['used']} of {doc['layers'] * doc['experts']} (layer, expert) pairs used\n"
            f"hottest expert per layer (share of its accesses): {hot}\n")


def run(args) -> int:
    prog = Progress("profile")

    def report(done: int, total: int, routed: int) -> None:
        prog.total = total
        prog.update(done, f"{routed} tokens")

    try:
        result = profile(args.out, args.model, args.text, from_trace=args.from_trace, max_tokens=args.max_tokens,
                         force=args.force, mem_cap=args.mem_cap, max_context=args.max_context, progress=report)
    finally:
        prog.close()
    if args.json:
        emit_json(result.to_json())
    else:
        sys.stdout.write(_summary_text(result.to_json()))
    written("profile", "routing profile", result.profile)
    return 0
