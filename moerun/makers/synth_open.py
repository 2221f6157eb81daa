"""Open checkpoints with random weights, at any size: the layout users' models come in, for storage studies.

``synthesize_open(out, OpenShape(...))`` writes a directory a general-purpose library loads as it is:
``config.json`` (the 5.x spellings of the model type), the weights as one ``model.safetensors`` or as shards
``model-0000i-of-0000n.safetensors`` with ``model.safetensors.index.json`` (whole tensors per shard, so an
expert's three matrices may lie in different files), ``tokenizer.json`` (byte-level, 256 byte tokens after
the two special tokens), ``generation_config.json`` and a CARD.md that says the weights are random.

Weights are streamed (``moerun.makers.synthetic.write_tensors_streaming``): each tensor is drawn in chunks
from its own seeded generator, so a multi-GB checkpoint needs a few chunks of memory.  BF16 values are the
float32 draws rounded to nearest even.  Routed experts are written per expert
(``model.layers.{l}.mlp.experts.{e}.{gate,up,down}_proj.weight``), the library's default save format.
The directory appears under its name only when complete, as ``synthesize`` does.
"""

from __future__ import annotations

import errno
import json
import os
import shutil
import time
import zlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from moerun.errors import BadOption, OutputError
from moerun.files import ckpt_tensors as names
from moerun.files.ckpt_config import SUPPORTED_TYPES, parse_checkpoint_config
from moerun.files.config import RANDOM_NOTE
from moerun.files.fileio import atomic_dir, check_output_dir, remove_stale_temporaries, write_text_atomic
from moerun.files.modelfile import DTYPE_SIZES
from moerun.makers.synthetic import CHUNK_BYTES, Progress, weights_file_bytes, write_tensors_streaming

DTYPES = {"bf16": "BF16", "f16": "F16", "f32": "F32"}
_TORCH_NAMES = {"BF16": "bfloat16", "F16": "float16", "F32": "float32"}
_ARCH_NAMES = {"qwen3_moe": "Qwen3MoeForCausalLM", "qwen2_moe": "Qwen2MoeForCausalLM", "olmoe": "OlmoeForCausalLM"}
BOS, EOS = "<|bos|>", "<|eos|>"
METADATA = {"format": "pt"}  # what the library asks of a safetensors file's metadata
DEFAULT_SHARD = 4 << 30


@dataclass(frozen=True)
class OpenShape:
    """What an open checkpoint of random weights is made of (the config.json it gets follows from it)."""

    model_type: str
    layers: int
    experts: int
    hidden: int
    expert_width: int
    top_k: int = 2
    heads: int = 4
    kv_heads: int = 2
    head_dim: int | None = None  # qwen3_moe only; others take hidden / heads
    vocab: int = 258  # at least 258: the two special tokens and 256 bytes
    context: int = 4096
    shared_width: int = 0  # qwen2_moe's shared expert (required there)
    dense_layers: tuple[int, ...] = ()  # qwen types: layers with a dense MLP (mlp_only_layers)
    dense_width: int = 0
    norm_topk: bool = False
    tied: bool = False
    dtype: str = "BF16"
    rope_theta: float = 1_000_000.0

    def config_json(self) -> dict:
        mt = self.model_type
        if mt not in SUPPORTED_TYPES:
            raise BadOption(f"--open-type must be one of {', '.join(SUPPORTED_TYPES)}, got {mt!r}")
        if self.dtype not in _TORCH_NAMES:
            raise BadOption(f"dtype must be one of {', '.join(_TORCH_NAMES)}, got {self.dtype!r}")
        if self.vocab < 258:
            raise BadOption(f"--vocab must be at least 258 for an open checkpoint's byte tokenizer and its two special tokens, got {self.vocab}")
        raw = {
            "architectures": [_ARCH_NAMES[mt]],
            "model_type": mt,
            "hidden_size": self.hidden,
            "num_hidden_layers": self.layers,
            "num_attention_heads": self.heads,
            "num_key_value_heads": self.kv_heads,
            "num_experts": self.experts,
            "num_experts_per_tok": self.top_k,
            "norm_topk_prob": self.norm_topk,
            "hidden_act": "silu",
            "max_position_embeddings": self.context,
            "rms_norm_eps": 1e-6,
            "rope_parameters": {"rope_theta": self.rope_theta, "rope_type": "default"},
            "tie_word_embeddings": self.tied,
            "vocab_size": self.vocab,
            "bos_token_id": 0,
            "eos_token_id": 1,
            "dtype": _TORCH_NAMES[self.dtype],
            "use_cache": True,
        }
        if mt == "olmoe":
            if self.dense_layers or self.shared_width:
                raise BadOption("olmoe has neither dense layers nor a shared expert")
            raw["intermediate_size"] = self.expert_width
            raw["clip_qkv"] = None
        else:
            raw["moe_intermediate_size"] = self.expert_width
            raw["decoder_sparse_step"] = 1
            raw["mlp_only_layers"] = list(self.dense_layers)
            if self.dense_layers:
                if self.dense_width < 1:
                    raise BadOption("dense layers need --dense-width")
                raw["intermediate_size"] = self.dense_width
            raw["use_sliding_window"] = False
            raw["sliding_window"] = None
        if mt == "qwen3_moe":
            raw["head_dim"] = self.head_dim or self.hidden // self.heads
            raw["attention_bias"] = False
            if self.shared_width:
                raise BadOption("qwen3_moe has no shared expert")
        if mt == "qwen2_moe":
            if self.shared_width < 1:
                raise BadOption("qwen2_moe has a shared expert: give its width (--d-shared)")
            raw["shared_expert_intermediate_size"] = self.shared_width
            raw["qkv_bias"] = True
        parse_checkpoint_config(raw, where="the synthesized config.json")  # the reader's own checks, before writing
        return raw


def tensor_layout(raw: dict, dtype: str) -> list[tuple[str, str, tuple[int, ...]]]:
    """(name, dtype, shape) of every tensor, in the library's order: the embedding, each layer (attention, norms,
    then its MLP: router, experts by number, shared expert), the final norm, the output matrix."""
    c = parse_checkpoint_config(raw)
    dense = names.dense_tensors(c)
    per = names.per_expert_shapes(c)
    out = [(names.EMBED, dense[names.EMBED])]
    for layer in range(c.num_layers):
        p = f"model.layers.{layer}."
        out += [(n, s) for n, s in dense.items() if n.startswith(p) and ".mlp." not in n]
        if c.is_moe_layer(layer):
            out.append((names.router(layer), dense[names.router(layer)]))
            for e in range(c.num_experts):
                out += [(names.expert_tensor(layer, e, part), per[part]) for part in names.PARTS]
        out += [(n, s) for n, s in dense.items() if n.startswith(p) and ".mlp." in n and n != names.router(layer)]
    out.append((names.FINAL_NORM, dense[names.FINAL_NORM]))
    if names.LM_HEAD in dense:
        out.append((names.LM_HEAD, dense[names.LM_HEAD]))
    return [(n, dtype, tuple(s)) for n, s in out]


def to_bf16(a: np.ndarray) -> np.ndarray:
    """float32 -> BF16 bits (uint16), rounded to nearest even (finite values)."""
    bits = np.ascontiguousarray(a, np.float32).view(np.uint32)
    rounded = bits + (np.uint32(0x7FFF) + ((bits >> np.uint32(16)) & np.uint32(1)))
    return (rounded >> np.uint32(16)).astype("<u2")


def tensor_chunks(name: str, shape: tuple[int, ...], dtype: str, seed: int, chunk_bytes: int = CHUNK_BYTES):
    """Random values of one tensor in row chunks, from a generator seeded by (seed, name): norms 1 + 0.1 N(0,1),
    biases 0.02 N(0,1), routers N(0,1) (a spread that makes the choice of experts depend on the input), every
    other matrix N(0,1) / sqrt(its input width)."""
    rng = np.random.default_rng([seed, zlib.crc32(name.encode("utf-8"))])
    rows = shape[0]
    row = int(np.prod(shape[1:], dtype=np.int64)) if len(shape) > 1 else 1
    per_chunk = rows if len(shape) == 1 else max(1, chunk_bytes // (4 * row))
    if "norm" in name:
        offset, scale = 1.0, 0.1
    elif name.endswith(".bias"):
        offset, scale = 0.0, 0.02
    elif name.endswith(".mlp.gate.weight"):
        offset, scale = 0.0, 1.0
    else:
        offset, scale = 0.0, 1.0 / np.sqrt(shape[-1])
    for r0 in range(0, rows, per_chunk):
        n = min(per_chunk, rows - r0)
        a = rng.standard_normal((n, *shape[1:]), dtype=np.float32)
        a *= np.float32(scale)
        a += np.float32(offset)
        if dtype == "BF16":
            yield to_bf16(a)
        elif dtype == "F16":
            yield a.astype("<f2")
        else:
            yield a


def shard_plan(layout, shard_bytes: int) -> list[list[tuple[str, str, tuple[int, ...]]]]:
    """Whole tensors, in order, into shards of at most ``shard_bytes`` of data each (a larger tensor gets a shard
    of its own)."""
    shards: list[list] = [[]]
    size = 0
    for t in layout:
        n = DTYPE_SIZES[t[1]] * int(np.prod(t[2], dtype=np.int64))
        if shards[-1] and size + n > shard_bytes:
            shards.append([])
            size = 0
        shards[-1].append(t)
        size += n
    return shards


def tokenizer_json() -> str:
    """A byte-level BPE of 258 tokens: ``<|bos|>`` = 0, ``<|eos|>`` = 1, then the 256 byte tokens (no merges)."""
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers

    vocab = {BOS: 0, EOS: 1}
    for ch in sorted(pre_tokenizers.ByteLevel.alphabet()):
        vocab[ch] = len(vocab)
    tok = Tokenizer(models.BPE(vocab=vocab, merges=[]))
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tok.decoder = decoders.ByteLevel()
    tok.add_special_tokens([BOS, EOS])
    return tok.to_str()


def card_text(shape: OpenShape, seed: int, total: int, shards: int) -> str:
    return (
        f"# Open checkpoint of random weights ({shape.model_type})\n\n"
        f"**{RANDOM_NOTE}.** Written by `moerun synth --open-type {shape.model_type}` for studying page-in, memory\n"
        "caps and planning at a chosen size in the open layout. Its text is noise: do not study eviction or\n"
        "prefetch policies on it, and nothing it generates is advice.\n\n"
        f"- {shape.layers} layers, hidden {shape.hidden}, {shape.experts} experts of width {shape.expert_width}, top-{shape.top_k}\n"
        f"- weights {shape.dtype}, {total:,} bytes in {shards} file(s); seed {seed}\n"
    )


def synthesize_open(out_dir: str | os.PathLike, shape: OpenShape, seed: int = 0, shard_bytes: int = DEFAULT_SHARD,
                    progress: Progress | None = None, force: bool = False) -> dict:
    """Write an open checkpoint of random weights at ``out_dir`` (the rules of ``synthesize`` for the directory);
    return a summary."""
    out = Path(out_dir)
    if shard_bytes < 1:
        raise BadOption(f"the shard size must be positive, got {shard_bytes}")
    raw = shape.config_json()
    check_output_dir(out, force, what="OUT", allow_empty=True)
    layout = tensor_layout(raw, shape.dtype)
    plan = shard_plan(layout, shard_bytes)
    n = len(plan)
    files = ["model.safetensors"] if n == 1 else [f"model-{i + 1:05d}-of-{n:05d}.safetensors" for i in range(n)]
    sizes = [weights_file_bytes(part, METADATA) for part in plan]
    total = sum(sizes)
    remove_stale_temporaries(out)
    free = shutil.disk_usage(out.absolute().parent).free
    if total + (1 << 20) > free:
        raise OutputError(f"{out}: the checkpoint needs {total:,} bytes ({total / 2**30:.2f} GiB) but only {free:,} bytes "
                          f"({free / 2**30:.2f} GiB) are free on that disk; nothing was written")
    t0 = time.monotonic()
    shapes = {name: s for name, _, s in layout}
    written = [0]

    def report(done_in_file: int, _total_in_file: int, base: list) -> None:
        if progress:
            progress(base[0] + done_in_file, total)

    with atomic_dir(out, force=force, what="OUT", allow_empty=True) as tmp:
        try:
            for fname, part, size in zip(files, plan, sizes):
                base = [written[0]]
                write_tensors_streaming(tmp / fname, part, lambda name: tensor_chunks(name, shapes[name], shape.dtype, seed),
                                        METADATA, lambda d, t, base=base: report(d, t, base))
                written[0] += size
        except OutputError as e:
            if e.errno in (errno.ENOSPC, errno.EDQUOT, errno.EFBIG):
                raise OutputError(f"{out}: the disk filled up while writing the checkpoint; nothing was kept") from None
            raise
        if n > 1:
            data = sum(DTYPE_SIZES[t] * int(np.prod(s, dtype=np.int64)) for _, t, s in layout)
            index = {"metadata": {"total_size": data},
                     "weight_map": {name: fname for fname, part in zip(files, plan) for name, _, _ in part}}
            write_text_atomic(tmp / "model.safetensors.index.json", json.dumps(index, indent=2) + "\n")
        write_text_atomic(tmp / "config.json", json.dumps(raw, indent=2) + "\n")
        write_text_atomic(tmp / "generation_config.json", json.dumps({"bos_token_id": 0, "eos_token_id": 1}, indent=2) + "\n")
        write_text_atomic(tmp / "tokenizer_config.json", json.dumps(
            {"bos_token": BOS, "eos_token": EOS, "model_max_length": shape.context, "tokenizer_class": "PreTrainedTokenizerFast"},
            indent=2) + "\n")
        write_text_atomic(tmp / "tokenizer.json", tokenizer_json())
        write_text_atomic(tmp / "CARD.md", card_text(shape, seed, total, n))
    return {
        "model_dir": str(out),
        "model_type": shape.model_type,
        "files": files,
        "file_bytes": total,
        "dtype": shape.dtype,
        "seconds": time.monotonic() - t0,
        "seed": seed,
        "config": raw,
        "note": RANDOM_NOTE,
    }
