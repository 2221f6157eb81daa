"""Speculative prefetch: the guess rule, and the prefetcher that hands guesses to the pool.

The rule: at layer l's prefetch point, apply layer l+j's router (after layer
l+j's own ``moe_norm``) to the hidden state there, for j = 1..lookahead, and
guess its top-n experts.  The same rule serves the live engine, the trace
recorder (``Engine.guesses``), and through recorded traces the replay and the
planner.

It costs one matmul per prefetch point: the norm's weight is folded into each
target router (``rmsnorm(h, w) @ R == (h @ (w[:, None] * R)) / rms(h)``) and the
positive factor ``1 / rms(h)`` is left out, since it changes no ranking.  The
targets' matrices sit side by side, so one product scores every layer ahead.

The prefetch point is right after layer l's attention, once layer l has routed
(``--prefetch-from output`` moves it to the end of the layer): the
``Prefetcher`` is a step observer of the forward pass
(``moerun.model.transformer.StepObserver``), shown the hidden state at both
points and acting, for one token, at its own.  Guesses are
advisory: the pool reads a guess only if it can arrive about when its layer
needs it and the policy would rather hold it than what it evicts
(``ExpertPool.prefetch``); a wrong one costs bandwidth, a failed one is
forgotten and the layer reads the expert itself; if the reader process dies or
stalls, the engine carries on with its own reads.

With ``--prefetch auto`` the pool keeps an account per layer of what its guesses saved
against what they cost (``moerun.runtime.guesses.Account``); a layer whose account
is losing is not guessed for, and the rule is not applied at a point where no layer
ahead is guessed for.  Above the accounts, a gate (``moerun.runtime.guesses.Gate``)
times decode steps with guessing on against steps with it off, and turns guessing
off for a while where it makes steps slower.
"""

from __future__ import annotations

import heapq
import time

import numpy as np

from moerun.model.transformer import Transformer


class GuessRule:
    """Scores and top-n guesses of the next ``lookahead`` layers' routers from one hidden state."""

    def __init__(self, model: Transformer, lookahead: int):
        L = model.config.n_layers
        self.n_experts = model.config.n_experts
        self.lookahead = lookahead
        self.mats: list[np.ndarray | None] = []  # per source layer: [d_model, targets * n_experts]
        for layer in range(L):
            targets = range(layer + 1, min(L, layer + 1 + lookahead))
            cols = [model.routed[t].moe_norm[:, None] * model.routed[t].router for t in targets]
            self.mats.append(np.ascontiguousarray(np.concatenate(cols, axis=1), dtype=np.float32) if cols else None)

    def targets(self, layer: int) -> int:
        """How many layers ahead of ``layer`` there are guesses for."""
        m = self.mats[layer]
        return 0 if m is None else m.shape[1] // self.n_experts

    def scores(self, layer: int, h: np.ndarray) -> np.ndarray:
        """[T, targets, n_experts]: each target layer's router scores of the rows of h, up to a positive factor per row."""
        m = self.mats[layer]
        return (h @ m).reshape(h.shape[0], -1, self.n_experts)

    def top(self, layer: int, h: np.ndarray, n: int) -> list[list[int]]:
        """One token: per target layer (l+1 first), the ids of its top-n experts, best first (ties to the lower id)."""
        m = self.mats[layer]
        if m is None:
            return []
        z = (h[0] @ m).tolist()
        E = self.n_experts
        out = []
        ids = range(E)
        for j in range(0, len(z), E):
            row = z[j : j + E]
            if n == 1:
                out.append([max(ids, key=row.__getitem__)])  # the first of equal scores: the lower id
            elif E <= 64:
                out.append(sorted(ids, key=row.__getitem__, reverse=True)[:n])  # stable: ties keep id order
            else:
                out.append(heapq.nlargest(n, ids, key=row.__getitem__))
        return out

    def table(self, layer: int, h: np.ndarray, lookahead: int, n: int) -> np.ndarray:
        """Every row of h: [T, lookahead, n] int16 expert ids, best first; -1 past the last layer (trace format)."""
        out = np.full((h.shape[0], lookahead, n), -1, np.int16)
        t = min(lookahead, self.targets(layer))
        if t:
            z = self.scores(layer, h)[:, :t]
            top = np.argsort(-z, axis=-1, kind="stable")[..., :n]  # fewer than n when the model has fewer experts
            out[:, :t, : top.shape[-1]] = top
        return out


class Prefetcher:
    """The prefetch point of the live engine: guesses for the layers ahead, placed by the pool.

    A step observer: ``at`` is the point it acts at, "attention" (``after_attention``) or "output"
    (``after_layer``); a pass over more than one token (a prefill) guesses nothing."""

    def __init__(self, pool, rule: GuessRule, n_guesses: int, lookahead: int, reader, at: str = "attention"):
        self.pool = pool
        self.rule = rule
        self.n = n_guesses
        self.lookahead = lookahead
        self.reader = reader
        self.at_output = at == "output"
        self.gate = None  # with --prefetch auto: whether this decode step guesses at all (moerun.runtime.guesses.Gate)
        self._on = True
        self._gap = False  # a pass of more than one token since the gate's last tick

    def after_attention(self, layer: int, h: np.ndarray) -> None:
        if h.shape[0] != 1:
            self._gap = True
        elif not self.at_output:
            self.point(layer, h)

    def after_layer(self, layer: int, x: np.ndarray) -> None:
        if self.at_output and x.shape[0] == 1:
            self.point(layer, x)

    def point(self, layer: int, h: np.ndarray) -> None:
        """Layer ``layer``'s prefetch point (compute thread, one token)."""
        pool = self.pool
        if self.gate is not None:
            if layer == 0:  # a decode step begins
                self._on = self.gate.tick(time.perf_counter_ns(), not self._gap)
                self._gap = False
            if not self._on:
                return
        if not pool.worth_guessing():
            return
        account = pool.account
        if account is not None:  # prefetch auto: only the layers whose guesses pay, the rule only if any does
            t0 = time.perf_counter_ns()
            ahead = self.rule.targets(layer)
            open_ = [account.open(layer + j, self.n) for j in range(1, ahead + 1)]
            if not any(open_):
                return
        base = pool.step * pool.config.n_layers
        pool.prefetch_point()
        for j, guesses in enumerate(self.rule.top(layer, h, self.n), 1):
            if account is None or open_[j - 1]:
                pool.prefetch(layer + j, guesses, base + layer + j)
        if account is not None:  # the point's time, shared by the layers it guessed for
            share = (time.perf_counter_ns() - t0) / sum(open_)
            for j, on in enumerate(open_, 1):
                if on:
                    account.charge(layer + j, share)

    @property
    def alive(self) -> bool:
        return self.reader is not None and self.reader.alive

    def close(self, timeout: float = 2.0) -> None:
        if self.reader is not None:
            self.reader.close(timeout)
