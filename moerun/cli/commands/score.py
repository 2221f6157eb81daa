"""moerun score: perplexity of a text (default: the model's heldout.txt) under any memory cap and policy."""

from __future__ import annotations

import sys
from pathlib import Path

from moerun.checks.score import n_windows, score_text
from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, table
from moerun.cli.summary import cap_check, cap_warning
from moerun.errors import BadInput
from moerun.model.tokenizer import read_text_file
from moerun.runtime.engine import default_model_dir
from moerun.runtime.options import load
from moerun.units import fmt_bytes

RULE_BOS = "windows of [bos] + the next max_seq_len-1 tokens; every token of the text predicted once"
RULE_PLAIN = "windows of max_seq_len tokens, no bos inserted; every token but each window's first predicted"
HELP = "perplexity of a text (default: the model's heldout.txt), teacher-forced in context-sized windows, with tok/s"


def add_arguments(p) -> None:
    cli.add_model(p)
    p.add_argument("--text", metavar="FILE", help="UTF-8 text to score (default: heldout.txt in the model directory)")
    cli.add_max_tokens(p, "score only the first N tokens of the text")
    p.add_argument("--plain-windows", action="store_true",
                   help="windows of max_seq_len tokens with no bos inserted, first token of each not predicted")
    cli.add_memory(p)
    cli.add_json(p)


def run(args) -> int:
    model_dir = Path(args.model) if args.model else default_model_dir()
    kwargs = cli.engine_kwargs(args)
    kwargs["model_dir"] = model_dir
    engine = load(**kwargs)  # the model is checked first: its problems are the likelier ones
    with engine:
        cli.check_against_model(args, engine.config)
        if args.text:
            text_path = Path(args.text)
        else:
            text_path = model_dir / "heldout.txt"
            if not text_path.exists():
                raise BadInput(f"{model_dir} has no heldout.txt; name a text with --text FILE")
        text = read_text_file(text_path)
        c = engine.config
        ids = engine.tokenizer.encode_array(text, args.max_tokens)
        n_tok = ids.size
        bos = None if args.plain_windows else c.bos_token_id
        progress = Progress("scoring", n_windows(n_tok, c.max_seq_len, bos), enabled=None if not args.json else False)
        try:
            result = score_text(engine, text, args.max_tokens, on_window=progress.update, plain=args.plain_windows, ids=ids)
        finally:
            progress.close()
        engine.memwatch.sample()
        st = engine.stats
        pool = st.get("pool") or {}
        doc = {
            "model_dir": str(engine.store.model_dir),
            "model": c.name,
            "text": str(text_path),
            "expert_storage": engine.store.codec.name,
            "expert_bytes": engine.store.expert_nbytes,
            "rule": RULE_PLAIN if bos is None else RULE_BOS,
            **result.to_json(),
            "bytes_paged_in": pool.get("bytes_paged_in"),
            "expert_loads": pool.get("prefill_loads"),
            "stall_ms": pool.get("stall_ns", 0) / 1e6 if pool else None,
            **{k: v for k, v in st.items() if k != "pool"},
            "link_emulated": engine.options.get("link_speed") is not None,
        }
        chk = cap_check(engine)
        if chk is not None:
            doc["cap_exceeded"] = chk["exceeded"]
            doc["cap_allowance_bytes"] = chk["allowance_bytes"]
        warning = cap_warning(engine)
        if warning:
            sys.stderr.write(f"moerun score: warning: {warning}\n")
        if c.extra.get("synthetic"):
            doc["note"] = "random weights: the perplexity means nothing"
        if args.json:
            emit_json(doc)
            return 0
        out = sys.stdout
        b = engine.budget
        rows = [
            ["text", f"{text_path} ({result.predicted:,} tokens predicted in {result.windows} windows)"],
            ["rule", doc["rule"]],
            ["experts", f"{engine.store.codec.name}, {engine.store.expert_nbytes:,} B each"],
            ["cross-entropy", f"{result.cross_entropy:.4f} nats/token"],
            ["perplexity", f"{result.perplexity:.3f}"],
            ["speed", f"{result.tok_s:,.0f} tok/s ({result.forward_ns / 1e6:.0f} ms of forward passes)"],
        ]
        if b.cap is not None:
            rows.append(["memory cap", f"{fmt_bytes(b.cap)}; slots per layer {','.join(map(str, b.slots))}"
                         + (" (one shared pool)" if b.split == "shared" else "")])
            rows.append(["page-ins", f"{pool.get('prefill_loads', 0):,} experts, {fmt_bytes(pool.get('bytes_paged_in', 0))}, "
                         f"stalled {doc['stall_ms']:.1f} ms"])
        if engine.options.get("link_speed") is not None:
            rows.append(["link", f"{engine.options['link_speed'] / 1e9:.2f} GB/s (emulated)"])
        if engine.options.get("cold"):
            rows.append(["cold start", "the model file's pages were dropped from the OS page cache first"])
        rows.append(["peak RSS growth", fmt_bytes(st["peak_rss_growth_bytes"])])
        out.write(f"model {c.name or engine.store.model_dir.name} ({engine.store.model_dir})\n")
        if doc.get("note"):
            out.write(f"note: {doc['note']}\n")
        out.write(table(["", "value"], rows, "ll") + "\n")
    return 0
