"""moerun score: perplexity of a text (default: the model's heldout.txt) under any memory cap and policy."""

from __future__ import annotations

import sys
from pathlib import Path

from moerun.checks.jobs import score
from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, table
from moerun.cli.summary import slots_text
from moerun.units import fmt_bytes, fmt_prefetch

HELP = "perplexity of a text (default: the model's heldout.txt), teacher-forced in context-sized windows, with tok/s"


def add_arguments(p) -> None:
    cli.add_model(p)
    p.add_argument("--text", metavar="FILE", help="UTF-8 text to score (default: heldout.txt in the model directory)")
    cli.add_max_tokens(p, "score only the first N tokens of the text")
    p.add_argument("--plain-windows", action="store_true",
                   help="windows of max_seq_len tokens with no bos inserted, first token of each not predicted")
    cli.add_memory(p, prefetch=0)
    cli.add_json(p)


def run(args) -> int:
    kwargs = cli.engine_kwargs(args)
    model_dir = kwargs.pop("model_dir")
    progress = Progress("scoring")

    def report(done: int, total: int) -> None:
        progress.total = total
        progress.update(done)

    try:
        result = score(model_dir, args.text, max_tokens=args.max_tokens, plain_windows=args.plain_windows,
                       progress=report, **kwargs)
    finally:
        progress.close()
    if result.warning:
        sys.stderr.write(f"moerun score: warning: {result.warning}\n")
    doc = result.to_json()
    if args.json:
        emit_json(doc)
        return 0
    out = sys.stdout
    r = result.score
    b = doc["budget"]
    options = doc["options"]
    rows = [
        ["text", f"{doc['text']} ({r.predicted:,} tokens predicted in {r.windows} windows)"],
        ["rule", doc["rule"]],
        ["experts", f"{doc['expert_storage']}, {doc['expert_bytes']:,} B each"],
        ["cross-entropy", f"{r.cross_entropy:.4f} nats/token"],
        ["perplexity", f"{r.perplexity:.3f}"],
        ["speed", f"{r.tok_s:,.0f} tok/s ({r.forward_ns / 1e6:.0f} ms of forward passes)"],
    ]
    if b["cap_bytes"] is not None:
        rows.append(["memory cap", f"{fmt_bytes(b['cap_bytes'])}; {slots_text(b['split'], b['slots'])}"])
        if options.get("prefetch"):
            rows.append(["prefetch", fmt_prefetch("auto" if options.get("prefetch_auto") else options["prefetch"],
                                                  options.get("lookahead"), options.get("prefetch_from"))])
        rows.append(["page-ins", f"{doc['expert_loads'] or 0:,} experts, {fmt_bytes(doc['bytes_paged_in'] or 0)}, "
                     f"stalled {doc['stall_s'] * 1e3:.1f} ms"])
    if options.get("link_speed") is not None:
        rows.append(["link", f"{options['link_speed'] / 1e9:.2f} GB/s (emulated)"])
    if options.get("cold"):
        rows.append(["cold start", "the model file's pages were dropped from the OS page cache first"])
    rows.append(["peak RSS growth", fmt_bytes(doc["peak_rss_growth_bytes"])])
    out.write(f"model {doc['model'] or Path(doc['model_dir']).name} ({doc['model_dir']})\n")
    if doc.get("note"):
        out.write(f"note: {doc['note']}\n")
    out.write(table(["", "value"], rows, "ll") + "\n")
    return 0
