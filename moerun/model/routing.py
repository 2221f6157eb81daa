"""Routing replayed from a trace: each layer takes its chosen experts and weights from recorded rows.

To validate the planner at realistic expert sizes, a model with large random
experts (``moerun synth``) is run with the routing of a trained model: its
layers compute everything for real (attention, the experts' matmuls, page-ins
from storage) except the router, whose decision comes from the trace.  Rows are
taken in order, one per token the engine processes (a prefill takes as many
rows as prompt tokens, each decode step one), across generations, wrapping
round at the end of the trace.  A ``ReplayedRouting`` is the ``routing``
callable of the forward pass (``moerun.model.transformer``) and keeps its own
place: once the last layer has taken a pass's rows, the next pass takes the rows
after them.  Every output of such a run says it replayed routing
(``Engine.options["routing"]``).

A run of a model with its own recorded trace as routing computes exactly what
the normal run computes: the recorded weights are the router's own float32
numbers (tests/test_routing.py checks logits and tokens bit for bit).
"""

from __future__ import annotations

import numpy as np

from moerun.errors import BadTrace
from moerun.files.config import ModelConfig
from moerun.files.trace import Trace, check_weights, shape_text


class ReplayedRouting:
    """The routing decisions of a trace, served row by row to a model of the same shape."""

    def __init__(self, trace: Trace, config: ModelConfig, label: str = "trace"):
        T, L, k = trace.experts.shape
        if L != config.n_layers or k != config.top_k:  # ids beyond the model's experts are named below
            raise BadTrace(f"{label}: routing of another model (trace: {shape_text(L, trace.n_experts, k)}; "
                           f"model: {shape_text(config.n_layers, config.n_experts, config.top_k)})")
        if T == 0:
            raise BadTrace(f"{label}: the trace holds no tokens to take routing from")
        ex = trace.experts
        if int(ex.max()) >= config.n_experts or int(ex.min()) < 0:
            raise BadTrace(f"{label}: the trace names experts outside 0..{config.n_experts - 1} or leaves a chosen slot empty")
        if (np.diff(np.sort(ex, axis=-1), axis=-1) == 0).any():
            raise BadTrace(f"{label}: a token chooses the same expert twice in one layer")
        self.experts = np.sort(ex, axis=-1).astype(np.int64)
        if trace.weights is not None:
            check_weights(label, trace.weights, ex)
            order = np.argsort(ex, axis=-1, kind="stable")
            self.weights = np.take_along_axis(trace.weights, order, axis=-1).astype(np.float32)
        else:  # no recorded weights: the chosen experts count equally
            self.weights = np.full(ex.shape, 1.0 / k, np.float32)
        if trace.probs is not None and trace.probs.shape[-1] == config.n_experts:
            self.probs = trace.probs.astype(np.float32)
        else:
            E = config.n_experts
            self.probs = np.zeros((T, L, E), np.float32)
            np.put_along_axis(self.probs, self.experts, self.weights, axis=-1)
        self.n = T
        self.cursor = 0  # the row of the next token the engine processes
        self.last_layer = L - 1
        self.label = label

    def rows(self, count: int) -> np.ndarray:
        return (self.cursor + np.arange(count)) % self.n

    def __call__(self, layer: int, u: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The routing of the pass's tokens (the rows of u) at ``layer``, from the trace:
        (chosen [T, k] ascending, weights [T, k], probs [T, E]).  ``u`` itself is not read."""
        count = u.shape[0]
        r = self.rows(count)
        if layer == self.last_layer:  # every layer has taken these rows: the next pass starts after them
            self.advance(count)
        return self.experts[r, layer], self.weights[r, layer], self.probs[r, layer]

    def advance(self, count: int) -> None:
        """``count`` more tokens have been through every layer."""
        self.cursor = (self.cursor + count) % self.n
