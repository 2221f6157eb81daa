"""An open checkpoint's ``config.json``: the architecture as a typed, validated record.

Three model types are read, chosen by ``model_type``: ``qwen3_moe``, ``qwen2_moe`` and ``olmoe``
(/work/shared/OPEN-CHECKPOINTS.md has the facts).  Both spellings found in published files are read: the
4.x library's (top-level ``rope_theta``, ``torch_dtype``, ``num_experts``) and the 5.x library's
(``rope_parameters.rope_theta``, ``dtype``, ``num_local_experts``).  A field that is absent takes the
library's default for that type, except the fields that give tensor shapes: those must be present, since
a guessed shape is a silent wrong answer.

Refused, in one line naming the field: any other model type, a rope type other than ``default``, a sliding
window in use (or ``layer_types`` naming anything but full attention), a quantized checkpoint (``quantization_config``), an activation other than ``silu``, and
attention biases where the type's math has none.  Nothing is guessed or skipped.

Also here: telling an open checkpoint from a moerun model directory, and the BOS/EOS token ids.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

from moerun.errors import BadModelFile
from moerun.files.fileio import read_json_file

SUPPORTED_TYPES = ("qwen3_moe", "qwen2_moe", "olmoe")
CONFIG_LIMIT = 16 << 20  # bytes of a config.json (a real one is a few kilobytes)
SIDE_LIMIT = 64 << 20  # bytes of tokenizer_config.json / generation_config.json (tokenizer configs can hold chat templates)
# Upper bound on the tensors a config may imply; the largest published MoE checkpoints hold tens of thousands.
MAX_TENSORS = 1 << 20
DTYPE_NAMES = {"bfloat16": "BF16", "bf16": "BF16", "float16": "F16", "half": "F16", "fp16": "F16", "float32": "F32",
               "float": "F32", "fp32": "F32"}

# The library's defaults per type (transformers' config classes), for fields a config.json may omit.
_DEFAULTS = {
    "qwen3_moe": {"rms_norm_eps": 1e-6, "max_position_embeddings": 32768, "num_key_value_heads": 4, "sliding_window": 4096},
    "qwen2_moe": {"rms_norm_eps": 1e-6, "max_position_embeddings": 32768, "num_key_value_heads": 16, "sliding_window": 4096},
    "olmoe": {"rms_norm_eps": 1e-5, "max_position_embeddings": 4096, "num_key_value_heads": None, "sliding_window": None},
}
_ROPE_THETA_DEFAULT = 10000.0


@dataclass(frozen=True)
class CheckpointConfig:
    """The architecture of an open MoE checkpoint, validated (field names follow the page's notation)."""

    model_type: str
    hidden_size: int  # H
    num_layers: int
    num_heads: int
    num_kv_heads: int
    head_dim: int
    num_experts: int  # E, routed experts per MoE layer
    top_k: int
    expert_width: int  # I: moe_intermediate_size (qwen), intermediate_size (olmoe)
    dense_width: int  # intermediate_size of the dense MLP layers (qwen); 0 for olmoe, which has none
    mlp_only_layers: tuple[int, ...]
    decoder_sparse_step: int
    shared_expert_width: int  # shared_expert_intermediate_size (qwen2_moe); 0 = no shared expert
    norm_topk_prob: bool
    rms_norm_eps: float
    rope_theta: float
    dtype: str | None  # BF16, F16 or F32 as the config declares it (torch_dtype / dtype); None when absent
    tie_word_embeddings: bool
    vocab_size: int
    max_position_embeddings: int
    qkv_bias: bool  # q, k and v projections carry biases (qwen2_moe)
    clip_qkv: float | None  # olmoe: clamp q, k and v to [-clip, clip]; None = no clamp
    qk_norm: str  # "none", "per_head" (qwen3_moe: size head_dim, after the head split) or "full" (olmoe: before it)

    @property
    def q_dim(self) -> int:
        return self.num_heads * self.head_dim

    @property
    def kv_dim(self) -> int:
        return self.num_kv_heads * self.head_dim

    def is_moe_layer(self, layer: int) -> bool:
        """Layer ``layer`` routes to experts (else it has a dense SwiGLU MLP of ``dense_width``)."""
        if self.model_type == "olmoe":
            return True
        return layer not in self.mlp_only_layers and (layer + 1) % self.decoder_sparse_step == 0

    @property
    def moe_layers(self) -> tuple[int, ...]:
        return tuple(layer for layer in range(self.num_layers) if self.is_moe_layer(layer))


# ---------------------------------------------------------------------------- field readers


def _where(where: str, key: str) -> str:
    return f"{where}: {key}"


def _pos_int(raw: dict, key: str, where: str, default=None, required: bool = False) -> int:
    if key not in raw or raw[key] is None:
        if required or default is None:
            raise BadModelFile(f"{where}: missing field {key} (a {raw.get('model_type')} config needs it)")
        return default
    v = raw[key]
    if isinstance(v, bool) or not isinstance(v, int) or v <= 0:
        raise BadModelFile(f"{_where(where, key)} must be a positive integer, got {v!r:.40}")
    return v


def _pos_float(raw: dict, key: str, where: str, default: float | None, v=None) -> float:
    if v is None:
        if key not in raw or raw[key] is None:
            if default is None:
                raise BadModelFile(f"{where}: missing field {key}")
            return default
        v = raw[key]
    try:
        ok = not isinstance(v, bool) and isinstance(v, (int, float)) and math.isfinite(float(v)) and v > 0
    except OverflowError:
        ok = False
    if not ok:
        raise BadModelFile(f"{_where(where, key)} must be a positive number, got {v!r:.40}")
    return float(v)


def _bool(raw: dict, key: str, where: str, default: bool) -> bool:
    v = raw.get(key)
    if v is None:
        return default
    if not isinstance(v, bool):
        raise BadModelFile(f"{_where(where, key)} must be true or false, got {v!r:.40}")
    return v


def _rope_theta(raw: dict, where: str) -> float:
    """The rotary base from either spelling; refuse a rope type other than the default."""
    params = raw.get("rope_parameters")
    scaling = raw.get("rope_scaling")
    theta = None
    for key, block in (("rope_scaling", scaling), ("rope_parameters", params)):
        if block is None:
            continue
        if not isinstance(block, dict):
            raise BadModelFile(f"{_where(where, key)} must be an object or null, got {block!r:.40}")
        if any(isinstance(v, dict) for v in block.values()):
            raise BadModelFile(f"{_where(where, key)}: rope parameters per layer type are not supported")
        kind = block.get("rope_type", block.get("type", "default"))
        if kind != "default":
            raise BadModelFile(
                f"{_where(where, key)}: rope type {kind!r} is not supported (only 'default'; it changes the rotary math)"
            )
        if key == "rope_parameters" and block.get("rope_theta") is not None:
            theta = _pos_float(block, "rope_theta", f"{where}: rope_parameters", None)
    top = raw.get("rope_theta")
    if top is not None:
        top = _pos_float(raw, "rope_theta", where, None)
        if theta is not None and theta != top:
            raise BadModelFile(f"{where}: rope_theta {top:g} and rope_parameters.rope_theta {theta:g} disagree")
        theta = top
    return _ROPE_THETA_DEFAULT if theta is None else theta


def _dtype(raw: dict, where: str) -> str | None:
    found = None
    for key in ("dtype", "torch_dtype"):  # the 5.x spelling first
        v = raw.get(key)
        if v is None or v == "auto":
            continue
        name = v[len("torch."):] if isinstance(v, str) and v.startswith("torch.") else v
        tag = DTYPE_NAMES.get(name) if isinstance(name, str) else None
        if tag is None:
            raise BadModelFile(f"{_where(where, key)} {v!r:.40} is not one of bfloat16, float16, float32")
        if found is not None and found != tag:
            raise BadModelFile(f"{where}: dtype and torch_dtype disagree ({found} and {tag})")
        found = tag
    return found


def _num_experts(raw: dict, where: str) -> int:
    a = _pos_int(raw, "num_experts", where, default=0) if raw.get("num_experts") is not None else None
    b = _pos_int(raw, "num_local_experts", where, default=0) if raw.get("num_local_experts") is not None else None
    if a is None and b is None:
        raise BadModelFile(f"{where}: missing field num_experts (or num_local_experts)")
    if a is not None and b is not None and a != b:
        raise BadModelFile(f"{where}: num_experts ({a}) and num_local_experts ({b}) disagree")
    return a if a is not None else b  # type: ignore[return-value]


def _layer_list(raw: dict, key: str, where: str, n_layers: int) -> tuple[int, ...]:
    v = raw.get(key)
    if v is None:
        return ()
    if not isinstance(v, list) or not all(isinstance(x, int) and not isinstance(x, bool) for x in v):
        raise BadModelFile(f"{_where(where, key)} must be a list of layer numbers, got {v!r:.40}")
    bad = [x for x in v if not 0 <= x < n_layers]
    if bad:
        raise BadModelFile(f"{_where(where, key)} names layer {bad[0]}, outside 0..{n_layers - 1}")
    return tuple(sorted(set(v)))


# ---------------------------------------------------------------------------- the record


def parse_checkpoint_config(raw: object, where: str = "config.json") -> CheckpointConfig:
    """A validated ``CheckpointConfig`` from a parsed config.json; BadModelFile (one line naming the field) otherwise."""
    if not isinstance(raw, dict):
        raise BadModelFile(f"{where}: expected a JSON object")
    mt = raw.get("model_type")
    if mt is None:
        raise BadModelFile(f"{where}: missing field model_type (an open checkpoint names its architecture there)")
    if mt not in SUPPORTED_TYPES:
        raise BadModelFile(f"{where}: model_type {str(mt)!r:.60} is not supported (supported: {', '.join(SUPPORTED_TYPES)})")
    if raw.get("quantization_config") is not None:
        method = raw["quantization_config"].get("quant_method") if isinstance(raw["quantization_config"], dict) else None
        what = f" ({method})" if isinstance(method, str) else ""
        raise BadModelFile(f"{where}: quantization_config{what:.40}: quantized checkpoints are not supported (BF16, F16 and F32 are)")
    act = raw.get("hidden_act", "silu")
    if act != "silu":
        raise BadModelFile(f"{where}: hidden_act {act!r:.40} is not supported (the {mt} math uses 'silu')")
    d = _DEFAULTS[mt]
    hidden = _pos_int(raw, "hidden_size", where, required=True)
    layers = _pos_int(raw, "num_hidden_layers", where, required=True)
    heads = _pos_int(raw, "num_attention_heads", where, required=True)
    kv = _pos_int(raw, "num_key_value_heads", where, default=d["num_key_value_heads"] or heads)
    if "num_key_value_heads" in raw and raw["num_key_value_heads"] is None:
        kv = heads  # the library's rule for null
    if heads % kv:
        raise BadModelFile(f"{where}: num_attention_heads ({heads}) must be a multiple of num_key_value_heads ({kv})")
    if raw.get("head_dim") is None:
        if hidden % heads:
            raise BadModelFile(f"{where}: head_dim is absent and hidden_size ({hidden}) is not a multiple of num_attention_heads ({heads})")
        head_dim = hidden // heads
    else:
        head_dim = _pos_int(raw, "head_dim", where)
    if head_dim % 2:
        raise BadModelFile(f"{where}: head_dim must be even for rotary embeddings, got {head_dim}")
    if mt == "olmoe" and head_dim * heads != hidden:
        raise BadModelFile(
            f"{where}: head_dim {head_dim} x num_attention_heads {heads} differs from hidden_size {hidden} "
            "(olmoe's q_norm has size hidden_size)"
        )
    vocab = _pos_int(raw, "vocab_size", where, required=True)
    experts = _num_experts(raw, where)
    top_k = _pos_int(raw, "num_experts_per_tok", where, required=True)
    if top_k > experts:
        raise BadModelFile(f"{where}: num_experts_per_tok ({top_k}) exceeds the number of experts ({experts})")
    if mt == "olmoe":
        expert_width = _pos_int(raw, "intermediate_size", where, required=True)
        dense_width, sparse_step, mlp_only, shared = 0, 1, (), 0
    else:
        expert_width = _pos_int(raw, "moe_intermediate_size", where, required=True)
        sparse_step = _pos_int(raw, "decoder_sparse_step", where, default=1)
        mlp_only = _layer_list(raw, "mlp_only_layers", where, layers)
        dense_needed = any(not (layer not in mlp_only and (layer + 1) % sparse_step == 0) for layer in range(layers))
        if dense_needed or raw.get("intermediate_size") is not None:
            dense_width = _pos_int(raw, "intermediate_size", where, required=True)
        else:
            dense_width = 0
        shared = _pos_int(raw, "shared_expert_intermediate_size", where, required=True) if mt == "qwen2_moe" else 0
    if mt == "qwen2_moe":
        qkv_bias = _bool(raw, "qkv_bias", where, True)  # 4.x had no field and always the biases
    else:
        qkv_bias = False
    if mt != "qwen2_moe" and _bool(raw, "attention_bias", where, False):
        raise BadModelFile(f"{where}: attention_bias true is not supported for {mt} (its published checkpoints have none)")
    clip = None
    if mt == "olmoe" and raw.get("clip_qkv") is not None:
        clip = _pos_float(raw, "clip_qkv", where, None)
    max_pos = _pos_int(raw, "max_position_embeddings", where, default=d["max_position_embeddings"])
    if mt != "olmoe" and _bool(raw, "use_sliding_window", where, False):
        window = raw.get("sliding_window", d["sliding_window"])
        if window is not None:
            window = _pos_int({"sliding_window": window}, "sliding_window", where)
            if window < max_pos:
                raise BadModelFile(
                    f"{where}: use_sliding_window is true with sliding_window {window} < max_position_embeddings {max_pos}: "
                    "sliding-window attention is not supported"
                )
    kinds = raw.get("layer_types")
    if kinds is not None:  # the 5.x library spells per-layer attention kinds out (sliding windows among them)
        if not isinstance(kinds, list) or len(kinds) != layers:
            raise BadModelFile(f"{where}: layer_types must be a list of {layers} attention kinds, got {kinds!r:.60}")
        other = next((k for k in kinds if k != "full_attention"), None)
        if other is not None:
            raise BadModelFile(f"{where}: layer_types names {other!r:.40} layers: only 'full_attention' is supported")
    implied = layers * (3 * experts + 24)
    if implied > MAX_TENSORS:
        raise BadModelFile(f"{where}: {layers} layers x {experts} experts imply {implied:,} tensors, more than any plausible model")
    return CheckpointConfig(
        model_type=mt,
        hidden_size=hidden,
        num_layers=layers,
        num_heads=heads,
        num_kv_heads=kv,
        head_dim=head_dim,
        num_experts=experts,
        top_k=top_k,
        expert_width=expert_width,
        dense_width=dense_width,
        mlp_only_layers=mlp_only,
        decoder_sparse_step=sparse_step,
        shared_expert_width=shared,
        norm_topk_prob=_bool(raw, "norm_topk_prob", where, False),
        rms_norm_eps=_pos_float(raw, "rms_norm_eps", where, d["rms_norm_eps"]),
        rope_theta=_rope_theta(raw, where),
        dtype=_dtype(raw, where),
        tie_word_embeddings=_bool(raw, "tie_word_embeddings", where, False),
        vocab_size=vocab,
        max_position_embeddings=max_pos,
        qkv_bias=qkv_bias,
        clip_qkv=clip,
        qk_norm={"qwen3_moe": "per_head", "qwen2_moe": "none", "olmoe": "full"}[mt],
    )


def _read_json(path: Path, what: str, limit: int, missing: str | None = None):
    return read_json_file(path, BadModelFile, what, missing=missing, limit=limit)


def read_config_json(directory: str | Path) -> dict:
    path = Path(directory) / "config.json"
    raw = _read_json(path, "config file", CONFIG_LIMIT, missing=f"{path}: missing (an open checkpoint needs a config.json)")
    if not isinstance(raw, dict):
        raise BadModelFile(f"{path}: expected a JSON object")
    return raw


def load_checkpoint_config(directory: str | Path) -> CheckpointConfig:
    """The validated architecture of the open checkpoint in ``directory``."""
    path = Path(directory) / "config.json"
    return parse_checkpoint_config(read_config_json(directory), where=str(path))


def is_open_checkpoint(directory: str | Path) -> bool:
    """True when ``directory``'s config.json is an open checkpoint's (it names a ``model_type``, and has neither
    moerun's format tag nor its ``d_model``), False otherwise: a moerun model, or no readable config at all,
    which moerun's own loader then explains.  Says nothing about whether the type is supported."""
    try:
        raw = read_config_json(directory)
    except BadModelFile:
        return False
    fmt = raw.get("format")
    if isinstance(fmt, str) and fmt.startswith("moerun/"):
        return False
    return "model_type" in raw and "d_model" not in raw


# ---------------------------------------------------------------------------- BOS and EOS


def _ids(v, key: str, where: str, vocab_size: int) -> tuple[int, ...] | None:
    """None when ``v`` is absent/null; else the ids (an int or a list of ints, each below vocab_size)."""
    if v is None:
        return None
    items = v if isinstance(v, list) else [v]
    for x in items:
        if isinstance(x, bool) or not isinstance(x, int) or not 0 <= x < vocab_size:
            raise BadModelFile(f"{where}: {key} must be a token id below vocab_size {vocab_size} or a list of them, got {v!r:.60}")
    return tuple(dict.fromkeys(items))


def _token_text(v) -> str | None:
    if isinstance(v, str):
        return v
    if isinstance(v, dict) and isinstance(v.get("content"), str):
        return v["content"]
    return None


def special_token_ids(directory: str | Path, vocab_size: int, config_raw: dict | None = None) -> tuple[tuple[int, ...], tuple[int, ...]]:
    """(BOS ids, EOS ids) of the checkpoint in ``directory``; each may be empty.

    Sources, first found wins for each of the two: ``generation_config.json`` (``bos_token_id``/``eos_token_id``,
    an int or a list), then ``tokenizer_config.json`` (the same keys, or ``bos_token``/``eos_token`` text found in
    its ``added_tokens_decoder``), then config.json's own ``bos_token_id``/``eos_token_id``.
    """
    directory = Path(directory)
    found: dict[str, tuple[int, ...] | None] = {"bos": None, "eos": None}
    gen = directory / "generation_config.json"
    if gen.exists():
        doc = _read_json(gen, "generation config", SIDE_LIMIT)
        if not isinstance(doc, dict):
            raise BadModelFile(f"{gen}: expected a JSON object")
        for k in found:
            found[k] = _ids(doc.get(f"{k}_token_id"), f"{k}_token_id", str(gen), vocab_size)
    tok = directory / "tokenizer_config.json"
    if tok.exists() and (found["bos"] is None or found["eos"] is None):
        doc = _read_json(tok, "tokenizer config", SIDE_LIMIT)
        if not isinstance(doc, dict):
            raise BadModelFile(f"{tok}: expected a JSON object")
        added = doc.get("added_tokens_decoder")
        by_text: dict[str, int] = {}
        if isinstance(added, dict):
            for key, entry in added.items():
                text = _token_text(entry)
                if text is not None and key.isdigit():
                    by_text.setdefault(text, int(key))
        for k in found:
            if found[k] is not None:
                continue
            found[k] = _ids(doc.get(f"{k}_token_id"), f"{k}_token_id", str(tok), vocab_size)
            text = _token_text(doc.get(f"{k}_token"))
            if found[k] is None and text is not None and text in by_text:
                found[k] = _ids(by_text[text], f"{k}_token", str(tok), vocab_size)
    if config_raw is not None:
        for k in found:
            if found[k] is None:
                found[k] = _ids(config_raw.get(f"{k}_token_id"), f"{k}_token_id", str(directory / "config.json"), vocab_size)
    return found["bos"] or (), found["eos"] or ()
