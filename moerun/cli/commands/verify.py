"""moerun verify: prove that offloaded runs give bit-identical logits and tokens."""

from __future__ import annotations

import sys
from pathlib import Path

from moerun.checks.verify import Setting, verify
from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, table
from moerun.cli.summary import RANDOM_NOTE
from moerun.errors import BadInput, BadOption
from moerun.files.store import ModelStore
from moerun.model.sampling import Sampling
from moerun.model.tokenizer import Tokenizer, read_text_file
from moerun.runtime.engine import default_model_dir
from moerun.units import fmt_bytes, parse_rate, parse_size

HELP = "run the same prompts fully resident and under several caps, policies and prefetch settings; compare bit for bit"


def add_arguments(p) -> None:
    cli.add_model(p)
    cli.add_prompt(p, max_new_default=24)
    cli.add_memory(p)
    p.add_argument("--prompts", type=int, default=3, metavar="N", help="held-out prompts to use when no --prompt is given (default 3)")
    cli.add_json(p)


def default_prompts(model_dir: Path, tok: Tokenizer, n: int) -> list[list[int]]:
    held = model_dir / "heldout.txt"
    if held.exists():
        text = read_text_file(held)
        docs = [d for d in text.split("\n\n") if d.strip()]
        picks = [docs[i * len(docs) // max(n, 1)] for i in range(n)] if docs else []
        return [tok.encode(d[:160]) for d in picks]
    return [tok.encode(s) for s in ("", "a", "hello")[:n]]


def _settings(args, c) -> list[Setting] | None:
    """The offloaded setting the options ask for, or None for verify's own set of settings.

    Offloading options without a cap would compare the resident engine with itself: refused, not passed.
    """
    offloads = bool(args.mem_cap or args.slots)
    given = [flag for flag, on in (("--evict", args.evict != "lru"), ("--prefetch", args.prefetch), ("--link-speed", args.link_speed),
                                   ("--shared-pool", args.shared_pool), ("--cold", args.cold)) if on]
    if given and not offloads:  # every expert resident: the run would be compared with itself
        raise BadOption(
            f"{' and '.join(given)} offload{'s' if len(given) == 1 else ''} nothing without --mem-cap or --slots: "
            "verify would compare the resident engine with itself; add --mem-cap SIZE"
        )
    if not offloads:
        return None
    cli.check_against_model(args, c)
    kw = cli.engine_kwargs(args)
    kw.pop("model_dir")
    kw["mem_cap"] = parse_size(kw["mem_cap"], "memory cap") if kw["mem_cap"] else None
    if kw["link_speed"]:
        kw["link_speed"] = parse_rate(kw["link_speed"], "link speed")
    return [Setting("as given", kw)]


def _write_text(outcomes, n_prompts: int, max_new: int, synthetic: bool, ok: bool) -> None:
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
    if synthetic:
        sys.stdout.write(f"note: {RANDOM_NOTE}\n")
    sys.stdout.write(
        f"reference: every expert resident; {n_prompts} prompt(s), {max_new} sampled tokens each, "
        f"logits compared as raw float32 bits\n"
    )
    sys.stdout.write(table(["setting", "cap", "slots", "logits", "tokens", "hit rate"], rows, "llllll") + "\n")
    sys.stdout.write("verify: all settings bit-identical\n" if ok else "verify: DIFFERENCES FOUND\n")


def run(args) -> int:
    cli.check_memory_options(args)
    model_dir = Path(args.model) if args.model else default_model_dir()
    store = ModelStore.open(model_dir)
    c = store.config
    store.close()
    tok = Tokenizer.load(model_dir, c.vocab_size, c.bos_token_id)
    if args.prompt is not None or args.prompt_file:
        prompts = [tok.encode(cli.read_prompt(args))]
    else:
        if args.prompts < 1:
            raise BadInput("--prompts must be at least 1")
        prompts = default_prompts(model_dir, tok, args.prompts)
    prompts = [p[: max(1, c.max_seq_len - args.max_new)] for p in prompts]
    settings = _settings(args, c)
    sampling = Sampling(args.temperature, args.top_p, args.seed)
    prog = Progress("verify", enabled=None if not args.json else False)
    outcomes, info = verify(model_dir, prompts, settings, args.max_new, sampling,
                            progress=lambda i, n, label: prog.update(i, f"{label}"))
    prog.close()
    ok = all(o.ok for o in outcomes)
    synthetic = bool(c.extra.get("synthetic"))
    if args.json:
        emit_json(
            {
                "ok": ok,
                **({"note": RANDOM_NOTE} if synthetic else {}),
                "prompts": len(prompts),
                "max_new": args.max_new,
                **info,
                "results": [
                    {
                        "setting": o.setting.label,
                        "options": o.setting.kwargs,
                        "slots": o.slots,
                        "logits_equal": o.logits_equal,
                        "tokens_equal": o.tokens_equal,
                        "max_abs_diff": o.max_abs_diff,
                        "hit_rate": o.hit_rate,
                    }
                    for o in outcomes
                ],
            }
        )
    else:
        _write_text(outcomes, len(prompts), args.max_new, synthetic, ok)
    return 0 if ok else 1
