"""moerun record: route a text through the model (teacher-forced) and write the routing trace."""

from __future__ import annotations

import sys

from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, written
from moerun.sim.jobs import record
from moerun.units import fmt_bytes

HELP = "route a text through the model, window by window, and write every token's experts and guesses to a trace"


def add_arguments(p) -> None:
    cli.add_model(p)
    p.add_argument("--text", metavar="FILE", help="UTF-8 text to route (default: the model directory's heldout.txt)")
    p.add_argument("--trace", metavar="FILE", required=True, help="trace file to write (.npz)")
    cli.add_force(p, "the --trace file")
    cli.add_max_tokens(p, "route at most the first N tokens of the text")
    p.add_argument("--mem-cap", metavar="SIZE", help="memory cap of the engine that routes (as generate's); default: every expert resident")
    p.add_argument("--max-context", type=int, metavar="N", help="the engine's context, and so each window's length (as generate's)")
    cli.add_json(p)


def _summary_text(doc: dict, window_tokens: int, bos: bool = True) -> str:
    ce = doc["cross_entropy_nats_per_token"]
    return (
        f"routed {doc['tokens']} tokens ({doc['text_tokens']} of text in {doc['windows']} windows of up to {window_tokens}"
        f"{', each opened by the bos token' if bos else ''}) through {doc['layers']} layers in {doc['seconds']:.1f} s ({doc['tok_s']:.0f} tok/s)\n"
        f"{doc['expert_accesses']} expert accesses (top-{doc['top_k']} of {doc['n_experts']}); guesses for {doc['lookahead']} layers ahead, "
        f"top {doc['guesses']} each\n"
        + (f"cross-entropy on this text {ce:.4f} nats/token\n" if ce is not None else "")
    )


def run(args) -> int:
    prog = Progress("record")

    def report(done: int, total: int, routed: int) -> None:
        prog.total = total
        prog.update(done, f"{routed} tokens")

    try:
        result = record(args.trace, args.model, args.text, max_tokens=args.max_tokens, force=args.force,
                        mem_cap=args.mem_cap, max_context=args.max_context, progress=report)
    finally:
        prog.close()
    if args.json:
        emit_json(result.to_json())
    else:
        sys.stdout.write(_summary_text(result.to_json(), result.window_tokens, result.window_bos))
    written("record", "trace", result.trace, fmt_bytes(result.file_bytes))
    return 0
