"""Models with random weights in moerun's format, for studying page-in and planning at any size.

Routing in such a model is meaningless (random weights route by token
identity, not by content); every output about one says so.  Weights are
written layer by layer so memory stays bounded for large models.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np

from .config import FORMAT_TAG, ModelConfig
from .errors import BadOption
from .fileio import write_text_atomic
from .modelfile import save_model_file

RANDOM_NOTE = "random weights: routing is meaningless"


def byte_tokenizer_json() -> str:
    """A byte-level tokenizer with 256 byte tokens and ``<doc>`` as id 0 (no merges)."""
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers

    alphabet = pre_tokenizers.ByteLevel.alphabet()
    vocab = {"<doc>": 0}
    for ch in sorted(alphabet):
        vocab[ch] = len(vocab)
    tok = Tokenizer(models.BPE(vocab=vocab, merges=[]))
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tok.decoder = decoders.ByteLevel()
    tok.add_special_tokens(["<doc>"])
    return tok.to_str()


def synth_config(
    layers: int = 2,
    experts: int = 4,
    top_k: int = 2,
    d_model: int = 32,
    d_expert: int = 64,
    n_heads: int = 2,
    n_kv_heads: int = 1,
    head_dim: int = 16,
    max_seq_len: int = 64,
    vocab_size: int = 257,
    name: str = "synthetic",
) -> ModelConfig:
    raw = {
        "format": FORMAT_TAG,
        "name": name,
        "vocab_size": vocab_size,
        "d_model": d_model,
        "n_layers": layers,
        "n_heads": n_heads,
        "n_kv_heads": n_kv_heads,
        "head_dim": head_dim,
        "n_experts": experts,
        "top_k": top_k,
        "d_expert": d_expert,
        "max_seq_len": max_seq_len,
        "rope_theta": 10000.0,
        "norm_eps": 1e-5,
        "tied_embeddings": True,
        "bos_token_id": 0,
        "dtype": "F32",
        "synthetic": True,
        "note": RANDOM_NOTE,
    }
    return ModelConfig.from_dict(raw)


def random_tensors(config: ModelConfig, seed: int = 0) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    out: dict[str, np.ndarray] = {}
    for name, shape in config.dense_shapes().items():
        if name.endswith("norm"):
            out[name] = (1.0 + 0.1 * rng.standard_normal(shape)).astype(np.float32)
        else:
            fan_in = shape[0] if name != "embed" else shape[1]
            out[name] = (rng.standard_normal(shape) / np.sqrt(fan_in)).astype(np.float32)
    for layer in range(config.n_layers):
        for e in range(config.n_experts):
            for part, shape in config.expert_shapes().items():
                out[f"layers.{layer}.experts.{e}.{part}"] = (rng.standard_normal(shape) / np.sqrt(shape[0])).astype(np.float32)
    return out


def estimated_bytes(config: ModelConfig) -> int:
    n = sum(int(np.prod(s)) for s in config.dense_shapes().values())
    n += config.n_layers * config.n_experts * sum(int(np.prod(s)) for s in config.expert_shapes().values())
    return 4 * n


def write_model(out_dir: str | Path, config: ModelConfig, seed: int = 0, tensors: dict | None = None) -> Path:
    """Write config.json, model.safetensors and a byte tokenizer into ``out_dir``."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    need = estimated_bytes(config) + (1 << 20)
    free = shutil.disk_usage(out).free
    if need > free:
        raise BadOption(f"{out}: the model needs {need} bytes but only {free} are free on that disk")
    tensors = tensors if tensors is not None else random_tensors(config, seed)
    save_model_file(out / "model.safetensors", tensors, {"note": RANDOM_NOTE} if config.extra.get("synthetic") else None)
    write_text_atomic(out / "config.json", json.dumps(config.to_json(), indent=2) + "\n")
    write_text_atomic(out / "tokenizer.json", byte_tokenizer_json())
    return out
