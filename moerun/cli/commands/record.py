"""moerun record: route a text through the model (teacher-forced) and write the routing trace."""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

from moerun.checks.score import window_nll
from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json
from moerun.errors import BadInput, BadOption
from moerun.files.fileio import check_output
from moerun.files.trace import write_trace
from moerun.model.tokenizer import read_text_file
from moerun.runtime.engine import default_model_dir
from moerun.runtime.options import load
from moerun.units import fmt_bytes

HELP = "route a text through the model, window by window, and write every token's experts and guesses to a trace"

# Keys of the engine's trace metadata that describe a live pool, not a teacher-forced pass.
_LIVE_ONLY = ("evict", "slots", "split", "prefetch", "lookahead", "link_speed_emulated")


def add_arguments(p) -> None:
    cli.add_model(p)
    p.add_argument("--text", metavar="FILE", help="UTF-8 text to route (default: the model directory's heldout.txt)")
    p.add_argument("--trace", metavar="FILE", required=True, help="trace file to write (.npz)")
    cli.add_force(p, "the --trace file")
    cli.add_max_tokens(p, "route at most the first N tokens of the text")
    cli.add_json(p)


def windows(ids: list[int], max_seq_len: int, bos: int | None) -> list[list[int]]:
    """Split text tokens into model-sized windows, each starting with bos when the model has one."""
    body = max_seq_len - 1 if bos is not None else max_seq_len
    if body < 1:
        raise BadOption(f"the model's context of {max_seq_len} tokens leaves no room for text after the bos token")
    head = [bos] if bos is not None else []
    return [head + ids[i : i + body] for i in range(0, len(ids), body)]


def _finished_trace(engine, wins: list[list[int]], done: int, text_path: Path):
    """The trace of the first ``done`` windows, as a file of routing only (partial if interrupted).

    A teacher-forced pass routes each token as decoding the text would, so every token replays as a decode
    step (no prefill block); the live figures (page-ins, stalls, the cap's options) say nothing about this
    pass and are dropped.
    """
    c = engine.config
    trace = engine.finish_trace(
        partial=done < len(wins),
        extra={
            "source": "record",
            "text": str(text_path),
            "text_tokens": sum(len(w) for w in wins[:done]) - (done if c.bos_token_id is not None else 0),
            "windows": done,
            "window_tokens": c.max_seq_len,
            "bos_per_window": c.bos_token_id is not None,
            "prefill_tokens": 0,
        },
    )
    for key in _LIVE_ONLY:
        trace.meta.pop(key, None)
    trace.events = {}
    return trace


def _summary(c, trace, args, text_path: Path, n_windows: int, nll: float, predicted: int, elapsed: float) -> dict:
    """What was recorded: the document --json prints and the text is made of."""
    n_tokens = trace.n_tokens
    return {
        "trace": args.trace,
        "model": c.name,
        "text": str(text_path),
        "text_tokens": trace.meta["text_tokens"],
        "tokens": n_tokens,
        "windows": n_windows,
        "layers": c.n_layers,
        "top_k": c.top_k,
        "n_experts": c.n_experts,
        "expert_accesses": int((trace.experts >= 0).sum()),
        "lookahead": int(trace.guesses.shape[2]) if trace.guesses is not None else 0,
        "guesses": int(trace.guesses.shape[3]) if trace.guesses is not None else 0,
        "cross_entropy_nats_per_token": nll / predicted if predicted else None,
        "seconds": elapsed,
        "tokens_per_s": n_tokens / elapsed if elapsed else None,
        "file_bytes": Path(args.trace).stat().st_size,
    }


def _summary_text(doc: dict, c) -> str:
    ce = doc["cross_entropy_nats_per_token"]
    return (
        f"routed {doc['tokens']} tokens ({doc['text_tokens']} of text in {doc['windows']} windows of up to {c.max_seq_len}, "
        f"each opened by the bos token) through {c.n_layers} layers in {doc['seconds']:.1f} s ({doc['tokens_per_s']:.0f} tok/s)\n"
        f"{doc['expert_accesses']} expert accesses (top-{c.top_k} of {c.n_experts}); guesses for {doc['lookahead']} layers ahead, "
        f"top {doc['guesses']} each\n"
        + (f"cross-entropy on this text {ce:.4f} nats/token\n" if ce is not None else "")
        + f"trace written to {doc['trace']} ({fmt_bytes(doc['file_bytes'])})\n"
    )


def run(args) -> int:
    model_dir = Path(args.model) if args.model else default_model_dir()
    text_path = Path(args.text) if args.text else model_dir / "heldout.txt"
    if args.text is None and not text_path.exists():
        raise BadInput(f"{model_dir} has no heldout.txt; name a text with --text FILE")
    inputs = cli.model_files(model_dir) + [text_path]
    check_output(args.trace, args.force, inputs, "--trace")
    text = read_text_file(text_path)
    engine = load(model_dir)
    with engine:
        c = engine.config
        ids = engine.tokenizer.encode_array(text, args.max_tokens).tolist()
        if not ids:
            raise BadInput(f"{text_path}: no tokens to route (the text is empty)")
        wins = windows(ids, c.max_seq_len, c.bos_token_id)
        prog = Progress("record", total=len(wins), enabled=None if not args.json else False)
        engine.start_trace()
        t0 = time.monotonic_ns()
        nll = 0.0
        predicted = 0
        done = 0
        routed = 0
        try:
            for w in wins:
                s, k = window_nll(engine.logits(w), np.asarray(w))
                nll += s
                predicted += k
                done += 1
                routed += len(w)
                prog.update(done, f"{routed} tokens")
        finally:
            prog.close()
            if engine.recorder is not None and done:  # an interrupted run keeps what it routed (a partial trace)
                trace = _finished_trace(engine, wins, done, text_path)
                write_trace(args.trace, trace, force=args.force, inputs=inputs, what="--trace")
        doc = _summary(c, trace, args, text_path, len(wins), nll, predicted, (time.monotonic_ns() - t0) / 1e9)
        if args.json:
            emit_json(doc)
        else:
            sys.stdout.write(_summary_text(doc, c))
    return 0
