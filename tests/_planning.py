"""Small traces and cost tables for the planner's tests (test_plan, test_timeline): invented shapes, no check values."""

from __future__ import annotations

import numpy as np

from moerun.files.trace import Trace
from moerun.planner.search import Costs

US = 1e-6


def _trace(experts, guesses=None, n_experts=None, prefill=0) -> Trace:
    e = np.asarray(experts, np.int64)
    if e.ndim == 1:
        e = e[:, None, None]
    meta = {"n_experts": n_experts or int(e.max()) + 1, "prefill_tokens": prefill}
    g = None if guesses is None else np.asarray(guesses, np.int64)
    return Trace(e, guesses=g, meta=meta)


def _costs(L=1, attn=10, expert=2, head=3, page=100, wait=0) -> Costs:
    return Costs([attn * US] * L, expert * US, head * US, page * US, "test", wait * US)


def _random_trace(rng, tokens=120, layers=3, experts=8, k=2):
    ex = np.stack([np.sort(rng.choice(experts, (k,), replace=False)) for _ in range(tokens * layers)]).reshape(tokens, layers, k)
    return Trace(ex.astype(np.int64), meta={"n_experts": experts, "prefill_tokens": 0})
