"""Perplexity of a text under a model, teacher-forced, in windows of the model's context.

The scoring rule (docs/guide/quant.md, "Scoring"):

* ``ids = tokenizer.encode(text)`` without a leading bos token (``encode_array``, and ``encode_file``
  for a file read only as far as ``max_tokens`` needs: the same ids).
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

import itertools
import math
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass

import numpy as np

from moerun.errors import BadInput, BadOption


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
            "forward_s": self.forward_ns / 1e9,
            "tok_s": self.tok_s,
        }


NLL_ROWS = 16  # rows of logits widened to float64 at a time: the loss adds 16 x vocab x 8 bytes, not the window's


def window_nll(logits: np.ndarray, ids: np.ndarray) -> tuple[float, int]:
    """Summed negative log-likelihood of ids[1:] given logits[:-1] (float64), and the count.

    Computed ``NLL_ROWS`` rows at a time, so the float64 temporaries stay a small fixed size whatever the
    window: scoring stays inside the memory cap (the logits themselves are part of the budget's scratch).
    """
    ids = np.asarray(ids).reshape(-1)
    n = ids.size - 1
    if n < 1:
        return 0.0, 0
    total = 0.0
    for r0 in range(0, n, NLL_ROWS):
        z = np.asarray(logits[r0 : min(n, r0 + NLL_ROWS)], np.float64)
        m = z.max(axis=-1, keepdims=True)
        lse = m[:, 0] + np.log(np.exp(z - m).sum(axis=-1))
        picked = z[np.arange(z.shape[0]), ids[r0 + 1 : r0 + 1 + z.shape[0]]]
        total += float(np.sum(lse - picked))
    return total, int(n)


def passes_nll(passes: Iterable[np.ndarray], ids: np.ndarray) -> tuple[float, int]:
    """``window_nll`` over logits that come a pass of rows at a time (``Engine.logits_in_passes``): each row r
    predicts ids[r + 1]; the last row of the window predicts nothing."""
    ids = np.asarray(ids).reshape(-1)
    total, count, r0 = 0.0, 0, 0
    for rows in passes:
        n = rows.shape[0]
        upto = min(r0 + n, ids.size - 1)  # rows that have a next token
        if upto > r0:
            s, k = window_nll(rows[: upto - r0], ids[r0 : upto + 1])
            total += s
            count += k
        r0 += n
    return total, count


def text_windows(ids: Sequence[int] | np.ndarray, context: int, bos: int | None) -> list[np.ndarray]:
    """Cut a token stream into scoring windows (the rule in the module docstring)."""
    return list(iter_windows(ids, context, bos))


def iter_windows(ids: Sequence[int] | np.ndarray, context: int, bos: int | None) -> Iterator[np.ndarray]:
    """text_windows one at a time: only the window being scored is made (int64, the engine's ids)."""
    ids = np.asarray(ids).reshape(-1)
    if context < 2:
        raise BadOption(f"a context of {context} tokens leaves nothing to predict")
    if bos is None:
        for i in range(0, ids.size, context):
            if ids[i : i + context].size >= 2:
                yield ids[i : i + context].astype(np.int64)
        return
    run = context - 1
    head = np.array([bos], np.int64)
    for i in range(0, ids.size, run):
        yield np.concatenate([head, ids[i : i + run].astype(np.int64)])


def score_windows(engine, windows: Iterable, on_window: Callable[[int], None] | None = None) -> Score:
    """Score explicit token windows with ``engine.logits`` (one forward pass each)."""
    total, n, count, tokens, ns = 0.0, 0, 0, 0, 0
    for w in windows:
        w = np.asarray(w, np.int64).reshape(-1)
        t0 = time.monotonic_ns()
        s, k = passes_nll(engine.logits_in_passes(w), w)  # one pass's logits at a time, freed before the next
        ns += time.monotonic_ns() - t0
        total += s
        n += k
        count += 1
        tokens += w.size
        if on_window is not None:
            on_window(count)
    return Score(total, n, count, tokens, ns)


def score_text(engine, text: str, max_tokens: int | None = None, on_window=None, plain: bool = False,
               ids: np.ndarray | None = None) -> Score:
    """Perplexity of ``text`` (the first ``max_tokens`` tokens of it, if given).

    ``plain``: windows are plain runs of max_seq_len tokens whose first token
    is not predicted (no bos inserted; the rule of the bundled model's card).
    ``ids``: the text's ids when the caller has them already (``Tokenizer.encode_array``).
    """
    if engine.tokenizer is None:
        raise BadOption("scoring text needs the model's tokenizer")
    if max_tokens is not None and (isinstance(max_tokens, bool) or not isinstance(max_tokens, int) or max_tokens < 1):
        raise BadOption(f"--max-tokens must be a whole number of at least 1, got {max_tokens!r}")
    if ids is None:
        ids = engine.tokenizer.encode_array(text, max_tokens)
    if max_tokens is not None:
        ids = ids[:max_tokens]
    c = engine.config
    bos = None if plain else c.bos_token_id
    windows = iter_windows(ids, c.max_seq_len, bos)
    first = next(windows, None)
    if first is None:
        raise BadInput("the text has too few tokens to score")
    return score_windows(engine, itertools.chain([first], windows), on_window)


def n_windows(n_tokens: int, context: int, bos: int | None) -> int:
    per = context - 1 if bos is not None else context
    if context < 2 or per < 1:
        raise BadOption(f"a context of {context} tokens leaves nothing to predict")
    return -(-n_tokens // per)
