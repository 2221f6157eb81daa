"""PyTorch reference of the moerun model (the model spec, docs/design/architecture.md), float32.

Used to train the bundled tiny model, to compute its reference logits and as a
batch-1 decode baseline for benchmarks. It is only imported where torch is
installed; the package's run-time dependencies do not include torch.

Parameter names are exactly the model spec's tensor names (``embed``,
``layers.{l}.attn.wq``, ``layers.{l}.experts.{e}.w_gate``,
``layers.{l}.shared.w_gate`` when ``d_shared`` > 0, ...), weights are stored
(in, out) and applied as ``y = x @ W``.  Optional config fields: ``d_shared``
(hidden width of the always-on shared expert, 0 or absent = none) and
``norm_topk`` (true or absent: chosen weights renormalised; false: the chosen
probabilities as they are).

Public surface:
    TorchMoE(config: dict)                      nn.Module
    TorchMoE.forward(ids, return_aux=False)     logits [B, T, V] (or [T, V] for 1-D ids);
                                                with return_aux: (logits, aux dict)
    TorchMoE.from_model_dir(path) -> TorchMoE   classmethod (also module-level from_model_dir)
    TorchMoE.state_to_numpy() -> dict[str, np.ndarray]   spec-named float32 arrays
    TorchMoE.prefill(ids) -> logits_last [V]    batch 1, fills the KV cache
    TorchMoE.decode_step(token_id) -> logits [V]  batch 1, chosen experts only
    rmsnorm, rope_tables, rotate, route         the math, as functions
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

REQUIRED_FIELDS = ("vocab_size", "d_model", "n_layers", "n_heads", "n_kv_heads", "head_dim", "n_experts",
                   "top_k", "d_expert", "max_seq_len", "rope_theta", "norm_eps", "tied_embeddings")


# ------------------------------------------------------------------------ math


def rmsnorm(x: torch.Tensor, w: torch.Tensor, eps: float) -> torch.Tensor:
    """x / sqrt(mean(x*x) + eps) * w over the last axis."""
    return x / torch.sqrt((x * x).mean(dim=-1, keepdim=True) + eps) * w


def rope_tables(head_dim: int, max_len: int, theta: float) -> tuple[torch.Tensor, torch.Tensor]:
    """cos, sin [max_len, head_dim/2] float32; inv_freq_j = theta^(-2j/head_dim).

    Angles are computed in float64 and rounded once to float32.
    """
    half = head_dim // 2
    inv_freq = theta ** (-(2.0 * np.arange(half, dtype=np.float64)) / head_dim)
    ang = np.arange(max_len, dtype=np.float64)[:, None] * inv_freq[None, :]
    return (torch.from_numpy(np.cos(ang).astype(np.float32)),
            torch.from_numpy(np.sin(ang).astype(np.float32)))


def rotate(x: torch.Tensor, cos: torch.Tensor, sin: torch.Tensor) -> torch.Tensor:
    """Rotate-half rotary embedding on the last axis: [a*cos - b*sin, b*cos + a*sin]."""
    half = x.shape[-1] // 2
    a, b = x[..., :half], x[..., half:]
    return torch.cat((a * cos - b * sin, b * cos + a * sin), dim=-1)


def route(u: torch.Tensor, router: torch.Tensor, top_k: int, norm_topk: bool = True
          ) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor, torch.Tensor]:
    """Routing for rows u [N, D].

    Returns (chosen [N, k] int64 in ascending expert id, weights [N, k] =
    p_chosen / sum(p_chosen) (or p_chosen when not ``norm_topk``), p [N, E] =
    softmax(u @ router), router logits [N, E]).
    Top-k is taken by p with ties to the lower expert id (stable descending sort).
    """
    z = u @ router
    p = torch.softmax(z, dim=-1)
    order = torch.sort(p, dim=-1, descending=True, stable=True).indices[:, :top_k]
    chosen = torch.sort(order, dim=-1).values
    pc = p.gather(-1, chosen)
    weights = pc / pc.sum(dim=-1, keepdim=True) if norm_topk else pc
    return chosen, weights, p, z


# ------------------------------------------------------------------------ modules


class Expert(nn.Module):
    def __init__(self, d_model: int, d_expert: int):
        super().__init__()
        self.w_gate = nn.Parameter(torch.empty(d_model, d_expert))
        self.w_up = nn.Parameter(torch.empty(d_model, d_expert))
        self.w_down = nn.Parameter(torch.empty(d_expert, d_model))

    def forward(self, u: torch.Tensor) -> torch.Tensor:
        return (F.silu(u @ self.w_gate) * (u @ self.w_up)) @ self.w_down


class Attention(nn.Module):
    def __init__(self, d_model: int, n_heads: int, n_kv_heads: int, head_dim: int):
        super().__init__()
        self.wq = nn.Parameter(torch.empty(d_model, n_heads * head_dim))
        self.wk = nn.Parameter(torch.empty(d_model, n_kv_heads * head_dim))
        self.wv = nn.Parameter(torch.empty(d_model, n_kv_heads * head_dim))
        self.wo = nn.Parameter(torch.empty(n_heads * head_dim, d_model))


class Layer(nn.Module):
    def __init__(self, c: dict):
        super().__init__()
        self.attn_norm = nn.Parameter(torch.ones(c["d_model"]))
        self.attn = Attention(c["d_model"], c["n_heads"], c["n_kv_heads"], c["head_dim"])
        self.moe_norm = nn.Parameter(torch.ones(c["d_model"]))
        self.router = nn.Parameter(torch.empty(c["d_model"], c["n_experts"]))
        self.experts = nn.ModuleList(Expert(c["d_model"], c["d_expert"]) for _ in range(c["n_experts"]))
        if c.get("d_shared", 0):  # the always-on shared expert: parameters layers.{l}.shared.w_*
            self.shared = Expert(c["d_model"], c["d_shared"])
        else:
            self.shared = None


class TorchMoE(nn.Module):
    """The model spec's model in PyTorch (float32)."""

    def __init__(self, config: dict, init_std: float = 0.02):
        super().__init__()
        missing = [k for k in REQUIRED_FIELDS if k not in config]
        if missing:
            raise ValueError(f"config is missing {', '.join(missing)}")
        c = dict(config)
        self.config = c
        self.n_layers, self.n_heads, self.n_kv = c["n_layers"], c["n_heads"], c["n_kv_heads"]
        self.head_dim, self.top_k, self.n_experts = c["head_dim"], c["top_k"], c["n_experts"]
        self.d_shared, self.norm_topk = c.get("d_shared", 0), c.get("norm_topk", True)
        if isinstance(self.d_shared, bool) or not isinstance(self.d_shared, int) or self.d_shared < 0:
            raise ValueError(f"d_shared must be a whole number (0 = no shared expert), got {self.d_shared!r}")
        if not isinstance(self.norm_topk, bool):
            raise ValueError(f"norm_topk must be true or false, got {self.norm_topk!r}")
        self.eps = float(c["norm_eps"])
        self.max_seq_len = c["max_seq_len"]
        if self.n_heads % self.n_kv or self.head_dim % 2:
            raise ValueError("n_heads must be a multiple of n_kv_heads and head_dim even")
        self.group = self.n_heads // self.n_kv
        self.scale = 1.0 / math.sqrt(self.head_dim)
        self.embed = nn.Parameter(torch.empty(c["vocab_size"], c["d_model"]))
        self.layers = nn.ModuleList(Layer(c) for _ in range(self.n_layers))
        self.final_norm = nn.Parameter(torch.ones(c["d_model"]))
        self.tied = bool(c["tied_embeddings"])
        if not self.tied:
            self.lm_head = nn.Parameter(torch.empty(c["d_model"], c["vocab_size"]))
        cos, sin = rope_tables(self.head_dim, self.max_seq_len, float(c["rope_theta"]))
        self.register_buffer("rope_cos", cos, persistent=False)
        self.register_buffer("rope_sin", sin, persistent=False)
        self._init_weights(init_std)
        self._cache_k: torch.Tensor | None = None
        self._cache_v: torch.Tensor | None = None
        self._pos = 0

    # -- initialisation (uses torch's global generator: seed it before building)
    @torch.no_grad()
    def _init_weights(self, std: float) -> None:
        out_std = std / math.sqrt(2 * self.n_layers)
        for name, p in self.named_parameters():
            if p.ndim == 1:
                p.fill_(1.0)
            elif name.endswith(("attn.wo", "w_down")):
                p.normal_(0.0, out_std)
            else:
                p.normal_(0.0, std)

    # -- full-sequence forward (training and reference logits)
    def _attention(self, layer: Layer, a: torch.Tensor, start: int = 0) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        """Causal GQA attention over a [B, T, D]; returns (out, k, v) with k, v [B, KV, T, hd] after rotary."""
        B, T, _ = a.shape
        at = layer.attn
        q = (a @ at.wq).view(B, T, self.n_heads, self.head_dim).transpose(1, 2)
        k = (a @ at.wk).view(B, T, self.n_kv, self.head_dim).transpose(1, 2)
        v = (a @ at.wv).view(B, T, self.n_kv, self.head_dim).transpose(1, 2)
        cos, sin = self.rope_cos[start:start + T], self.rope_sin[start:start + T]
        q, k = rotate(q, cos, sin), rotate(k, cos, sin)
        # query head i reads KV head i // group
        kk = k.repeat_interleave(self.group, dim=1)
        vv = v.repeat_interleave(self.group, dim=1)
        o = F.scaled_dot_product_attention(q, kk, vv, is_causal=True, scale=self.scale)
        o = o.transpose(1, 2).reshape(B, T, self.n_heads * self.head_dim)
        return o @ at.wo, k, v

    def _moe(self, layer: Layer, u: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor, torch.Tensor]:
        """moe over rows u [N, D]; only the chosen experts are computed for each row.

        The accumulator starts with the shared expert's output (zeros without
        one); experts are visited in ascending id and each adds its weighted
        output, so every row sums shared(u), then its chosen experts in ascending id.
        Returns (out [N, D], chosen, p, router logits).
        """
        chosen, weights, p, z = route(u, layer.router, self.top_k, self.norm_topk)
        out = layer.shared(u) if layer.shared is not None else torch.zeros_like(u)
        for e in range(self.n_experts):
            rows, slot = (chosen == e).nonzero(as_tuple=True)
            if rows.numel() == 0:
                continue
            y = weights[rows, slot].unsqueeze(-1) * layer.experts[e](u[rows])
            out = out.index_add(0, rows, y)
        return out, chosen, p, z

    def _logits(self, x: torch.Tensor) -> torch.Tensor:
        h = rmsnorm(x, self.final_norm, self.eps)
        return h @ (self.embed.T if self.tied else self.lm_head)

    def forward(self, ids: torch.Tensor, return_aux: bool = False):
        """Logits [B, T, V] for ids [B, T] (or [T, V] for ids [T]).

        With ``return_aux=True`` returns ``(logits, aux)`` where aux holds
        ``lb`` (switch-style load-balancing loss, mean over layers: E * sum_e f_e * P_e,
        f_e = share of top-k assignments, P_e = mean router probability), ``z``
        (router z-loss, mean over layers of mean(logsumexp(router logits)^2)) and
        ``counts`` ([n_layers, n_experts] top-k assignment counts, detached).
        """
        squeeze = ids.ndim == 1
        if squeeze:
            ids = ids.unsqueeze(0)
        B, T = ids.shape
        if T > self.max_seq_len:
            raise ValueError(f"sequence of {T} tokens exceeds max_seq_len {self.max_seq_len}")
        x = self.embed[ids]
        lb_terms, z_terms, counts = [], [], []
        for layer in self.layers:
            a, _, _ = self._attention(layer, rmsnorm(x, layer.attn_norm, self.eps))
            h = x + a
            u = rmsnorm(h, layer.moe_norm, self.eps).reshape(B * T, -1)
            m, chosen, p, z = self._moe(layer, u)
            x = h + m.view(B, T, -1)
            if return_aux:
                cnt = torch.bincount(chosen.reshape(-1), minlength=self.n_experts)
                f = cnt.to(p.dtype) / chosen.numel()
                lb_terms.append(self.n_experts * (f * p.mean(dim=0)).sum())
                z_terms.append(torch.logsumexp(z, dim=-1).pow(2).mean())
                counts.append(cnt.detach())
        logits = self._logits(x)
        if squeeze:
            logits = logits[0]
        if not return_aux:
            return logits
        aux = {"lb": torch.stack(lb_terms).mean(), "z": torch.stack(z_terms).mean(), "counts": torch.stack(counts)}
        return logits, aux

    # -- batch-1 KV-cache decode path (benchmark baseline)
    @torch.inference_mode()
    def prefill(self, ids) -> torch.Tensor:
        """Reset the KV cache, run the prompt (batch 1), return the last position's logits [V]."""
        ids = torch.as_tensor(ids, dtype=torch.long).reshape(1, -1)
        T = ids.shape[1]
        if not 0 < T <= self.max_seq_len:
            raise ValueError(f"prompt of {T} tokens must be 1..{self.max_seq_len}")
        shape = (self.n_layers, self.n_kv, self.max_seq_len, self.head_dim)
        if self._cache_k is None:
            self._cache_k = torch.zeros(shape)
            self._cache_v = torch.zeros(shape)
        x = self.embed[ids]
        for li, layer in enumerate(self.layers):
            a, k, v = self._attention(layer, rmsnorm(x, layer.attn_norm, self.eps))
            self._cache_k[li, :, :T] = k[0]
            self._cache_v[li, :, :T] = v[0]
            h = x + a
            u = rmsnorm(h, layer.moe_norm, self.eps).reshape(T, -1)
            x = h + self._moe(layer, u)[0].view(1, T, -1)
        self._pos = T
        return self._logits(x[0, -1])

    @torch.inference_mode()
    def decode_step(self, token_id: int) -> torch.Tensor:
        """Append one token at the next position and return its logits [V]."""
        pos = self._pos
        if self._cache_k is None:
            raise RuntimeError("call prefill() before decode_step()")
        if pos >= self.max_seq_len:
            raise ValueError(f"context full ({self.max_seq_len} tokens)")
        x = self.embed[int(token_id)]
        cos, sin = self.rope_cos[pos], self.rope_sin[pos]
        hd, kvh, g = self.head_dim, self.n_kv, self.group
        for li, layer in enumerate(self.layers):
            at = layer.attn
            a = rmsnorm(x, layer.attn_norm, self.eps)
            q = rotate((a @ at.wq).view(self.n_heads, hd), cos, sin)
            self._cache_k[li, :, pos] = rotate((a @ at.wk).view(kvh, hd), cos, sin)
            self._cache_v[li, :, pos] = (a @ at.wv).view(kvh, hd)
            keys = self._cache_k[li, :, :pos + 1]            # [KV, P, hd]
            vals = self._cache_v[li, :, :pos + 1]
            s = (q.view(kvh, g, hd) @ keys.transpose(1, 2)) * self.scale   # [KV, g, P]
            o = torch.softmax(s, dim=-1) @ vals              # [KV, g, hd]; head i = kv*g + j
            h = x + o.reshape(self.n_heads * hd) @ at.wo
            u = rmsnorm(h, layer.moe_norm, self.eps)
            chosen, weights, _, _ = route(u.unsqueeze(0), layer.router, self.top_k, self.norm_topk)
            m = layer.shared(u) if layer.shared is not None else torch.zeros_like(u)
            for e, w in zip(chosen[0].tolist(), weights[0], strict=True):
                m = m + w * layer.experts[e](u)
            x = h + m
        self._pos = pos + 1
        return self._logits(x)

    # -- files
    @classmethod
    def from_model_dir(cls, path: str | Path) -> TorchMoE:
        """Build from a model dir: config.json and model.safetensors (F32 or F16, the model spec's names)."""
        from safetensors.numpy import load_file

        path = Path(path)
        config = json.loads((path / "config.json").read_text(encoding="utf-8"))
        model = cls(config)
        arrays = load_file(str(path / "model.safetensors"))
        expected = dict(model.named_parameters())
        unknown = sorted(set(arrays) - set(expected))
        absent = sorted(set(expected) - set(arrays))
        if unknown or absent:
            raise ValueError(f"tensor names differ from the config: unexpected {unknown[:5]}, missing {absent[:5]}")
        with torch.no_grad():
            for name, p in expected.items():
                a = arrays[name]
                if tuple(a.shape) != tuple(p.shape):
                    raise ValueError(f"{name}: shape {tuple(a.shape)}, expected {tuple(p.shape)}")
                p.copy_(torch.from_numpy(np.ascontiguousarray(a, dtype=np.float32)))
        model.eval()
        return model

    def state_to_numpy(self) -> dict[str, np.ndarray]:
        """Weights as spec-named float32 numpy arrays (copies)."""
        return {name: p.detach().cpu().to(torch.float32).numpy().copy() for name, p in self.named_parameters()}


def from_model_dir(path: str | Path) -> TorchMoE:
    """Module-level alias of TorchMoE.from_model_dir."""
    return TorchMoE.from_model_dir(path)
