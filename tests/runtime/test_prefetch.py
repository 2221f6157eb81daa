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
from moerun.runtime.budget import minimum_cap
from moerun.runtime.prefetch import GuessRule, Prefetcher

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


# ---------------------------------------------------------------------------- the prefetch point, a step observer


def _smallest_cap(model_dir) -> int:
    with moerun.load(model_dir, tokenizer=False) as eng:
        return minimum_cap(eng.config, eng.store.dense_nbytes, eng.store.expert_nbytes)


@pytest.mark.parametrize("at", ["attention", "output"])
def test_the_prefetcher_acts_at_its_own_point_and_only_for_one_token(at):
    pf = Prefetcher(pool=None, rule=None, n_guesses=2, lookahead=1, reader=None, at=at)
    acted = []
    pf.point = lambda layer, h: acted.append((layer, h))
    one, many = np.ones((1, 4), np.float32), np.ones((3, 4), np.float32)
    pf.after_attention(0, one)
    pf.after_layer(1, one)
    pf.after_attention(2, many)  # a prefill: no guesses
    pf.after_layer(2, many)
    assert acted == [(0, one)] if at == "attention" else acted == [(1, one)]


@pytest.mark.parametrize("at", ["attention", "output"])
def test_a_capped_run_with_prefetch_reaches_the_prefetch_point_once_per_layer_and_decode_step(small_model, at):
    with moerun.load(small_model, tokenizer=False, mem_cap=_smallest_cap(small_model), prefetch=2, prefetch_from=at) as eng:
        L, d = eng.config.n_layers, eng.config.d_model
        acted = []
        real = eng.prefetcher.point

        def point(layer, h):
            acted.append((layer, h.shape))
            real(layer, h)

        eng.prefetcher.point = point
        gen = eng.generate(prompt_ids=[3, 1, 4, 1], max_new=6)
    assert gen.decode_steps == 5
    assert acted == [(layer, (1, d)) for _ in range(5) for layer in range(L)]


def test_a_trace_recorded_with_prefetch_on_holds_the_guesses_of_a_run_without(small_model, every_guess_read):
    def record(**kw):
        with moerun.load(small_model, tokenizer=False, **kw) as eng:
            eng.start_trace()
            eng.generate(prompt_ids=[2, 7, 1, 8], max_new=10)
            return eng.finish_trace(), eng.stats
    plain, _ = record()
    both, stats = record(mem_cap=_smallest_cap(small_model), prefetch=2, lookahead=2)
    assert stats["pool"]["prefetch"]["guesses"] > 0  # the prefetcher observed the run too
    assert np.array_equal(both.guesses, plain.guesses)
    assert np.array_equal(both.experts, plain.experts)
