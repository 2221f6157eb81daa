"""Compute costs at a model's real shape, timed on one layer of random weights: for models too large to load.

``checkpoint_shape(dir)`` describes an open checkpoint for the planner without loading it: its shape and its
bytes from the headers (``moerun.files.checkpoint``), and its compute times from ``measure_shape``, which builds
one routed layer of the same shape and architecture (q/k norms, biases, a gated shared expert) with random
weights and times it as a decode step runs it.  ``model_shape(dir)`` does the same for a moerun model too large
to run whole, timing its experts (with their stored format's decoding) on a few of its own, read one at a time.  Values do not change what a matrix product costs, so random
weights time what the checkpoint's would; memory stays small (one layer, one expert, a slice of the output
matrix whose time is scaled to the whole: a one-row product is bound by the bytes it reads).

Times are microseconds, in the keys of a shape file (``moerun.planner.calibration.load_shape``); a dense layer's
time (attention and its MLP) is spread over the routed layers, as the planner's time model has one entry per
routed layer.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np

from moerun.files.bundled import resolve_model
from moerun.files.checkpoint import STORED_DTYPES, Checkpoint, widen_into
from moerun.files.ckpt_store import DEFAULT_CONTEXT, model_config
from moerun.files.config import ModelConfig
from moerun.files.store import ModelStore
from moerun.model.transformer import KVCache, Transformer, expert, rmsnorm, route, shared_term
from moerun.planner.calibration import _sleep_lateness, micro, settle
from moerun.runtime.budget import fixed_bytes, scratch_bytes

F32 = np.float32
POSITION = 256  # the decode position attention is timed at (a short context: its scores are a small share)
HEAD_ROWS = 16384  # rows of the output matrix timed; the head's time is scaled to the vocabulary from them


def _mat(rng, out_dim: int, in_dim: int) -> np.ndarray:
    """A random [in, out] operand as the engine holds a checkpoint's: the transposed view of [out, in]."""
    return (rng.standard_normal((out_dim, in_dim), dtype=F32) / np.float32(np.sqrt(in_dim))).T


def one_layer(config: ModelConfig, seed: int = 0) -> tuple[Transformer, ModelConfig]:
    """A one-layer model of ``config``'s shape and parts, random weights, context POSITION + 1."""
    c = dataclasses.replace(config, n_layers=1, dense_layers=(), max_seq_len=POSITION + 1, vocab_size=1)
    rng = np.random.default_rng(seed)
    d, p = c.d_model, "layers.0."
    dense: dict = {"embed": np.zeros((1, d), F32), "final_norm": np.ones(d, F32), "lm_head": np.zeros((d, 1), F32),
                   p + "attn_norm": np.ones(d, F32), p + "moe_norm": np.ones(d, F32),
                   p + "attn.wqkv": _mat(rng, c.q_dim + 2 * c.kv_dim, d), p + "attn.wo": _mat(rng, d, c.q_dim),
                   p + "router": _mat(rng, c.n_experts, d)}
    if c.qkv_bias:
        dense[p + "attn.bqkv"] = np.zeros(c.q_dim + 2 * c.kv_dim, F32)
    if c.qk_norm == "per_head":
        dense[p + "attn.q_norm"] = dense[p + "attn.k_norm"] = np.ones(c.head_dim, F32)
    elif c.qk_norm == "full":
        dense[p + "attn.q_norm"] = np.ones(c.q_dim, F32)
        dense[p + "attn.k_norm"] = np.ones(c.kv_dim, F32)
    if c.d_shared:
        dense[p + "shared.w_gate"] = _mat(rng, c.d_shared, d)
        dense[p + "shared.w_up"] = _mat(rng, c.d_shared, d)
        dense[p + "shared.w_down"] = _mat(rng, d, c.d_shared)
        if c.shared_gate:
            dense[p + "shared_gate"] = _mat(rng, 1, d)
    return Transformer(c, dense), c


def measure_shape(config: ModelConfig, expert_dtype: str = "F32", seed: int = 0) -> dict:
    """Microseconds of each compute the planner counts, at ``config``'s shape (module docstring)."""
    model, c = one_layer(config, seed)
    rng = np.random.default_rng(seed + 1)
    d, w = c.d_model, model.layers[0]
    cache = KVCache(c)
    cache.k[...] = rng.standard_normal(cache.k.shape, dtype=F32)
    cache.v[...] = rng.standard_normal(cache.v.shape, dtype=F32)
    x = rng.standard_normal((1, d), dtype=F32)

    def layer_outside_experts():
        h = x + model.attention(rmsnorm(x, w.attn_norm, model.eps), 0, POSITION, cache)
        u = rmsnorm(h, w.moe_norm, model.eps)
        route(u, w.router, c.top_k, c.norm_topk)
        if w.shared is not None:
            shared_term(u, w.shared)

    gate, up, down = _mat(rng, c.d_expert, d), _mat(rng, c.d_expert, d), _mat(rng, d, c.d_expert)
    u = rng.standard_normal((1, d), dtype=F32)
    stored = [np.zeros(m.T.shape, STORED_DTYPES[expert_dtype]) for m in (gate, up, down)]
    scratch = [np.empty(m.T.shape, F32) for m in (gate, up, down)]

    def widen():
        for s, o in zip(stored, scratch):
            widen_into(s, expert_dtype, o)

    expert_bytes = sum(s.nbytes for s in stored)
    src, dst = np.ones(expert_bytes, np.uint8), np.zeros(expert_bytes, np.uint8)
    rows = min(config.vocab_size, HEAD_ROWS)
    head = rng.standard_normal((rows, d), dtype=F32)
    norm = np.ones(d, F32)
    guess = (w.moe_norm[:, None] * w.router).astype(F32)

    def timed(fn, number: int) -> float:
        return settle(lambda: micro(fn, number))[0] * 1e6

    out = {
        "dense_layer_us": timed(layer_outside_experts, 30),
        "expert_us": timed(lambda: expert(u, gate, up, down), 30),
        "decode_us": timed(widen, 20) if expert_dtype != "F32" else 0.0,
        "copy_us": timed(lambda: np.copyto(dst, src), 20),
        "head_us": timed(lambda: rmsnorm(x, norm, model.eps) @ head.T, 10) * config.vocab_size / rows,
        "guess_us": timed(lambda: np.argsort(-(x[0] @ guess), kind="stable")[:2], 100),
        "wait_us": _sleep_lateness() * 1e6,
    }
    if config.dense_layers:  # a dense layer: attention as above, and a SwiGLU MLP of d_dense
        mg, mu, md = _mat(rng, c.d_dense, d), _mat(rng, c.d_dense, d), _mat(rng, d, c.d_dense)
        mlp = timed(lambda: expert(u, mg, mu, md), 20)
        out["dense_layer_us"] += len(config.dense_layers) * (out["dense_layer_us"] + mlp) / config.n_layers
    out["measured"] = f"one layer of random weights at this shape, decode position {POSITION}"
    return out


def checkpoint_shape(model_dir: str | Path, context: int = DEFAULT_CONTEXT) -> tuple[dict, ModelConfig]:
    """An open checkpoint as a shape for the planner: layers, experts and bytes, from its headers (nothing of its
    weights is read); ``measure_shape(config, config.dtype)`` adds the compute times."""
    with Checkpoint.open(model_dir, require_tokenizer=False) as ck:
        c = model_config(ck, None, context)
        sizes = ck.sizes()
        random = ck.random_weights
    dense = sizes.dense_f32 + (sizes.embed_f32 if sizes.tied else 0)
    codec_scratch = 0 if c.dtype == "F32" else 4 * 3 * c.d_model * c.d_expert  # the stored parts widened at each use
    shape = {
        "layers": c.n_layers, "experts": c.n_experts, "top_k": c.top_k, "expert_bytes": sizes.expert_stored,
        "dense_bytes": dense, "kv_cache_bytes": KVCache.nbytes_for(c), "scratch_bytes": scratch_bytes(c, codec_scratch),
        "random_weights": random,
    }
    return shape, c


OWN_EXPERTS = 4  # a moerun model's own experts timed in turn (as decode meets them, not one kept hot in the caches)


def model_shape(model_dir: str | Path) -> dict:
    """A moerun model as a shape for the planner, measured within a small memory: its bytes from the store (the
    dense weights, which every cap holds anyway), the compute outside its experts at its shape (``measure_shape``),
    and one expert with its stored format's decoding timed on OWN_EXPERTS of its own experts of the first layer."""
    store = ModelStore.open(resolve_model(model_dir))
    try:
        c = store.config
        timed = measure_shape(c, "F32")
        codec = store.codec
        bound = []
        for e in range(min(OWN_EXPERTS, c.n_experts)):
            buf = np.zeros(store.slot_nbytes, np.uint8)
            store.copy_in(0, e, buf)
            bound.append(codec.bind(buf))
        decoded = [tuple(np.array(w) for w in codec.weights(b)) for b in bound]
        u = np.random.default_rng(2).standard_normal((1, c.d_model), dtype=F32)
        turn = [0]

        def next_of(items):
            turn[0] = (turn[0] + 1) % len(items)
            return items[turn[0]]

        timed["expert_us"] = settle(lambda: micro(lambda: expert(u, *next_of(decoded)), 30))[0] * 1e6
        timed["decode_us"] = settle(lambda: micro(lambda: codec.weights(next_of(bound)), 20))[0] * 1e6 \
            if codec.name != "F32" else 0.0
        timed["measured"] = (f"one layer of random weights at this shape, decode position {POSITION}, and "
                             f"{len(bound)} of the model's own experts")
        dense, kv, scratch = fixed_bytes(c, store.dense_nbytes, codec.scratch_bytes())
        return {"layers": c.n_layers, "experts": c.n_experts, "top_k": c.top_k, "expert_bytes": store.expert_nbytes,
                "dense_bytes": dense, "kv_cache_bytes": kv, "scratch_bytes": scratch, **timed}
    finally:
        store.close()
