"""moerun.model: the numpy transformer computes DESIGN section 3, in float32, the same way prefilled or decoded.

Outside reference: PyTorch 2.13.0 (CPU) running moerun.torch_ref, an independent
implementation of the same math (F.scaled_dot_product_attention, index_add MoE).
"""

from __future__ import annotations

import numpy as np
import pytest

import moerun
from moerun.model import route, softmax
from moerun.sampling import Sampling

GREEDY = Sampling(temperature=0.0)
TORCH_TOL = 1e-4  # max abs logit difference against PyTorch; DESIGN section 6 measured about 1e-5
DECODE_TOL = 1e-5  # KV-cache decode vs one pass over the whole sequence (different matmul shapes)


def _prompt(n: int, vocab: int, seed: int = 0) -> list[int]:
    return np.random.default_rng(seed).integers(1, vocab, n).tolist()


# ---------------------------------------------------------------------------- against PyTorch


def test_bundled_model_logits_match_stored_torch_reference(pebble):
    ref_path = pebble / "reference.npz"
    if not ref_path.is_file():
        pytest.skip("tiny_models/pebble/reference.npz is absent")
    ref = np.load(ref_path, allow_pickle=False)
    token_ids, logits = ref["token_ids"], ref["logits"]
    # Reference logits computed by PyTorch 2.13.0 (moerun.torch_ref, float32); the file names the version.
    assert "2.13" in str(ref["torch_version"])
    assert token_ids.ndim == 2 and logits.shape[:2] == token_ids.shape
    with moerun.load(pebble, tokenizer=False) as eng:
        for ids, want in zip(token_ids, logits):
            got = eng.logits(ids.tolist())
            assert got.shape == want.shape
            assert float(np.max(np.abs(got - want))) <= TORCH_TOL


def _torch_logits(model_dir, ids):
    torch = pytest.importorskip("torch")
    try:
        from moerun.torch_ref import TorchMoE
    except ImportError as e:  # the reference module is optional; skip rather than fail
        pytest.skip(f"moerun.torch_ref is not importable: {e}")
    torch.set_num_threads(1)
    model = TorchMoE.from_model_dir(model_dir)
    with torch.no_grad():
        out = model(torch.tensor(ids, dtype=torch.long))
    return out.numpy()


@pytest.mark.parametrize("shape", [{"layers": 3, "experts": 8, "top_k": 2}, {"layers": 2, "experts": 4, "top_k": 1, "n_heads": 4, "n_kv_heads": 2}])
def test_synthetic_model_logits_match_live_torch(synth_models, shape):
    d = synth_models(seed=11, **shape)
    ids = _prompt(40, 257, seed=1)
    want = _torch_logits(d, ids)  # PyTorch 2.13.0
    with moerun.load(d, tokenizer=False) as eng:
        got = eng.logits(ids)
    assert got.shape == want.shape
    assert float(np.max(np.abs(got - want))) <= TORCH_TOL


def test_bundled_model_logits_match_live_torch(pebble):
    c = moerun.load(pebble, tokenizer=False)
    try:
        ids = _prompt(min(96, c.config.max_seq_len), c.config.vocab_size, seed=2)
        want = _torch_logits(pebble, ids)  # PyTorch 2.13.0
        got = c.logits(ids)
    finally:
        c.close()
    assert float(np.max(np.abs(got - want))) <= TORCH_TOL


# ---------------------------------------------------------------------------- decode vs one pass


def _decode_matches_full_pass(model_dir, prompt, max_new, **load_kw):
    with moerun.load(model_dir, tokenizer=False, **load_kw) as eng:
        gen = eng.generate(prompt_ids=prompt, max_new=max_new, sampling=GREEDY, keep_logits=True)
        assert len(gen.logits) == max_new
        full = eng.logits(prompt + gen.new_ids[:-1])
    stepped = np.stack(gen.logits)
    tail = full[len(prompt) - 1 :]
    assert tail.shape == stepped.shape
    assert float(np.max(np.abs(tail - stepped))) <= DECODE_TOL
    # greedy tokens are the argmax of the same logits
    assert gen.new_ids == [int(np.argmax(row)) for row in stepped]


@pytest.mark.parametrize("prompt_len", [1, 7])
def test_kv_cache_decode_equals_one_pass_over_the_sequence(small_model, prompt_len):
    _decode_matches_full_pass(small_model, _prompt(prompt_len, 257), max_new=20)


def test_kv_cache_decode_equals_one_pass_with_grouped_kv_heads(synth_models):
    d = synth_models(seed=4, layers=2, experts=4, top_k=2, n_heads=4, n_kv_heads=2, d_model=48, head_dim=12)
    _decode_matches_full_pass(d, _prompt(5, 257, seed=3), max_new=16)


def test_kv_cache_decode_equals_one_pass_on_the_bundled_model(pebble):
    with moerun.load(pebble, tokenizer=False) as eng:
        vocab = eng.config.vocab_size
    _decode_matches_full_pass(pebble, _prompt(12, vocab, seed=5), max_new=24)


def test_decode_stops_when_the_context_is_full(synth_models):
    d = synth_models(layers=1, experts=2, top_k=1, max_seq_len=8)
    with moerun.load(d, tokenizer=False) as eng:
        gen = eng.generate(prompt_ids=[1, 2, 3], max_new=20, sampling=GREEDY)
    assert gen.stop == "context-full"
    assert len(gen.prompt_ids) + gen.decode_steps == 8


# ---------------------------------------------------------------------------- float32 throughout


def test_logits_are_float32_in_one_pass_and_in_decode(small_model):
    with moerun.load(small_model, tokenizer=False) as eng:
        full = eng.logits(_prompt(9, 257))
        gen = eng.generate(prompt_ids=_prompt(4, 257), max_new=5, sampling=GREEDY, keep_logits=True)
        assert full.dtype == np.float32
        assert all(row.dtype == np.float32 for row in gen.logits)
        # the hidden state leaving the last layer stays float32 too (no float64 promotion on the way)
        x = eng.model.forward(np.array([3]), 0, eng.cache, eng.experts)
        assert x.dtype == np.float32


def test_logits_are_float32_for_a_float16_file(tmp_path):
    from moerun.synth import random_tensors, synth_config, write_model

    config = synth_config(layers=1, experts=2, top_k=1)
    d = write_model(tmp_path / "m", config, tensors={k: v.astype(np.float16) for k, v in random_tensors(config).items()})
    with moerun.load(d, tokenizer=False) as eng:
        assert eng.logits([1, 2, 3]).dtype == np.float32
        assert eng.generate(prompt_ids=[1], max_new=2, keep_logits=True).logits[-1].dtype == np.float32


# ---------------------------------------------------------------------------- routing rule


def test_route_breaks_ties_towards_the_lower_expert_id():
    u = np.zeros((1, 4), np.float32)
    router = np.zeros((4, 6), np.float32)  # every expert gets the same probability
    chosen, weights, p = route(u, router, 3)
    assert chosen.tolist() == [[0, 1, 2]]
    assert np.allclose(weights, 1 / 3)
    assert np.allclose(p, 1 / 6)


def test_route_returns_chosen_in_ascending_id_with_normalised_weights():
    rng = np.random.default_rng(0)
    u = rng.standard_normal((5, 8)).astype(np.float32)
    router = rng.standard_normal((8, 7)).astype(np.float32)
    chosen, weights, p = route(u, router, 3)
    assert (np.diff(chosen, axis=1) > 0).all()
    top = np.sort(np.argsort(-softmax(u @ router), axis=1, kind="stable")[:, :3], axis=1)
    assert np.array_equal(chosen, top)
    assert np.allclose(weights.sum(axis=1), 1.0, atol=1e-6)
    assert weights.dtype == np.float32 and p.dtype == np.float32
