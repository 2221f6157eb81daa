"""``moerun.record`` and ``moerun.replay``: routing traces made from a text, and policies replayed on them.

Each returns a result whose ``to_json()`` is what the command's ``--json`` prints; errors are
``moerun.errors``; progress goes to the callback given, never to a stream.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from moerun.checks.score import passes_nll
from moerun.errors import BadInput, BadOption
from moerun.files.bundled import resolve_model
from moerun.files.fileio import check_output
from moerun.files.trace import Trace, read_trace, write_trace
from moerun.runtime.options import load
from moerun.sim.report import DEFAULT_POLICIES, parse_policies, parse_slots, run_replay
from moerun.units import parse_size

# ---------------------------------------------------------------------------------------------- replay


@dataclass
class ReplayResult:
    """Hit rates of each policy at each slot count (``results``: one record per policy, slots and layer,
    the layer "all" for the whole model), with the baselines, prefetch recall and simulated prefetch."""

    trace: dict  # what the trace holds (tokens, layers, top_k, ...) and its file
    slots: list[int]
    split: str  # "even" (a quota per layer, the same slots for each) or "shared" (one pool for every layer)
    policies: list[str]
    expert_bytes: int | None
    results: list[dict]
    prefetch_recall: list[dict]
    baselines: list[dict] | None = None  # lru on the time-shuffled and the random-routing trace
    baseline_seed: int | None = None
    prefetch: int = 0  # the prefetch setting simulated (0: none), as the engine's options write it
    lookahead: int = 1
    prefetch_results: list[dict] | None = None  # with prefetch: the records with prefetch
    plot: dict | None = None  # what 'moerun replay --plot' drew (the command adds it)
    warm_from: dict | None = None  # the routing profile every pool was filled from first (None: cold starts)

    def to_json(self) -> dict:
        doc: dict = {
            "trace": self.trace,
            "slots": self.slots,
            "split": self.split,
            "policies": self.policies,
            "expert_bytes": self.expert_bytes,
            "results": self.results,
        }
        if self.warm_from is not None:
            doc["warm_from"] = self.warm_from
        if self.baselines is not None:
            doc["baselines"] = self.baselines
            doc["baseline_seed"] = self.baseline_seed
        doc["prefetch_recall"] = self.prefetch_recall
        doc["prefetch"] = self.prefetch
        doc["lookahead"] = self.lookahead
        if self.prefetch_results is not None:
            doc["prefetch_results"] = self.prefetch_results
        if self.plot is not None:
            doc["plot"] = self.plot
        return doc


def replay(trace: str | os.PathLike, evict: str | Sequence[str] = tuple(DEFAULT_POLICIES), slots: str | Sequence[int] | None = None,
           *, shared_pool: bool = False, prefetch: int = 0, lookahead: int | None = None,
           expert_bytes: int | str | None = None, seed: int = 0, baselines: bool = True, generic: bool = False,
           progress: Callable[[int, int, str], None] | None = None,
           on_trace: Callable[[Trace], None] | None = None, warm_from=None) -> ReplayResult:
    """Replay a routing trace file through eviction policies (``moerun replay``).

    ``evict``: policy names (a list, or "lru,lfu"); ``slots``: slots per layer to try (a list, or "1-8"),
    with ``shared_pool`` sizes of one pool shared by all layers.  ``prefetch``/``lookahead``: also simulate
    prefetch with the trace's top-N guesses.  ``baselines``: lru on a time-shuffled and a random-routing
    trace (seeded by ``seed``).  ``generic``: the reference path only.  ``progress(done, total, what)``
    after each unit of work; ``on_trace(trace)`` once the trace is read, before any replaying.  ``warm_from``: a
    routing profile (path or Profile, ``moerun profile``): every pool is filled from it before the first step.
    """
    names = parse_policies(evict if isinstance(evict, str) else ",".join(evict))
    if slots is not None:
        slots = parse_slots(slots if isinstance(slots, str) else ",".join(map(str, slots)))
    if prefetch < 0:
        raise BadOption(f"--prefetch must be 0 (off) or a number of guesses, got {prefetch}")
    if lookahead is not None and lookahead < 1:
        raise BadOption(f"--lookahead must be at least 1, got {lookahead}")
    if lookahead is not None and not prefetch:
        raise BadOption("--lookahead has no effect without --prefetch N (N > 0); drop it or add --prefetch")
    eb = parse_size(expert_bytes, "expert size") if expert_bytes is not None else None
    if eb is not None and eb <= 0:
        raise BadOption("--expert-bytes must be more than zero")
    from moerun.files.profile import read_profile

    warm = read_profile(warm_from) if warm_from is not None else None
    tr = read_trace(trace)
    if on_trace is not None:
        on_trace(tr)
    doc = run_replay(tr, names, slots, expert_bytes=eb, seed=seed,
                     prefetch=(prefetch, lookahead or 1) if prefetch else None,
                     baselines=baselines, fast=not generic, shared=shared_pool, progress=progress, warm=warm)
    doc["trace"]["file"] = str(trace) if isinstance(trace, os.PathLike) else trace
    return ReplayResult(**doc)


# ---------------------------------------------------------------------------------------------- record

# Keys of the engine's trace metadata that describe a live pool, not a teacher-forced pass.
_LIVE_ONLY = ("evict", "slots", "split", "prefetch", "lookahead", "link_speed_emulated", "warm_from")


def windows(ids, max_seq_len: int, bos: int | None) -> list[np.ndarray]:
    """Split text tokens (a list or an array) into model-sized windows, each starting with bos when the model
    has one: int32 arrays, 4 bytes a token."""
    body = max_seq_len - 1 if bos is not None else max_seq_len
    if body < 1:
        raise BadOption(f"the model's context of {max_seq_len} tokens leaves no room for text after the bos token")
    ids = np.asarray(ids, np.int32).reshape(-1)
    head = np.array([bos] if bos is not None else [], np.int32)
    return [np.concatenate([head, ids[i : i + body]]) for i in range(0, ids.size, body)]


@dataclass
class RecordResult:
    """What ``moerun.record`` routed and wrote."""

    trace: str  # the trace file written
    model: str
    text: str
    text_tokens: int
    tokens: int
    windows: int
    layers: int
    top_k: int
    n_experts: int
    expert_accesses: int
    lookahead: int
    guesses: int
    cross_entropy_nats_per_token: float | None
    seconds: float
    tok_s: float | None
    file_bytes: int
    window_tokens: int = 0  # the model's context (not in the JSON document: the text summary says it)
    window_bos: bool = True  # each window opened by the bos token (not in the JSON document either)

    def to_json(self) -> dict:
        return {
            "trace": self.trace,
            "model": self.model,
            "text": self.text,
            "text_tokens": self.text_tokens,
            "tokens": self.tokens,
            "windows": self.windows,
            "layers": self.layers,
            "top_k": self.top_k,
            "n_experts": self.n_experts,
            "expert_accesses": self.expert_accesses,
            "lookahead": self.lookahead,
            "guesses": self.guesses,
            "cross_entropy_nats_per_token": self.cross_entropy_nats_per_token,
            "seconds": self.seconds,
            "tok_s": self.tok_s,
            "file_bytes": self.file_bytes,
        }


def _finished_trace(engine, wins: list[np.ndarray], done: int, text_path: Path) -> Trace:
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


def record(trace: str | os.PathLike, model_dir: str | os.PathLike | None = None, text: str | os.PathLike | None = None,
           *, max_tokens: int | None = None, force: bool = False, mem_cap: int | str | None = None,
           max_context: int | None = None, progress: Callable[[int, int, int], None] | None = None) -> RecordResult:
    """Route a text file (default: the model's heldout.txt) through the model and write the trace (``moerun record``).

    Teacher-forced, window by window; an interrupted run writes the windows it routed as a partial trace.
    ``mem_cap`` and ``max_context``: the engine's (``load``), so a model larger than memory can be recorded
    (the windows are then the context asked for).  ``progress(windows_done, windows_total, tokens_routed)``
    after each window.
    """
    model_dir = resolve_model(model_dir)
    text_path = Path(text) if text is not None else model_dir / "heldout.txt"
    if text is None and not text_path.exists():
        raise BadInput(f"{model_dir} has no heldout.txt; name a text with --text FILE")
    try:
        inputs = [p for p in model_dir.iterdir() if p.is_file()] + [text_path]
    except OSError:
        inputs = [text_path]
    check_output(trace, force, inputs, "--trace")
    with load(model_dir, mem_cap=mem_cap, max_context=max_context) as engine:
        c = engine.config
        # read and encoded only as far as max_tokens needs, before any window is routed
        ids = engine.tokenizer.encode_file(text_path, max_tokens)
        if not ids.size:
            raise BadInput(f"{text_path}: no tokens to route (the text is empty)")
        wins = windows(ids, c.max_seq_len, c.bos_token_id)
        engine.start_trace()
        t0 = time.monotonic_ns()
        nll = 0.0
        predicted = 0
        done = 0
        routed = 0
        try:
            for w in wins:
                s, k = passes_nll(engine.logits_in_passes(w), np.asarray(w))
                nll += s
                predicted += k
                done += 1
                routed += len(w)
                if progress is not None:
                    progress(done, len(wins), routed)
        finally:
            if engine.recorder is not None and done:  # an interrupted run keeps what it routed (a partial trace)
                tr = _finished_trace(engine, wins, done, text_path)
                write_trace(trace, tr, force=force, inputs=inputs, what="--trace")
        elapsed = (time.monotonic_ns() - t0) / 1e9
        return RecordResult(
            trace=str(trace) if isinstance(trace, os.PathLike) else trace,
            model=c.name,
            text=str(text_path),
            text_tokens=tr.meta["text_tokens"],
            tokens=tr.n_tokens,
            windows=len(wins),
            layers=c.n_layers,
            top_k=c.top_k,
            n_experts=c.n_experts,
            expert_accesses=int((tr.experts >= 0).sum()),
            lookahead=int(tr.guesses.shape[2]) if tr.guesses is not None else 0,
            guesses=int(tr.guesses.shape[3]) if tr.guesses is not None else 0,
            cross_entropy_nats_per_token=nll / predicted if predicted else None,
            seconds=elapsed,
            tok_s=tr.n_tokens / elapsed if elapsed else None,
            file_bytes=Path(trace).stat().st_size,
            window_tokens=c.max_seq_len,
            window_bos=c.bos_token_id is not None,
        )


# ---------------------------------------------------------------------------------------------- profile


@dataclass
class ProfileResult:
    """What ``moerun.profile`` counted and wrote."""

    profile: str  # the file written
    model: str
    source: str  # "text" (routed now) or "trace" (counted from a trace file)
    file: str  # the text or the trace the counts came from
    tokens: int
    layers: int
    experts: int
    top_k: int
    expert_accesses: int
    used: int  # (layer, expert) pairs used at least once
    hottest: list  # per layer: the most used expert and its share of that layer's accesses
    seconds: float

    def to_json(self) -> dict:
        return {
            "profile": self.profile,
            "model": self.model,
            "source": self.source,
            "file": self.file,
            "tokens": self.tokens,
            "layers": self.layers,
            "experts": self.experts,
            "top_k": self.top_k,
            "expert_accesses": self.expert_accesses,
            "used": self.used,
            "hottest": self.hottest,
            "seconds": self.seconds,
        }


def _config_only(model_dir: Path):
    """The model's ModelConfig from its config.json (an open checkpoint: and its headers), no weight read."""
    from moerun.files.ckpt_config import is_open_checkpoint

    if is_open_checkpoint(model_dir):
        from moerun.files.checkpoint import Checkpoint
        from moerun.files.ckpt_store import model_config

        with Checkpoint.open(model_dir, require_tokenizer=False) as ck:
            return model_config(ck, None)
    from moerun.files.config import ModelConfig

    return ModelConfig.load(model_dir)


def profile(out: str | os.PathLike, model_dir: str | os.PathLike | None = None, text: str | os.PathLike | None = None,
            *, from_trace: str | os.PathLike | None = None, max_tokens: int | None = None, force: bool = False,
            mem_cap: int | str | None = None, max_context: int | None = None,
            progress: Callable[[int, int, int], None] | None = None) -> ProfileResult:
    """Count how often each layer chose each expert and write a routing profile (``moerun profile``;
    moerun.files.profile has the format).  The counts come from a text routed through the model now, window by
    window and teacher-forced as ``record`` routes it (default: the model's heldout.txt), or, with ``from_trace``,
    from a routing trace of this model, with no model run.  ``progress(windows_done, windows_total, tokens)``."""
    from moerun.files.profile import Profile, counts_of, file_digest, identity, write_profile

    model_dir = resolve_model(model_dir)
    if from_trace is not None and (text is not None or max_tokens is not None or mem_cap is not None or max_context is not None):
        raise BadOption("--from-trace counts a trace that exists: --text, --max-tokens, --mem-cap and --max-context "
                        "are for routing a text; give one or the other")
    try:
        inputs = [p for p in model_dir.iterdir() if p.is_file()]
    except OSError:
        inputs = []
    src = Path(from_trace) if from_trace is not None else Path(text) if text is not None else model_dir / "heldout.txt"
    if from_trace is None and text is None and not src.exists():
        raise BadInput(f"{model_dir} has no heldout.txt; name a text with --text FILE")
    inputs.append(src)
    check_output(out, force, inputs, "--out")
    t0 = time.monotonic_ns()
    settings: dict = {}
    if from_trace is not None:
        c = _config_only(model_dir)
        tr = read_trace(from_trace, model=(c.n_layers, c.n_experts, c.top_k))
        experts = tr.experts
        tokens = tr.n_tokens
        settings = {"trace_source": tr.meta.get("source"), "partial": bool(tr.meta.get("partial", False))}
        kind = "trace"
    else:
        with load(model_dir, mem_cap=mem_cap, max_context=max_context) as engine:
            c = engine.config
            ids = engine.tokenizer.encode_file(src, max_tokens)
            if not ids.size:
                raise BadInput(f"{src}: no tokens to route (the text is empty)")
            wins = windows(ids, c.max_seq_len, c.bos_token_id)
            engine.start_trace(n_guesses=1)
            routed = 0
            for i, w in enumerate(wins):
                engine.logits(w)
                routed += len(w)
                if progress is not None:
                    progress(i + 1, len(wins), routed)
            experts = engine.finish_trace().experts
        tokens = int(experts.shape[0])
        settings = {"max_tokens": max_tokens, "windows": len(wins), "window_tokens": c.max_seq_len,
                    "bos_per_window": c.bos_token_id is not None}
        kind = "text"
    counts = counts_of(experts, c.n_experts)
    prof = Profile(counts, identity(c), {"kind": kind, "file": str(src), "blake2b": file_digest(src, "file"), "tokens": tokens},
                   settings)
    write_profile(out, prof, force=force, inputs=inputs)
    per_layer = counts.sum(axis=1)
    hottest = [{"layer": layer, "expert": int(row.argmax()), "share": float(row.max() / n) if n else None}
               for layer, (row, n) in enumerate(zip(counts, per_layer))]
    return ProfileResult(
        profile=str(out) if isinstance(out, os.PathLike) else out, model=c.name, source=kind, file=str(src),
        tokens=tokens, layers=c.n_layers, experts=c.n_experts, top_k=c.top_k, expert_accesses=int(counts.sum()),
        used=int((counts > 0).sum()), hottest=hottest, seconds=(time.monotonic_ns() - t0) / 1e9)
