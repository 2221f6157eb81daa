"""The bundled models compute bit for bit what they computed before open checkpoints' optional parts joined the
model (issue 22): a frozen copy of the forward pass as it stood at commit 8570ddf (moerun/model/transformer.py,
copied below unchanged but for its class name, without the observer and cache classes) against today's.

Both run in this process on the same weights, so the comparison is exact on any machine (no stored hash that a
different BLAS build would break).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pytest

from moerun.files.config import ModelConfig
from moerun.files.store import ModelStore
from moerun.model.transformer import NO_OBSERVER, KVCache, Transformer
from moerun.runtime.sources import BareExperts

# ---------------------------------------------------------------------------- the frozen copy (do not edit)

F32 = np.float32


# ---------------------------------------------------------------------------- math


def rmsnorm(x: np.ndarray, w: np.ndarray, eps: np.float32) -> np.ndarray:
    """x / sqrt(mean(x*x) + eps) * w, over the last axis."""
    ms = np.mean(x * x, axis=-1, keepdims=True, dtype=F32)
    return x / np.sqrt(ms + eps) * w


def softmax(z: np.ndarray) -> np.ndarray:
    e = np.exp(z - z.max(axis=-1, keepdims=True))
    return e / e.sum(axis=-1, keepdims=True)


def silu(z: np.ndarray) -> np.ndarray:
    return z / (F32(1.0) + np.exp(-z))


def rotary_tables(config: ModelConfig) -> tuple[np.ndarray, np.ndarray]:
    """cos and sin tables [max_seq_len, head_dim/2], inv_freq_j = theta^(-2j/head_dim)."""
    half = config.head_dim // 2
    inv_freq = config.rope_theta ** (-(2.0 * np.arange(half, dtype=np.float64)) / config.head_dim)
    angles = np.arange(config.max_seq_len, dtype=np.float64)[:, None] * inv_freq[None, :]
    return np.cos(angles).astype(F32), np.sin(angles).astype(F32)


def rotate(x: np.ndarray, cos: np.ndarray, sin: np.ndarray) -> np.ndarray:
    """Rotate-half rotary embedding: [a*cos - b*sin, b*cos + a*sin] on the last axis."""
    half = x.shape[-1] // 2
    a = x[..., :half]
    b = x[..., half:]
    return np.concatenate((a * cos - b * sin, b * cos + a * sin), axis=-1)


def route(u: np.ndarray, router: np.ndarray, top_k: int, norm_topk: bool = True) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Top-k routing: probabilities p = softmax(u @ router); chosen experts in ascending id.

    Ties go to the lower expert id (stable sort on -p).  Returns
    ``(chosen [T, k] int64 ascending, weights [T, k] float32, p [T, E])``, where
    weights are p_chosen / sum(p_chosen) (``norm_topk``) or p_chosen as they are.
    """
    p = softmax(u @ router)
    order = np.argsort(-p, axis=-1, kind="stable")[:, :top_k]
    chosen = np.sort(order, axis=-1)
    pc = np.take_along_axis(p, chosen, axis=-1)
    weights = pc / pc.sum(axis=-1, keepdims=True) if norm_topk else pc
    return chosen, weights, p


def expert(u: np.ndarray, w_gate: np.ndarray, w_up: np.ndarray, w_down: np.ndarray) -> np.ndarray:
    """(silu(u @ w_gate) * (u @ w_up)) @ w_down"""
    return (silu(u @ w_gate) * (u @ w_up)) @ w_down


def moe(u: np.ndarray, layer: int, chosen: np.ndarray, weights: np.ndarray, experts, shared=None) -> np.ndarray:
    """shared(u) + sum over chosen experts, in ascending expert id, of weight * expert(u).

    ``shared`` is the shared expert's (w_gate, w_up, w_down), or None for a
    model without one; its term starts the sum.  For one token the routed
    outputs may be computed in any order (resident experts first, while
    missing ones arrive) but are summed in ascending id.  For many tokens each
    needed expert runs once over the tokens routed to it, experts in ascending
    id, accumulating into the output.
    """
    T, k = chosen.shape
    if T == 1:
        ids = chosen[0].tolist()
        terms = [expert(u, *shared)] if shared is not None else []  # first: it is always resident
        ys: list = [None] * k
        for j in experts.compute_order(layer, ids):
            ys[j] = weights[0, j] * expert(u, *experts.weights(layer, ids[j]))
        out, *rest = terms + ys
        for y in rest:
            out = out + y
        return out
    out = expert(u, *shared) if shared is not None else np.zeros_like(u)
    for e in np.unique(chosen).tolist():
        rows, slot = np.nonzero(chosen == e)
        y = expert(u[rows], *experts.weights(layer, e))
        out[rows] += weights[rows, slot][:, None] * y
    return out


# ---------------------------------------------------------------------------- weights and cache


@dataclass
class LayerWeights:
    attn_norm: np.ndarray
    moe_norm: np.ndarray
    wqkv: np.ndarray  # [d_model, q_dim + 2*kv_dim]: wq | wk | wv fused for one matmul
    wo: np.ndarray
    router: np.ndarray
    shared: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None  # the shared expert's w_gate, w_up, w_down


class FrozenTransformer:
    """Dense weights and the forward passes (prefill over a prompt, decode one token)."""

    def __init__(self, config: ModelConfig, dense: dict[str, np.ndarray]):
        self.config = config
        c = config
        self.eps = F32(c.norm_eps)
        self.scale = F32(1.0 / np.sqrt(c.head_dim))
        self.embed = dense["embed"]
        self.final_norm = dense["final_norm"]
        self.lm_head = dense["embed"].T if c.tied_embeddings else dense["lm_head"]
        self.layers = []
        for layer in range(c.n_layers):
            p = f"layers.{layer}."
            wqkv = np.ascontiguousarray(
                np.concatenate([dense[p + "attn.wq"], dense[p + "attn.wk"], dense[p + "attn.wv"]], axis=1)
            )
            shared = tuple(dense[p + "shared." + part] for part in c.shared_shapes()) if c.d_shared else None
            self.layers.append(
                LayerWeights(dense[p + "attn_norm"], dense[p + "moe_norm"], wqkv, dense[p + "attn.wo"], dense[p + "router"], shared)
            )
        self.cos, self.sin = rotary_tables(c)
        self.group = c.n_heads // c.n_kv_heads

    # -------------------------------------------------------------- routing
    def own_routing(self, layer: int, u: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The layer's own router (the default routing): ``route(u, router, top_k, norm_topk)``."""
        return route(u, self.layers[layer].router, self.config.top_k, self.config.norm_topk)

    # -------------------------------------------------------------- attention
    def attention(self, x: np.ndarray, layer: int, start: int, cache: KVCache) -> np.ndarray:
        c = self.config
        T = x.shape[0]
        H, Hkv, hd, G = c.n_heads, c.n_kv_heads, c.head_dim, self.group
        qkv = x @ self.layers[layer].wqkv  # [T, q_dim + 2*kv_dim]: q | k | v
        q = qkv[:, : c.q_dim].reshape(T, H, hd)  # [T, H*hd] -> [T, H, hd]
        k = qkv[:, c.q_dim : c.q_dim + c.kv_dim].reshape(T, Hkv, hd)  # [T, Hkv*hd] -> [T, Hkv, hd]
        v = qkv[:, c.q_dim + c.kv_dim :].reshape(T, Hkv, hd)  # [T, Hkv*hd] -> [T, Hkv, hd]
        cos = self.cos[start : start + T, None, :]  # [T, 1, hd/2]: one row per position, shared by the heads
        sin = self.sin[start : start + T, None, :]
        q = rotate(q, cos, sin)
        k = rotate(k, cos, sin)
        end = start + T
        cache.k[layer, :, start:end] = k.transpose(1, 0, 2)  # [T, Hkv, hd] -> [Hkv, T, hd]
        cache.v[layer, :, start:end] = v.transpose(1, 0, 2)  # [T, Hkv, hd] -> [Hkv, T, hd]
        keys = cache.k[layer, :, :end]  # [Hkv, end, hd]: every position so far
        vals = cache.v[layer, :, :end]  # [Hkv, end, hd]
        # query head i reads kv head i // G: group the queries by kv head,
        # [T, H, hd] -> [T, Hkv, G, hd] -> [Hkv, G, T, hd] -> [Hkv, G*T, hd]
        qg = q.reshape(T, Hkv, G, hd).transpose(1, 2, 0, 3).reshape(Hkv, G * T, hd)
        scores = (qg @ keys.transpose(0, 2, 1)) * self.scale  # [Hkv, G*T, hd] @ [Hkv, hd, end] -> [Hkv, G*T, end]
        if T > 1:
            pos_q = np.tile(np.arange(start, end), G)  # [G*T]: the position of each grouped query row
            mask = np.arange(end)[None, :] > pos_q[:, None]  # [G*T, end]: keys after the query's position
            scores = np.where(mask[None], F32(-np.inf), scores)
        out = softmax(scores) @ vals  # [Hkv, G*T, end] @ [Hkv, end, hd] -> [Hkv, G*T, hd]
        # back to one row per token: [Hkv, G*T, hd] -> [Hkv, G, T, hd] -> [T, Hkv, G, hd] -> [T, H*hd]
        out = out.reshape(Hkv, G, T, hd).transpose(2, 0, 1, 3).reshape(T, H * hd)
        return out @ self.layers[layer].wo  # [T, H*hd] @ [H*hd, d_model] -> [T, d_model]

    # -------------------------------------------------------------- layers
    def layer(self, x: np.ndarray, layer: int, start: int, cache: KVCache, experts, routing, observer) -> np.ndarray:
        """One layer: h = x + attention(rmsnorm(x)); u = rmsnorm(h); x' = h + moe(u).

        ``routing(layer, u)`` chooses the experts and ``experts`` serves their weights (module docstring);
        ``observer`` is shown h once the layer has routed, and x'."""
        w = self.layers[layer]
        experts.begin_layer(layer)
        h = x + self.attention(rmsnorm(x, w.attn_norm, self.eps), layer, start, cache)
        u = rmsnorm(h, w.moe_norm, self.eps)
        chosen, weights, probs = routing(layer, u)
        experts.routed(layer, chosen, weights, probs)
        observer.after_attention(layer, h)
        out = h + moe(u, layer, chosen, weights, experts, w.shared)
        experts.end_layer(layer)
        observer.after_layer(layer, out)
        return out

    def forward(self, ids: np.ndarray, start: int, cache: KVCache, experts, routing=None,
                observer=None) -> np.ndarray:
        """Hidden states leaving the last layer for tokens at positions start.. (not yet normed).

        ``routing`` defaults to the model's own routers (``own_routing``)."""
        if routing is None:
            routing = self.own_routing
        x = self.embed[ids]
        for layer in range(self.config.n_layers):
            x = self.layer(x, layer, start, cache, experts, routing, observer)
        cache.length = start + len(ids)
        return x

    def logits(self, x: np.ndarray) -> np.ndarray:
        return rmsnorm(x, self.final_norm, self.eps) @ self.lm_head


# ---------------------------------------------------------------------------- the check


def _bits(a: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float32).view(np.uint32)


@pytest.mark.parametrize("name", ["pebble", "scree", "synth: shared expert, chosen weights not renormalised"])
def test_the_bundled_models_compute_what_the_frozen_forward_pass_computes(name, synth_models):
    from moerun.files.bundled import resolve_model

    if name.startswith("synth"):  # the optional parts moerun's own format had before: a shared expert, norm_topk false
        d = synth_models(seed=4, layers=2, experts=8, top_k=2, d_shared=48, norm_topk=False)
    else:
        d = resolve_model(name)
    store = ModelStore.open(d)
    try:
        frozen = FrozenTransformer(store.config, store.dense)
        live = Transformer(store.config, store.dense)
        experts = BareExperts(store)
        ids = np.array([1, 17, 5, 230, 42, 42, 9, 250, 12, 77, 3])
        c1, c2 = KVCache(store.config), KVCache(store.config)
        x1 = frozen.forward(ids, 0, c1, experts, observer=NO_OBSERVER)
        x2 = live.forward(ids, 0, c2, experts)
        assert np.array_equal(_bits(frozen.logits(x1)), _bits(live.logits(x2)))
        for pos, tok in enumerate([8, 99, 4], start=len(ids)):  # decode steps on the caches
            y1 = frozen.logits(frozen.forward(np.array([tok]), pos, c1, experts, observer=NO_OBSERVER))
            y2 = live.logits(live.forward(np.array([tok]), pos, c2, experts))
            assert np.array_equal(_bits(y1), _bits(y2))
        assert np.array_equal(_bits(c1.k), _bits(c2.k)) and np.array_equal(_bits(c1.v), _bits(c2.v))
    finally:
        store.close()
