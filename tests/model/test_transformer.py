"""moerun.model.transformer: the numpy transformer computes the model spec (docs/design/architecture.md), in float32, the same way prefilled or decoded.

Outside reference: PyTorch 2.13.0 (CPU) running moerun.checks.torch_twin, an independent
implementation of the same math (F.scaled_dot_product_attention, index_add MoE).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from conftest import copy_model, edit_config

import moerun
import moerun.model.transformer as model_mod
from moerun.model.sampling import Sampling
from moerun.model.transformer import NO_OBSERVER, StepObserver, expert, rmsnorm, route, softmax

GREEDY = Sampling(temperature=0.0)
TORCH_TOL = 1e-4  # max abs logit difference against PyTorch; measured about 1e-5 on the bundled models
DECODE_TOL = 1e-5  # KV-cache decode vs one pass over the whole sequence (different matmul shapes)


def _prompt(n: int, vocab: int, seed: int = 0) -> list[int]:
    return np.random.default_rng(seed).integers(1, vocab, n).tolist()


# ---------------------------------------------------------------------------- against PyTorch


def test_bundled_model_logits_match_stored_torch_reference(bundled):
    ref_path = bundled / "reference.npz"
    if not ref_path.is_file():
        pytest.skip(f"tiny_models/{bundled.name}/reference.npz is absent")
    ref = np.load(ref_path, allow_pickle=False)
    token_ids, logits = ref["token_ids"], ref["logits"]
    # Reference logits computed by PyTorch 2.13.0 (moerun.checks.torch_twin, float32); the file names the version.
    assert "2.13" in str(ref["torch_version"])
    assert token_ids.ndim == 2 and logits.shape[:2] == token_ids.shape
    with moerun.load(bundled, tokenizer=False) as eng:
        for ids, want in zip(token_ids, logits):
            got = eng.logits(ids.tolist())
            assert got.shape == want.shape
            assert float(np.max(np.abs(got - want))) <= TORCH_TOL


def _torch_logits(model_dir, ids):
    torch = pytest.importorskip("torch")
    try:
        from moerun.checks.torch_twin import TorchMoE
    except ImportError as e:  # the reference module is optional; skip rather than fail
        pytest.skip(f"moerun.checks.torch_twin is not importable: {e}")
    torch.set_num_threads(1)
    model = TorchMoE.from_model_dir(model_dir)
    with torch.no_grad():
        out = model(torch.tensor(ids, dtype=torch.long))
    return out.numpy()


@pytest.mark.parametrize(
    "shape",
    [
        {"layers": 3, "experts": 8, "top_k": 2},
        {"layers": 2, "experts": 4, "top_k": 1, "n_heads": 4, "n_kv_heads": 2},
        {"layers": 2, "experts": 12, "top_k": 4, "d_shared": 48, "norm_topk": False},
        {"layers": 2, "experts": 6, "top_k": 3, "d_shared": 24},
    ],
)
def test_synthetic_model_logits_match_live_torch(synth_models, shape):
    d = synth_models(seed=11, **shape)
    ids = _prompt(40, 257, seed=1)
    want = _torch_logits(d, ids)  # PyTorch 2.13.0
    with moerun.load(d, tokenizer=False) as eng:
        got = eng.logits(ids)
    assert got.shape == want.shape
    assert float(np.max(np.abs(got - want))) <= TORCH_TOL


def test_bundled_model_logits_match_live_torch(bundled):
    c = moerun.load(bundled, tokenizer=False)
    try:
        ids = _prompt(min(96, c.config.max_seq_len), c.config.vocab_size, seed=2)
        want = _torch_logits(bundled, ids)  # PyTorch 2.13.0
        got = c.logits(ids)
    finally:
        c.close()
    assert float(np.max(np.abs(got - want))) <= TORCH_TOL


# ---------------------------------------------------------------------------- against the model spec written out again


def _design_logits(model_dir, ids) -> np.ndarray:
    """The model spec (docs/design/architecture.md) written out once more, plainly and in float64: attention head by head,
    the mixture token by token (shared(u) first, then the chosen experts in ascending id).
    Weights as the safetensors library (0.8) reads them, not through moerun's store."""
    from safetensors.numpy import load_file

    c = json.loads((model_dir / "config.json").read_text())
    t = {k: v.astype(np.float64) for k, v in load_file(str(model_dir / "model.safetensors")).items()}
    H, Hkv, hd, E, k = c["n_heads"], c["n_kv_heads"], c["head_dim"], c["n_experts"], c["top_k"]
    d_shared, norm_topk = c.get("d_shared", 0), c.get("norm_topk", True)
    T, half = len(ids), hd // 2

    def norm(x, w):
        return x / np.sqrt(np.mean(x * x, axis=-1, keepdims=True) + c["norm_eps"]) * w

    def swiglu(x, prefix):
        g = x @ t[prefix + "w_gate"]
        return (g / (1 + np.exp(-g)) * (x @ t[prefix + "w_up"])) @ t[prefix + "w_down"]

    angle = np.arange(T)[:, None] * c["rope_theta"] ** (-2.0 * np.arange(half) / hd)[None, :]
    cos, sin = np.cos(angle)[:, None, :], np.sin(angle)[:, None, :]

    def rot(x):
        a, b = x[..., :half], x[..., half:]
        return np.concatenate([a * cos - b * sin, b * cos + a * sin], axis=-1)

    x = t["embed"][np.asarray(ids)]
    for layer in range(c["n_layers"]):
        P = f"layers.{layer}."
        a = norm(x, t[P + "attn_norm"])
        q = rot((a @ t[P + "attn.wq"]).reshape(T, H, hd))
        kk = rot((a @ t[P + "attn.wk"]).reshape(T, Hkv, hd))
        v = (a @ t[P + "attn.wv"]).reshape(T, Hkv, hd)
        heads = np.zeros((T, H, hd))
        for i in range(H):
            j = i // (H // Hkv)
            sc = q[:, i] @ kk[:, j].T / np.sqrt(hd)
            sc[np.triu_indices(T, 1)] = -np.inf
            pr = np.exp(sc - sc.max(axis=-1, keepdims=True))
            heads[:, i] = (pr / pr.sum(axis=-1, keepdims=True)) @ v[:, j]
        h = x + heads.reshape(T, H * hd) @ t[P + "attn.wo"]
        u = norm(h, t[P + "moe_norm"])
        m = np.zeros_like(u)
        for r in range(T):
            z = u[r] @ t[P + "router"]
            p = np.exp(z - z.max())
            p /= p.sum()
            chosen = sorted(sorted(range(E), key=lambda e: (-p[e], e))[:k])
            w = p[chosen] / p[chosen].sum() if norm_topk else p[chosen]
            acc = swiglu(u[r], P + "shared.") if d_shared else np.zeros(u.shape[1])
            for e, we in zip(chosen, w):
                acc = acc + we * swiglu(u[r], P + f"experts.{e}.")
            m[r] = acc
        x = h + m
    x = norm(x, t["final_norm"])
    return x @ (t["embed"].T if c["tied_embeddings"] else t["lm_head"])


@pytest.mark.parametrize("norm_topk", [False, True])
def test_shared_expert_model_matches_design_section_3_written_out_again(synth_models, norm_topk):
    d = synth_models(seed=21, layers=2, experts=10, top_k=3, d_shared=40, norm_topk=norm_topk, n_heads=4, n_kv_heads=2)
    prompt = _prompt(9, 257, seed=7)
    with moerun.load(d, tokenizer=False) as eng:
        got = eng.logits(prompt)
        gen = eng.generate(prompt_ids=prompt, max_new=6, sampling=GREEDY, keep_logits=True)
    want = _design_logits(d, prompt)
    assert float(np.max(np.abs(got - want))) <= TORCH_TOL
    # the decode path: each step's logits against the written-out model over the sequence so far
    want_steps = _design_logits(d, prompt + gen.new_ids[:-1])[len(prompt) - 1 :]
    assert float(np.max(np.abs(np.stack(gen.logits) - want_steps))) <= TORCH_TOL
    # and the two weightings really differ: without renormalisation the weights sum to less than 1
    with moerun.load(d, tokenizer=False) as eng:
        u = np.random.default_rng(0).standard_normal((5, eng.config.d_model)).astype(np.float32)
        _, w, _ = route(u, eng.model.layers[0].router, eng.config.top_k, eng.config.norm_topk)
    sums = w.sum(axis=1)
    assert np.allclose(sums, 1.0, atol=1e-6) if norm_topk else bool(np.all(sums < 0.999))


def test_decode_sums_the_shared_term_first_then_experts_in_ascending_id(synth_models, monkeypatch):
    # Float addition is not associative: the order is part of the spec (docs/design/architecture.md, model spec), pinned bit for bit.
    d = synth_models(seed=22, layers=2, experts=12, top_k=4, d_shared=32)
    prompt = _prompt(5, 257, seed=10)
    real_moe = model_mod.moe

    def moe_in_spec_order(u, layer, chosen, weights, experts, shared=None):
        if chosen.shape[0] > 1:
            return real_moe(u, layer, chosen, weights, experts, shared)
        out = expert(u, *shared)
        for j, e in enumerate(chosen[0].tolist()):
            out = out + weights[0, j] * expert(u, *experts.weights(layer, e))
        return out

    now = _numbers(d, prompt)
    with monkeypatch.context() as mp:
        mp.setattr(model_mod, "moe", moe_in_spec_order)
        spec = _numbers(d, prompt)
    assert np.array_equal(now[1], spec[1]) and now[2] == spec[2]


# ---------------------------------------------------------------------------- no shared expert: the numbers of before


def _route_before(u, router, top_k):
    """moerun.model.transformer.route as it was before d_shared and norm_topk (commit fa7a4f1), verbatim."""
    p = softmax(u @ router)
    order = np.argsort(-p, axis=-1, kind="stable")[:, :top_k]
    chosen = np.sort(order, axis=-1)
    pc = np.take_along_axis(p, chosen, axis=-1)
    return chosen, pc / pc.sum(axis=-1, keepdims=True), p


def _moe_before(u, layer, chosen, weights, experts):
    """moerun.model.transformer.moe as it was before the shared expert (commit fa7a4f1), verbatim in its math.

    A frozen copy on purpose: it repeats lines of today's moe so that a later edit there cannot
    change the reference the test compares against.  (The expert-source hooks it called then,
    ``done`` and ``begin_prefill_layer``, changed no number and are gone from the protocol.)"""
    T, k = chosen.shape
    if T == 1:
        ids = chosen[0].tolist()
        ys: list = [None] * k
        for j in experts.compute_order(layer, ids):
            ys[j] = weights[0, j] * expert(u, *experts.weights(layer, ids[j]))
        out = ys[0]
        for y in ys[1:]:
            out = out + y
        return out
    out = np.zeros_like(u)
    needed = np.unique(chosen).tolist()
    for e in needed:
        rows, slot = np.nonzero(chosen == e)
        y = expert(u[rows], *experts.weights(layer, e))
        out[rows] += weights[rows, slot][:, None] * y
    return out


def _numbers(model_dir, prompt):
    with moerun.load(model_dir, tokenizer=False) as eng:
        full = eng.logits(prompt)
        gen = eng.generate(prompt_ids=prompt, max_new=12, sampling=Sampling(temperature=0.8, top_p=0.95, seed=3), keep_logits=True)
    return full.view(np.uint32), np.stack(gen.logits).view(np.uint32), gen.new_ids


def _assert_numbers_of_before(model_dir, prompt, monkeypatch):
    now = _numbers(model_dir, prompt)

    def route_before(u, router, top_k, norm_topk=True):
        assert norm_topk
        return _route_before(u, router, top_k)

    def moe_before(u, layer, chosen, weights, experts, shared=None):
        assert shared is None
        return _moe_before(u, layer, chosen, weights, experts)

    with monkeypatch.context() as mp:
        mp.setattr(model_mod, "route", route_before)
        mp.setattr(model_mod, "moe", moe_before)
        before = _numbers(model_dir, prompt)
    assert np.array_equal(now[0], before[0])  # prefill logits, bit for bit
    assert np.array_equal(now[1], before[1])  # decode logits, bit for bit
    assert now[2] == before[2]


def test_model_without_shared_expert_computes_the_numbers_of_before_bit_for_bit(pebble, monkeypatch):
    _assert_numbers_of_before(pebble, _prompt(40, 2048, seed=8), monkeypatch)


def test_explicit_d_shared_0_and_norm_topk_true_compute_what_absent_fields_compute(small_model, tmp_path, monkeypatch):
    d = copy_model(small_model, tmp_path / "explicit")
    edit_config(d, lambda c: c.update({"d_shared": 0, "norm_topk": True}))
    prompt = _prompt(11, 257, seed=9)
    assert all(np.array_equal(a, b) for a, b in zip(_numbers(d, prompt)[:2], _numbers(small_model, prompt)[:2]))
    _assert_numbers_of_before(d, prompt, monkeypatch)


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


def test_kv_cache_decode_equals_one_pass_on_the_bundled_model(bundled):
    with moerun.load(bundled, tokenizer=False) as eng:
        vocab = eng.config.vocab_size
    _decode_matches_full_pass(bundled, _prompt(12, vocab, seed=5), max_new=24)


def test_kv_cache_decode_equals_one_pass_with_a_shared_expert_and_raw_weights(synth_models):
    d = synth_models(seed=6, layers=2, experts=10, top_k=3, d_shared=40, norm_topk=False)
    _decode_matches_full_pass(d, _prompt(6, 257, seed=4), max_new=16)


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
    from moerun.makers.synthetic import random_tensors, synth_config, write_model

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


def test_route_without_renormalisation_weighs_by_the_chosen_probabilities():
    rng = np.random.default_rng(1)
    u = rng.standard_normal((6, 8)).astype(np.float32)
    router = rng.standard_normal((8, 32)).astype(np.float32)
    chosen, raw, p = route(u, router, 4, norm_topk=False)
    chosen_n, normed, _ = route(u, router, 4)
    assert np.array_equal(chosen, chosen_n)  # the same experts either way
    assert np.array_equal(raw, np.take_along_axis(p, chosen, axis=1))
    assert np.allclose(normed, raw / raw.sum(axis=1, keepdims=True), rtol=1e-6)
    assert raw.dtype == np.float32


# ---------------------------------------------------------------------------- who routes, who watches


class _Logged:
    """An expert source passing everything through to the engine's, logging the protocol calls in order."""

    def __init__(self, inner, log):
        self.inner, self.log = inner, log
        self.asked: set = set()

    def begin_layer(self, layer):
        self.log.append(("begin_layer", layer))
        self.inner.begin_layer(layer)

    def routed(self, layer, chosen, weights, probs):
        self.log.append(("routed", layer, chosen.copy()))
        self.inner.routed(layer, chosen, weights, probs)

    def compute_order(self, layer, ids):
        return self.inner.compute_order(layer, ids)

    def weights(self, layer, e):
        self.asked.add((layer, e))
        return self.inner.weights(layer, e)

    def end_layer(self, layer):
        self.log.append(("end_layer", layer))
        self.inner.end_layer(layer)


class _Watcher(StepObserver):
    def __init__(self, log):
        self.log = log

    def after_attention(self, layer, h):
        self.log.append(("after_attention", layer, h.copy()))

    def after_layer(self, layer, x):
        self.log.append(("after_layer", layer, x.copy()))


def _pass(eng, ids, experts=None, **kw):
    """One forward pass over ids from position 0, through ``experts`` (default: the engine's pool)."""
    eng.experts.begin_step(-1 if len(ids) > 1 else 0)
    return eng.model.forward(np.array(ids), 0, eng.cache, experts or eng.experts, **kw)


@pytest.mark.parametrize("ids", [[5], [5, 6, 7]])
def test_an_observer_sees_each_layer_after_it_has_routed_and_after_it_ends(small_model, ids):
    with moerun.load(small_model, tokenizer=False) as eng:
        log: list = []
        x = _pass(eng, ids, experts=_Logged(eng.experts, log), observer=_Watcher(log))
        c, model = eng.config, eng.model
    L = c.n_layers
    assert [e[:2] for e in log] == [
        (name, layer) for layer in range(L) for name in ("begin_layer", "routed", "after_attention", "end_layer", "after_layer")
    ]
    for layer in range(L):
        routed, h = log[5 * layer + 1][2], log[5 * layer + 2][2]
        # h is the state the layer routed from: its own router over rmsnorm(h, moe_norm) chooses what the source was told
        u = rmsnorm(h, model.layers[layer].moe_norm, model.eps)
        assert np.array_equal(route(u, model.layers[layer].router, c.top_k, c.norm_topk)[0], routed)
        assert h.shape == (len(ids), c.d_model) and h.dtype == np.float32
    assert np.array_equal(log[-1][2], x)  # what leaves the last layer is the pass's output


def test_observing_a_pass_changes_no_number(small_model):
    with moerun.load(small_model, tokenizer=False) as eng:
        plain = _pass(eng, [4, 9, 2, 8]).copy()
        watched = _pass(eng, [4, 9, 2, 8], observer=_Watcher([]))
        default = _pass(eng, [4, 9, 2, 8], observer=NO_OBSERVER)
    assert np.array_equal(plain.view(np.uint32), watched.view(np.uint32))
    assert np.array_equal(plain.view(np.uint32), default.view(np.uint32))


def test_the_default_routing_is_the_models_own_routers(small_model):
    with moerun.load(small_model, tokenizer=False) as eng:
        c, model = eng.config, eng.model
        u = np.random.default_rng(3).standard_normal((4, c.d_model)).astype(np.float32)
        for layer in range(c.n_layers):
            got = model.own_routing(layer, u)
            want = route(u, model.layers[layer].router, c.top_k, c.norm_topk)
            assert all(np.array_equal(a, b) for a, b in zip(got, want))
        default = _pass(eng, [4, 9, 2]).copy()
        own = _pass(eng, [4, 9, 2], routing=model.own_routing)
    assert np.array_equal(default.view(np.uint32), own.view(np.uint32))


def test_the_routing_callable_decides_the_experts_every_layer_uses(small_model):
    with moerun.load(small_model, tokenizer=False) as eng:
        c = eng.config
        E, k = c.n_experts, c.top_k
        calls = []

        def last_experts(layer, u):  # always the k highest ids, equal weights
            calls.append((layer, u.shape))
            T = u.shape[0]
            chosen = np.tile(np.arange(E - k, E), (T, 1))
            return chosen, np.full((T, k), 1.0 / k, np.float32), np.full((T, E), 1.0 / E, np.float32)

        log: list = []
        source = _Logged(eng.experts, log)
        _pass(eng, [3, 1, 4], experts=source, routing=last_experts)
    assert calls == [(layer, (3, c.d_model)) for layer in range(c.n_layers)]
    assert all(np.array_equal(e[2], np.tile(np.arange(E - k, E), (3, 1))) for e in log if e[0] == "routed")
    assert source.asked == {(layer, e) for layer in range(c.n_layers) for e in range(E - k, E)}
