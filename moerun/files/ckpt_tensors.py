"""The tensors an open checkpoint must hold, by name and shape, for each supported architecture.

Matrices are stored [out, in] (a layer computes ``x @ W.T``); /work/shared/OPEN-CHECKPOINTS.md has the facts.
Routed experts come in two layouts, chosen per layer by what the file holds:

* per expert: ``model.layers.{l}.mlp.experts.{e}.{gate,up,down}_proj.weight``, [I, H], [I, H], [H, I];
* fused: ``model.layers.{l}.mlp.experts.gate_up_proj`` [E, 2I, H] (the gate's rows first) and
  ``model.layers.{l}.mlp.experts.down_proj`` [E, H, I].
"""

from __future__ import annotations

from moerun.files.ckpt_config import CheckpointConfig

PARTS = ("gate", "up", "down")
EMBED = "model.embed_tokens.weight"
LM_HEAD = "lm_head.weight"
FINAL_NORM = "model.norm.weight"


def expert_tensor(layer: int, expert: int, part: str) -> str:
    """Per-expert layout: the name of one expert's ``part`` (gate, up or down)."""
    return f"model.layers.{layer}.mlp.experts.{expert}.{part}_proj.weight"


def fused_gate_up(layer: int) -> str:
    return f"model.layers.{layer}.mlp.experts.gate_up_proj"


def fused_down(layer: int) -> str:
    return f"model.layers.{layer}.mlp.experts.down_proj"


def router(layer: int) -> str:
    return f"model.layers.{layer}.mlp.gate.weight"


def per_expert_shapes(c: CheckpointConfig) -> dict[str, tuple[int, int]]:
    """Shapes of one expert's parts, [out, in]."""
    h, i = c.hidden_size, c.expert_width
    return {"gate": (i, h), "up": (i, h), "down": (h, i)}


def fused_shapes(c: CheckpointConfig) -> dict[str, tuple[int, int, int]]:
    """Shapes of a layer's two fused expert tensors, keyed by name suffix."""
    h, i, e = c.hidden_size, c.expert_width, c.num_experts
    return {"gate_up_proj": (e, 2 * i, h), "down_proj": (e, h, i)}


def _swiglu(prefix: str, h: int, width: int) -> dict[str, tuple[int, ...]]:
    return {
        f"{prefix}.gate_proj.weight": (width, h),
        f"{prefix}.up_proj.weight": (width, h),
        f"{prefix}.down_proj.weight": (h, width),
    }


def dense_tensors(c: CheckpointConfig) -> dict[str, tuple[int, ...]]:
    """Every tensor but the routed experts, with its shape: embedding, final norm, ``lm_head`` unless tied, and per
    layer the norms, attention (biases and q/k norms as the type has them), the router and shared expert of a MoE
    layer, or the dense MLP of a dense layer."""
    h = c.hidden_size
    out: dict[str, tuple[int, ...]] = {EMBED: (c.vocab_size, h), FINAL_NORM: (h,)}
    if not c.tie_word_embeddings:
        out[LM_HEAD] = (c.vocab_size, h)
    for layer in range(c.num_layers):
        p = f"model.layers.{layer}"
        a = f"{p}.self_attn"
        out[f"{p}.input_layernorm.weight"] = (h,)
        out[f"{p}.post_attention_layernorm.weight"] = (h,)
        out[f"{a}.q_proj.weight"] = (c.q_dim, h)
        out[f"{a}.k_proj.weight"] = (c.kv_dim, h)
        out[f"{a}.v_proj.weight"] = (c.kv_dim, h)
        out[f"{a}.o_proj.weight"] = (h, c.q_dim)
        if c.qkv_bias:
            out[f"{a}.q_proj.bias"] = (c.q_dim,)
            out[f"{a}.k_proj.bias"] = (c.kv_dim,)
            out[f"{a}.v_proj.bias"] = (c.kv_dim,)
        if c.qk_norm == "per_head":
            out[f"{a}.q_norm.weight"] = (c.head_dim,)
            out[f"{a}.k_norm.weight"] = (c.head_dim,)
        elif c.qk_norm == "full":
            out[f"{a}.q_norm.weight"] = (c.q_dim,)
            out[f"{a}.k_norm.weight"] = (c.kv_dim,)
        if c.is_moe_layer(layer):
            out[router(layer)] = (c.num_experts, h)
            if c.shared_expert_width:
                out.update(_swiglu(f"{p}.mlp.shared_expert", h, c.shared_expert_width))
                out[f"{p}.mlp.shared_expert_gate.weight"] = (1, h)
        else:
            out.update(_swiglu(f"{p}.mlp", h, c.dense_width))
    return out
