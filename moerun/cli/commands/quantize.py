"""moerun quantize: write a copy of a model with low-bit packed experts (and optionally attention)."""

from __future__ import annotations

import shlex
import sys

from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, table, written
from moerun.files.packed import ATTN_BITS, EXPERT_BITS, METHODS
from moerun.makers.jobs import quantize
from moerun.units import fmt_bytes

HELP = "write a quantized copy of a model: group-wise 8/4/3/2-bit packed experts (rtn or hqq), float16/8/4-bit attention"


def add_arguments(p) -> None:
    cli.add_model(p)
    p.add_argument("out", metavar="OUT", help="new model directory to write (its parent must exist; never inside the source)")
    p.add_argument("--expert-bits", type=int, choices=EXPERT_BITS, default=4, metavar="{8,4,3,2}",
                   help="bits per expert weight (default 4)")
    p.add_argument("--attn-bits", type=int, choices=ATTN_BITS, default=16, metavar="{16,8,4}",
                   help="attention weights: 16 = float16, 8 or 4 = quantized like the experts (default 16)")
    p.add_argument("--group", type=int, default=64, metavar="N", help="rows per quantization group along the input axis (default 64)")
    p.add_argument("--method", choices=METHODS, default="hqq", help="rtn = round to nearest; hqq = half-quadratic zero-point refinement (default)")
    cli.add_force_dir(p, ", and never the source")
    p.add_argument("--no-score", action="store_true", help="skip measuring held-out perplexity of source and result for the card")
    p.add_argument("--text", metavar="FILE", help="held-out text to measure perplexity on (default: the model's heldout.txt; "
                                                  "an open checkpoint has none and needs this or --no-score)")
    cli.add_max_tokens(p, "score only the first N tokens of the text (default: all)")
    cli.add_json(p)


def _attn(rep) -> str:
    if rep.spec.attn_bits != 16:
        return f"{rep.spec.attn_bits}-bit"
    return "float16" if rep.attn_dtype == "F16" else "BF16 (as stored)"


def run(args) -> int:
    progress = Progress("quantizing experts")
    command = "moerun " + shlex.join(sys.argv[1:]) if sys.argv and sys.argv[0].endswith(("moerun", "__main__.py")) else None

    def on_progress(done: int, total: int) -> None:
        progress.total = total
        progress.update(done)

    try:
        rep = quantize(args.out, args.model, expert_bits=args.expert_bits, attn_bits=args.attn_bits, group=args.group,
                       method=args.method, force=args.force, score=not args.no_score, max_tokens=args.max_tokens,
                       progress=on_progress, command=command, text=args.text)
    finally:
        progress.close()
    if args.json:
        emit_json(rep.to_json())
        written("quantize", "model directory", rep.out_dir)
        return 0
    spec = rep.spec
    rows = [
        ["setting", f"{spec.expert_bits}-bit experts, {_attn(rep)} attention, "
                    f"{spec.method}, group {spec.group}"],
        ["model.safetensors", f"{fmt_bytes(rep.file_bytes)} (source {fmt_bytes(rep.source_file_bytes)}, "
                              f"{100 * rep.file_bytes / rep.source_file_bytes:.1f}%)"],
        ["one expert", f"{rep.expert_bytes:,} B (source {rep.source_expert_bytes:,} B, {100 * rep.expert_bytes / rep.source_expert_bytes:.1f}%)"],
        ["expert RMS error", f"{100 * rep.expert_rel_rms:.3f}% of RMS weight"],
        ["attention RMS error", f"{100 * rep.attn_rel_rms:.3f}% of RMS weight"],
    ]
    if rep.heldout:
        h = rep.heldout
        rows.append(["held-out perplexity", f"{h['quantized']['perplexity']:.4f} vs source {h['source']['perplexity']:.4f} "
                                            f"({100 * h['relative_change']:+.2f}%, {h['predicted_tokens']:,} tokens of {h['text']})"])
    rows.append(["time", f"{rep.seconds:.1f} s"])
    sys.stdout.write(table(["", "value"], rows, "ll") + "\n")
    written("quantize", "model directory", rep.out_dir)
    return 0
