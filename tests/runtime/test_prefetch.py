"""moerun.runtime.prefetch: the guess rule ranks a layer ahead's experts as that layer's router would.

Reference: RMSNorm, y = x / sqrt(mean(x^2) + eps) * w (Zhang and Sennrich, "Root Mean Square Layer
Normalization", NeurIPS 2019), then the router's scores y @ R, computed here plainly in float64 for each
target layer.  The rule folds w into R and drops the positive factor 1/rms, which changes no ranking; so its
top-n must be the reference's top-n up to float rounding between near-equal scores.
"""

from __future__ import annotations

import numpy as np
import pytest

import moerun
from moerun.runtime.prefetch import GuessRule

TOL = 1e-4  # relative: float32 rounding of two near-equal scores may swap them, nothing more


@pytest.fixture(scope="module")
def model(synth_models):
    with moerun.load(synth_models(layers=4, experts=8, top_k=2), tokenizer=False) as eng:
        yield eng.model


def _reference_scores(model, target: int, h: np.ndarray) -> np.ndarray:
    layer = model.layers[target]
    x = h.astype(np.float64)
    y = x / np.sqrt(np.mean(x * x, axis=-1, keepdims=True) + model.config.norm_eps) * layer.moe_norm.astype(np.float64)
    return y @ layer.router.astype(np.float64)


def test_the_rules_guesses_are_the_routers_top_experts_of_the_layers_ahead(model):
    rule = GuessRule(model, lookahead=2)
    rng = np.random.default_rng(0)
    h = rng.standard_normal((16, model.config.d_model)).astype(np.float32)
    n = 3
    for layer in range(model.config.n_layers):
        table = rule.table(layer, h, 2, n)
        for j in range(2):
            target = layer + 1 + j
            if target >= model.config.n_layers:
                assert (table[:, j] == -1).all()  # past the last layer: padding
                continue
            ref = _reference_scores(model, target, h)
            for row in range(h.shape[0]):
                chosen = table[row, j]
                rest = np.setdiff1d(np.arange(model.config.n_experts), chosen)
                scale = np.abs(ref[row]).max()
                assert ref[row, chosen].min() >= ref[row, rest].max() - TOL * scale, (layer, j, row)


def test_one_tokens_guesses_equal_its_row_of_the_table(model):
    rule = GuessRule(model, lookahead=3)
    h = np.random.default_rng(1).standard_normal((1, model.config.d_model)).astype(np.float32)
    for layer in range(model.config.n_layers):
        top = rule.top(layer, h, 2)
        table = rule.table(layer, h, 3, 2)[0]
        assert len(top) == rule.targets(layer) == min(3, model.config.n_layers - 1 - layer)
        for j, ids in enumerate(top):
            assert ids == table[j].tolist()
