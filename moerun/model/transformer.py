"""The transformer of the model spec (docs/design/architecture.md) in numpy, float32 throughout.

The layer reads like the math::

    h = x + attention(rmsnorm(x, attn_norm))
    u = rmsnorm(h, moe_norm)
    x' = h + moe(u, routing(layer, u), experts, shared)

with ``moe(u) = shared(u) + sum over chosen experts in ascending id of
weight * expert(u)``; the shared expert (optional, config ``d_shared``) is
dense, always resident, and its term starts the sum.

Expert weights come from an *expert source* (``experts``): the resident pool,
or a plain list for the bare engine.  The math never knows whether an expert
was resident, prefetched or just read; the compute schedule (which tokens go
through which expert, and the order outputs are summed in) depends only on
routing, so every memory setting gives bit-identical numbers.

Whoever runs a forward pass chooses two more collaborators:

- ``routing(layer, u) -> (chosen, weights, probs)``: the model's own routers
  (``Transformer.own_routing``, the default: ``route(u, router)``), or routing replayed from a trace
  (``moerun.model.routing.ReplayedRouting``), which keeps its own place in the trace.
- an observer (``StepObserver``) shown the hidden state after each layer's
  attention and after the whole layer: the engine's prefetch point and the trace
  recorder's guesses.  The default, ``NO_OBSERVER``, looks at nothing.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from moerun.files.config import ModelConfig

F32 = np.float32
# A prompt longer than this is run in passes of this many tokens: a pass's working memory (its attention scores
# over every cached position, above all) grows with its length, and the budget counts one pass of it
# (moerun.runtime.budget.scratch_bytes).  The bundled models' context is this long, so they run in one pass.
PREFILL_CHUNK = 256


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


class GatedShared(tuple):
    """A shared expert whose term is scaled by sigmoid(u @ gate) (gate [d_model, 1]): (w_gate, w_up, w_down) plus ``gate``."""

    def __new__(cls, mats, gate):
        self = super().__new__(cls, mats)
        self.gate = gate
        return self


def shared_term(u: np.ndarray, shared) -> np.ndarray:
    """The shared expert's term: expert(u), scaled per row by sigmoid(u @ gate) when it is gated."""
    y = expert(u, *shared)
    gate = getattr(shared, "gate", None)
    if gate is not None:
        y = (F32(1.0) / (F32(1.0) + np.exp(-(u @ gate)))) * y  # [T, 1] * [T, d_model]
    return y


def moe(u: np.ndarray, layer: int, chosen: np.ndarray, weights: np.ndarray, experts, shared=None) -> np.ndarray:
    """shared(u) + sum over chosen experts, in ascending expert id, of weight * expert(u).

    ``shared`` is the shared expert's (w_gate, w_up, w_down) (a ``GatedShared`` when its term is gated), or
    None for a model without one; its term starts the sum.  For one token the routed
    outputs may be computed in any order (resident experts first, while
    missing ones arrive) but are summed in ascending id.  For many tokens each
    needed expert runs once over the tokens routed to it, experts in ascending
    id, accumulating into the output.
    """
    T, k = chosen.shape
    if T == 1:
        ids = chosen[0].tolist()
        terms = [shared_term(u, shared)] if shared is not None else []  # first: it is always resident
        ys: list = [None] * k
        for j in experts.compute_order(layer, ids):
            ys[j] = weights[0, j] * expert(u, *experts.weights(layer, ids[j]))
        out, *rest = terms + ys
        for y in rest:
            out = out + y
        return out
    out = shared_term(u, shared) if shared is not None else np.zeros_like(u)
    for e in np.unique(chosen).tolist():
        rows, slot = np.nonzero(chosen == e)
        y = expert(u[rows], *experts.weights(layer, e))
        out[rows] += weights[rows, slot][:, None] * y
    return out


# ---------------------------------------------------------------------------- weights and cache


@dataclass
class LayerWeights:
    """One layer of the stack.  A routed layer has ``router`` (and maybe ``shared``); a dense layer has ``mlp``.

    Matrices are [in, out] for ``x @ w``; an open checkpoint's are transposed views of its [out, in] arrays."""

    attn_norm: np.ndarray
    moe_norm: np.ndarray  # the norm before the MLP, routed or dense
    wqkv: np.ndarray  # [d_model, q_dim + 2*kv_dim]: wq | wk | wv fused for one matmul
    wo: np.ndarray
    router: np.ndarray | None  # [d_model, n_experts]; None in a dense layer
    shared: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None  # the shared expert's w_gate, w_up, w_down
    #                                                                     (a GatedShared when its term is gated)
    bqkv: np.ndarray | None = None  # [q_dim + 2*kv_dim]: the q, k and v biases (config qkv_bias)
    q_norm: np.ndarray | None = None  # [head_dim] or [q_dim] (config qk_norm)
    k_norm: np.ndarray | None = None  # [head_dim] or [kv_dim]
    mlp: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None  # a dense layer's w_gate, w_up, w_down


class StepObserver:
    """What is shown of a forward pass, layer by layer; this one looks at nothing (``NO_OBSERVER``).

    Any object with these two methods will do.  Neither may change the hidden state it is shown.
    """

    def after_attention(self, layer: int, h: np.ndarray) -> None:
        """h [T, d_model]: the hidden state after ``layer``'s attention, once the layer has routed
        (its expert source has been told the chosen experts, so its own misses are already asked for)."""

    def after_layer(self, layer: int, x: np.ndarray) -> None:
        """x [T, d_model]: the hidden state leaving ``layer``."""


NO_OBSERVER = StepObserver()


class KVCache:
    """Preallocated keys and values for every layer up to max_seq_len positions."""

    def __init__(self, config: ModelConfig):
        shape = (config.n_blocks, config.n_kv_heads, config.max_seq_len, config.head_dim)
        self.k = np.zeros(shape, F32)
        self.v = np.zeros(shape, F32)
        self.length = 0

    @staticmethod
    def nbytes_for(config: ModelConfig) -> int:
        return 2 * 4 * config.n_blocks * config.n_kv_heads * config.max_seq_len * config.head_dim


class Transformer:
    """Dense weights and the forward passes (prefill over a prompt, decode one token)."""

    def __init__(self, config: ModelConfig, dense: dict[str, np.ndarray], embed=None):
        """``dense``: the dense weights by name (``ModelConfig.dense_shapes``; an open checkpoint's store adds the
        names of its optional parts, and may give ``layers.{b}.attn.wqkv`` already fused).  ``embed``: an object
        whose ``[ids]`` gives embedding rows (an open checkpoint reads them from its file on demand); default
        ``dense["embed"]``."""
        self.config = config
        c = config
        self.eps = F32(c.norm_eps)
        self.scale = F32(1.0 / np.sqrt(c.head_dim))
        self.embed = dense["embed"] if embed is None else embed
        self.final_norm = dense["final_norm"]
        self.lm_head = dense["embed"].T if c.tied_embeddings else dense["lm_head"]
        self.clip = None if c.clip_qkv is None else F32(c.clip_qkv)
        self.layers: list[LayerWeights] = []  # the stack, block by block
        self.routed_block = c.routed_blocks()  # routed layer i -> its block
        self.routed_of = [None] * c.n_blocks  # block -> its routed layer number, None for a dense layer
        for i, b in enumerate(self.routed_block):
            self.routed_of[b] = i
        for b in range(c.n_blocks):
            p = f"layers.{b}."
            wqkv = dense.get(p + "attn.wqkv")
            if wqkv is None:
                wqkv = np.ascontiguousarray(
                    np.concatenate([dense[p + "attn.wq"], dense[p + "attn.wk"], dense[p + "attn.wv"]], axis=1)
                )
            routed = self.routed_of[b] is not None
            shared = tuple(dense[p + "shared." + part] for part in c.shared_shapes()) if c.d_shared and routed else None
            gate = dense.get(p + "shared_gate") if routed else None
            if shared is not None and gate is not None:
                shared = GatedShared(shared, gate)
            mlp = None if routed else tuple(dense[p + "mlp." + part] for part in ("w_gate", "w_up", "w_down"))
            self.layers.append(LayerWeights(
                dense[p + "attn_norm"], dense[p + "moe_norm"], wqkv, dense[p + "attn.wo"],
                dense[p + "router"] if routed else None, shared,
                bqkv=dense.get(p + "attn.bqkv"), q_norm=dense.get(p + "attn.q_norm"), k_norm=dense.get(p + "attn.k_norm"),
                mlp=mlp,
            ))
        self.routed = [self.layers[b] for b in self.routed_block]  # routed layer i's weights
        self.cos, self.sin = rotary_tables(c)
        self.group = c.n_heads // c.n_kv_heads

    # -------------------------------------------------------------- routing
    def own_routing(self, layer: int, u: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The layer's own router (the default routing): ``route(u, router, top_k, norm_topk)``."""
        return route(u, self.routed[layer].router, self.config.top_k, self.config.norm_topk)

    # -------------------------------------------------------------- attention
    def attention(self, x: np.ndarray, layer: int, start: int, cache: KVCache) -> np.ndarray:
        """Attention of block ``layer`` (its place in the stack) over positions start.., with its KV cache."""
        c = self.config
        w = self.layers[layer]
        T = x.shape[0]
        H, Hkv, hd, G = c.n_heads, c.n_kv_heads, c.head_dim, self.group
        qkv = x @ w.wqkv  # [T, q_dim + 2*kv_dim]: q | k | v
        if w.bqkv is not None:
            qkv = qkv + w.bqkv
        q = qkv[:, : c.q_dim]
        k = qkv[:, c.q_dim : c.q_dim + c.kv_dim]
        v = qkv[:, c.q_dim + c.kv_dim :]
        if c.qk_norm == "full":  # over all of q and all of k, before the heads are split
            q = rmsnorm(q, w.q_norm, self.eps)
            k = rmsnorm(k, w.k_norm, self.eps)
        if self.clip is not None:  # after the full-width norms (the olmoe order)
            q, k, v = (np.clip(t, -self.clip, self.clip) for t in (q, k, v))
        q = q.reshape(T, H, hd)  # [T, H*hd] -> [T, H, hd]
        k = k.reshape(T, Hkv, hd)  # [T, Hkv*hd] -> [T, Hkv, hd]
        v = v.reshape(T, Hkv, hd)  # [T, Hkv*hd] -> [T, Hkv, hd]
        if c.qk_norm == "per_head":  # each head of q and of k, over head_dim
            q = rmsnorm(q, w.q_norm, self.eps)
            k = rmsnorm(k, w.k_norm, self.eps)
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
        return out @ w.wo  # [T, H*hd] @ [H*hd, d_model] -> [T, d_model]

    # -------------------------------------------------------------- layers
    def layer(self, x: np.ndarray, layer: int, start: int, cache: KVCache, experts, routing, observer) -> np.ndarray:
        """One routed layer (numbered among the routed ones): h = x + attention(rmsnorm(x)); u = rmsnorm(h);
        x' = h + moe(u).

        ``routing(layer, u)`` chooses the experts and ``experts`` serves their weights (module docstring);
        ``observer`` is shown h once the layer has routed, and x'."""
        b = self.routed_block[layer]
        w = self.layers[b]
        experts.begin_layer(layer)
        h = x + self.attention(rmsnorm(x, w.attn_norm, self.eps), b, start, cache)
        u = rmsnorm(h, w.moe_norm, self.eps)
        chosen, weights, probs = routing(layer, u)
        experts.routed(layer, chosen, weights, probs)
        observer.after_attention(layer, h)
        out = h + moe(u, layer, chosen, weights, experts, w.shared)
        experts.end_layer(layer)
        observer.after_layer(layer, out)
        return out

    def dense_layer(self, x: np.ndarray, block: int, start: int, cache: KVCache) -> np.ndarray:
        """A dense layer (block ``block``): h = x + attention(rmsnorm(x)); x' = h + mlp(rmsnorm(h)).  Nothing routes
        here, so neither the expert source nor the observer hears of it."""
        w = self.layers[block]
        h = x + self.attention(rmsnorm(x, w.attn_norm, self.eps), block, start, cache)
        return h + expert(rmsnorm(h, w.moe_norm, self.eps), *w.mlp)

    def forward(self, ids: np.ndarray, start: int, cache: KVCache, experts, routing=None,
                observer: StepObserver = NO_OBSERVER) -> np.ndarray:
        """Hidden states leaving the last layer for tokens at positions start.. (not yet normed).

        ``routing`` defaults to the model's own routers (``own_routing``).  More than PREFILL_CHUNK tokens are
        run in passes of that many (each pass the expert source and the observer see as a pass of its own)."""
        if routing is None:
            routing = self.own_routing
        if len(ids) > PREFILL_CHUNK:  # in passes, each over the cache the ones before it filled
            return np.concatenate([
                self.forward(ids[i : i + PREFILL_CHUNK], start + i, cache, experts, routing, observer)
                for i in range(0, len(ids), PREFILL_CHUNK)
            ])
        x = self.embed[ids]
        for b, layer in enumerate(self.routed_of):
            if layer is None:
                x = self.dense_layer(x, b, start, cache)
            else:
                x = self.layer(x, layer, start, cache, experts, routing, observer)
        cache.length = start + len(ids)
        return x

    def logits(self, x: np.ndarray) -> np.ndarray:
        return rmsnorm(x, self.final_norm, self.eps) @ self.lm_head
