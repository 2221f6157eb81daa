"""moerun verify: prove that offloaded runs give bit-identical logits and tokens."""

from __future__ import annotations

import sys

from moerun.checks.jobs import verify
from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, table
from moerun.units import fmt_bytes

HELP = "run the same prompts fully resident and under several caps, policies and prefetch settings; compare bit for bit"


def add_arguments(p) -> None:
    cli.add_model(p)
    cli.add_prompt(p, max_new_default=24)
    cli.add_memory(p, prefetch=0)
    p.add_argument("--prompts", type=int, default=3, metavar="N", help="held-out prompts to use when no --prompt is given (default 3)")
    cli.add_json(p)


REFERENCES = {
    "resident": "every expert resident",
    "whole-layer": "each layer with all its experts read when it runs (the whole model does not fit in memory)",
}


def _write_text(outcomes, n_prompts: int, max_new: int, note: str | None, ok: bool, reference: str = "resident") -> None:
    """One row a setting: its cap and slots, and whether logits and tokens were the same bits as the resident run's."""
    rows = []
    for o in outcomes:
        cap = o.setting.kwargs.get("mem_cap")
        rows.append([
            o.setting.label,
            fmt_bytes(cap) if cap else "-",
            ",".join(map(str, o.slots)),
            "same" if o.logits_equal else f"DIFF {o.max_abs_diff:.2e}",
            "same" if o.tokens_equal else "DIFF",
            "-" if o.hit_rate is None else f"{100 * o.hit_rate:.1f}%",
        ])
    if note:
        sys.stdout.write(f"note: {note}\n")
    sys.stdout.write(
        f"reference: {REFERENCES[reference]}; {n_prompts} prompt(s), {max_new} sampled tokens each, "
        f"logits compared as raw float32 bits\n"
    )
    sys.stdout.write(table(["setting", "cap", "slots", "logits", "tokens", "hit rate"], rows, "llllll") + "\n")
    sys.stdout.write("verify: all settings bit-identical\n" if ok else "verify: DIFFERENCES FOUND\n")


def run(args) -> int:
    cli.check_memory_options(args)
    prog = Progress("verify")
    try:
        result = verify(args.model, args.prompt, prompt_file=args.prompt_file, prompts=args.prompts, max_new=args.max_new,
                        temperature=args.temperature, top_p=args.top_p, seed=args.seed, max_context=args.max_context,
                        progress=lambda i, n, label: prog.update(i, f"{label}"),
                        mem_cap=args.mem_cap, evict=args.evict, prefetch=args.prefetch, lookahead=args.lookahead,
                        prefetch_from=args.prefetch_from, slots=args.slots,
                        split="shared" if args.shared_pool else "even", link_speed=args.link_speed, cold=args.cold)
    finally:
        prog.close()
    if args.json:
        emit_json(result.to_json())
    else:
        _write_text(result.outcomes, result.prompts, result.max_new, result.note, result.ok, result.reference)
    return 0 if result.ok else 1
