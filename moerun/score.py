"""Perplexity of a text under a model, teacher-forced, in windows of the model's context.

The scoring rule (docs/quant.md, "Scoring"):

* ``ids = tokenizer.encode(text)`` without a leading bos token.
* The ids are cut into consecutive runs of ``max_seq_len - 1`` tokens (the
  last run may be shorter); each window is ``[bos] + run``, so every window
  fits the context and every token of the text is predicted exactly once.
* One forward pass per window (``engine.logits``); the logits at position
  ``i`` predict the window's token ``i + 1``.  Cross-entropy is the mean over
  all predicted tokens of ``-log softmax(logits)[next token]`` (natural log,
  computed in float64); perplexity is ``exp`` of it.
* A model without a bos token, or ``plain=True``: windows are plain runs of
  ``max_seq_len`` tokens and the first token of each is not predicted (the
  rule the bundled model's CARD.md uses; a bos in front of a run that starts
  mid-document costs the model some nats, so the two rules differ).

``score_windows`` takes explicit windows (any token arrays) and applies the
same rule inside each, so a test can feed recorded reference windows.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass

import numpy as np

from .errors import BadInput, BadOption


@dataclass
class Score:
    nll_sum: float  # nats, summed over predicted tokens
    predicted: int  # tokens predicted
    windows: int
    tokens: int  # tokens run through the model (bos included)
    forward_ns: int  # time in forward passes and the loss, monotonic clock

    @property
    def cross_entropy(self) -> float:
        return self.nll_sum / self.predicted if self.predicted else float("nan")

    @property
    def perplexity(self) -> float:
        return math.exp(self.cross_entropy) if self.predicted else float("nan")

    @property
    def tok_s(self) -> float:
        """Predicted tokens per second of forward-pass time."""
        return self.predicted / (self.forward_ns / 1e9) if self.forward_ns else 0.0

    def to_json(self) -> dict:
        return {
            "cross_entropy_nats": self.cross_entropy,
            "perplexity": self.perplexity,
            "predicted_tokens": self.predicted,
            "windows": self.windows,
            "tokens_through_model": self.tokens,
            "forward_ms": self.forward_ns / 1e6,
            "tok_s": self.tok_s,
        }


def window_nll(logits: np.ndarray, ids: np.ndarray) -> tuple[float, int]:
    """Summed negative log-likelihood of ids[1:] given logits[:-1] (float64), and the count."""
    ids = np.asarray(ids).reshape(-1)
    if ids.size < 2:
        return 0.0, 0
    z = np.asarray(logits[: ids.size - 1], np.float64)
    m = z.max(axis=-1, keepdims=True)
    lse = m[:, 0] + np.log(np.exp(z - m).sum(axis=-1))
    picked = z[np.arange(ids.size - 1), ids[1:]]
    return float(np.sum(lse - picked)), int(ids.size - 1)


def text_windows(ids: Sequence[int] | np.ndarray, context: int, bos: int | None) -> list[np.ndarray]:
    """Cut a token stream into scoring windows (the rule in the module docstring)."""
    ids = np.asarray(ids, np.int64).reshape(-1)
    if context < 2:
        raise BadOption(f"a context of {context} tokens leaves nothing to predict")
    if bos is None:
        return [ids[i : i + context] for i in range(0, ids.size, context) if ids[i : i + context].size >= 2]
    run = context - 1
    head = np.array([bos], np.int64)
    return [np.concatenate([head, ids[i : i + run]]) for i in range(0, ids.size, run)]


def score_windows(engine, windows: Iterable, on_window: Callable[[int], None] | None = None) -> Score:
    """Score explicit token windows with ``engine.logits`` (one forward pass each)."""
    total, n, count, tokens, ns = 0.0, 0, 0, 0, 0
    for w in windows:
        w = np.asarray(w, np.int64).reshape(-1)
        t0 = time.monotonic_ns()
        logits = engine.logits(w)
        s, k = window_nll(logits, w)
        ns += time.monotonic_ns() - t0
        total += s
        n += k
        count += 1
        tokens += w.size
        if on_window is not None:
            on_window(count)
    return Score(total, n, count, tokens, ns)


def score_text(engine, text: str, max_tokens: int | None = None, on_window=None, plain: bool = False) -> Score:
    """Perplexity of ``text`` (the first ``max_tokens`` tokens of it, if given).

    ``plain``: windows are plain runs of max_seq_len tokens whose first token
    is not predicted (no bos inserted; the rule of the bundled model's card).
    """
    if engine.tokenizer is None:
        raise BadOption("scoring text needs the model's tokenizer")
    if max_tokens is not None and max_tokens < 1:
        raise BadOption(f"--max-tokens must be at least 1, got {max_tokens}")
    ids = engine.tokenizer.encode(text, bos=False)
    if max_tokens is not None:
        ids = ids[:max_tokens]
    c = engine.config
    windows = text_windows(ids, c.max_seq_len, None if plain else c.bos_token_id)
    if not windows:
        raise BadInput("the text has too few tokens to score")
    return score_windows(engine, windows, on_window)


def n_windows(n_tokens: int, context: int, bos: int | None) -> int:
    per = context - 1 if bos is not None else context
    return -(-n_tokens // per)
