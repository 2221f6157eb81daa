"""Models with random weights in moerun's format, for studying page-in and planning at any size.

Routing in such a model is meaningless (random weights route by token
identity, not by content); every output about one says so.

Two writers:

* ``write_model`` keeps every tensor in memory (``random_tensors``) and saves
  with ``moerun.files.modelfile.save_model_file``: small test models.
* ``synthesize`` streams: each tensor is generated in chunks of about
  ``CHUNK_BYTES`` from its own seeded generator, hashed and written as it
  goes, so a multi-GB model needs only a few chunks of memory.  The file has
  the same layout as ``save_model_file`` writes (``write_tensors_streaming``
  produces the identical bytes for the same tensors): dense tensors first in
  natural order, then experts by layer, expert, part, and the per-tensor
  digests in the ``moerun.digests`` metadata.  The model directory appears
  under its final name only when complete (built in a hidden temporary
  directory beside it, then renamed), and the free disk space is checked
  before anything is written.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import shutil
import struct
import time
import zlib
from collections.abc import Callable, Iterable
from pathlib import Path

import numpy as np

from moerun.errors import BadOption, OutputError
from moerun.files.config import FORMAT_TAG, RANDOM_NOTE, ModelConfig
from moerun.files.fileio import atomic_dir, atomic_path, check_output_dir, remove_stale_temporaries, write_text_atomic
from moerun.files.modelfile import DIGEST_ALGO, DTYPE_SIZES, digest, header_bytes, save_model_file, storage_order


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
    dtype: str = "F32",
    tied_embeddings: bool = True,
    seed: int | None = None,
    d_shared: int = 0,
    norm_topk: bool = True,
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
        "tied_embeddings": tied_embeddings,
        "bos_token_id": 0,
        "dtype": dtype,
        "d_shared": d_shared,
        "norm_topk": norm_topk,
        "synthetic": True,
        "note": RANDOM_NOTE,
    }
    if seed is not None:
        raw["seed"] = seed
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
        raise OutputError(f"{out}: the model needs {need} bytes but only {free} are free on that disk")
    tensors = tensors if tensors is not None else random_tensors(config, seed)
    save_model_file(out / "model.safetensors", tensors, {"note": RANDOM_NOTE} if config.extra.get("synthetic") else None)
    write_text_atomic(out / "config.json", json.dumps(config.to_json(), indent=2) + "\n")
    write_text_atomic(out / "tokenizer.json", byte_tokenizer_json())
    return out


# ---------------------------------------------------------------------- streaming writer

CHUNK_BYTES = 8 * 1024 * 1024  # generation and write granularity of the streaming writer
NUMPY_OF = {"F32": np.dtype("<f4"), "F16": np.dtype("<f2")}
BITS = {32: "F32", 16: "F16"}
_DIGEST_HEX = len(digest(b""))

Progress = Callable[[int, int], None]  # (bytes written, bytes in all)


def tensor_layout(config: ModelConfig, dtype: str = "F32") -> list[tuple[str, str, tuple[int, ...]]]:
    """(name, dtype, shape) of every tensor in file order (moerun.files.modelfile.storage_order)."""
    shapes = dict(config.dense_shapes())
    for layer in range(config.n_layers):
        for e in range(config.n_experts):
            for part, shape in config.expert_shapes().items():
                shapes[f"layers.{layer}.experts.{e}.{part}"] = shape
    return [(name, dtype, tuple(shapes[name])) for name in storage_order(shapes)]


def _header_blob(layout, digests: dict[str, str], metadata: dict[str, str] | None) -> bytes:
    """The safetensors header of ``layout`` (moerun.files.modelfile.header_bytes, the one writer of headers)."""
    entries = [(name, tag, shape, DTYPE_SIZES[tag] * int(np.prod(shape, dtype=np.int64))) for name, tag, shape in layout]
    return header_bytes(entries, digests, metadata)


def weights_file_bytes(layout, metadata: dict[str, str] | None = None) -> int:
    """Exact size of the weights file for ``layout`` (digests have a fixed length)."""
    blob = _header_blob(layout, {name: "0" * _DIGEST_HEX for name, _, _ in layout}, metadata)
    return 8 + len(blob) + sum(DTYPE_SIZES[t] * int(np.prod(s, dtype=np.int64)) for _, t, s in layout)


def _hasher():
    # moerun.files.modelfile.digest hashes a whole tensor with blake2b-128; hashing the
    # same bytes chunk by chunk gives the same digest.
    if DIGEST_ALGO != "blake2b-128":
        raise RuntimeError(f"streaming writer does not know digest {DIGEST_ALGO!r}")
    return hashlib.blake2b(digest_size=16)


def write_tensors_streaming(
    path: str | os.PathLike,
    layout: list[tuple[str, str, tuple[int, ...]]],
    produce: Callable[[str], Iterable[np.ndarray]],
    metadata: dict[str, str] | None = None,
    progress: Progress | None = None,
) -> int:
    """Write a safetensors file tensor by tensor, ``produce(name)`` yielding each tensor's bytes in C order.

    The header is written first with placeholder digests of the right length,
    then the data (hashed as it goes), then the real header over the
    placeholder; the result is the same file ``save_model_file`` writes.  The
    space is reserved up front (posix_fallocate), so a full disk fails early.
    Atomic (moerun.files.fileio.atomic_path).  Returns the file size.
    """
    placeholder = _header_blob(layout, {name: "0" * _DIGEST_HEX for name, _, _ in layout}, metadata)
    total = weights_file_bytes(layout, metadata)
    with atomic_path(path) as tmp:
        fd = os.open(tmp, os.O_WRONLY)
        try:
            if hasattr(os, "posix_fallocate"):
                try:
                    os.posix_fallocate(fd, 0, total)
                except OSError as e:
                    if e.errno in (errno.ENOSPC, errno.EDQUOT):
                        raise
                    # a file system without fallocate: the space is taken as we write
            _write_all(fd, struct.pack("<Q", len(placeholder)) + placeholder)
            done = 8 + len(placeholder)
            digests: dict[str, str] = {}
            for name, tag, shape in layout:
                want = DTYPE_SIZES[tag] * int(np.prod(shape, dtype=np.int64))
                h = _hasher()
                got = 0
                for chunk in produce(name):
                    a = np.ascontiguousarray(chunk)
                    if a.dtype != NUMPY_OF.get(tag, a.dtype) or a.dtype.byteorder == ">":
                        raise ValueError(f"tensor {name!r}: chunk dtype {a.dtype} is not {tag}")
                    mv = memoryview(a).cast("B")
                    h.update(mv)
                    _write_all(fd, mv)
                    got += len(mv)
                    done += len(mv)
                    if progress:
                        progress(done, total)
                if got != want:
                    raise ValueError(f"tensor {name!r}: produced {got} bytes, its shape needs {want}")
                digests[name] = h.hexdigest()
            blob = _header_blob(layout, digests, metadata)
            if len(blob) != len(placeholder):  # digests are fixed-length hex; cannot happen
                raise RuntimeError("header length changed while writing")
            os.pwrite(fd, blob, 8)
        finally:
            os.close(fd)
    return total


def _write_all(fd: int, data) -> None:
    view = memoryview(data).cast("B")
    while view:
        n = os.write(fd, view)
        view = view[n:]


def tensor_chunks(name: str, shape: tuple[int, ...], dtype: str, seed: int, d_model: int,
                  chunk_bytes: int | None = None) -> Iterable[np.ndarray]:
    """Random values for one tensor, in row chunks, from a generator seeded by (seed, name).

    Same scales as random_tensors: norms 1 + 0.1 N(0,1), the embedding
    N(0,1)/sqrt(d_model), every other matrix N(0,1)/sqrt(rows).  Each tensor
    has its own stream, so the values do not depend on the writing order.
    """
    rng = np.random.default_rng([seed, zlib.crc32(name.encode("utf-8"))])
    out_dtype = NUMPY_OF[dtype]
    rows = shape[0]
    row = int(np.prod(shape[1:], dtype=np.int64)) if len(shape) > 1 else 1
    per_chunk = max(1, (chunk_bytes or CHUNK_BYTES) // (4 * row))
    if len(shape) == 1:
        per_chunk = rows
    if name.endswith("norm"):
        offset, scale = np.float32(1.0), np.float32(0.1)
    else:
        offset, scale = np.float32(0.0), np.float32(1.0 / np.sqrt(d_model if name == "embed" else rows))
    for r0 in range(0, rows, per_chunk):
        n = min(per_chunk, rows - r0)
        a = rng.standard_normal((n, *shape[1:]), dtype=np.float32)
        a *= scale
        a += offset
        yield a.astype(out_dtype, copy=False)


def card_text(config: ModelConfig, seed: int, file_bytes: int, command: str | None = None) -> str:
    c = config
    lines = [
        f"# {c.name or 'synthetic model'}",
        "",
        f"**{RANDOM_NOTE}.** Written by `moerun synth` with random weights for studying page-in,",
        "memory budgets and planning at a chosen size. Its text is noise and its routing follows",
        "token identity, not content: do not study eviction or prefetch policies on it.",
        "",
        f"- {c.n_layers} layers, d_model {c.d_model}, {c.n_heads} heads ({c.n_kv_heads} KV) of {c.head_dim}",
        f"- {c.n_experts} experts per layer, top-{c.top_k}, d_expert {c.d_expert}, "
        f"{'shared expert d_shared ' + str(c.d_shared) if c.d_shared else 'no shared expert'}, "
        f"chosen weights {'renormalised' if c.norm_topk else 'as the router gives them'}",
        f"- vocabulary {c.vocab_size} (byte tokenizer), context {c.max_seq_len}, "
        f"{'tied' if c.tied_embeddings else 'separate'} embeddings, weights {c.dtype}",
        f"- seed {seed}; weights file {file_bytes:,} bytes",
        "- held-out perplexity: not applicable (untrained)",
    ]
    if command:
        lines += ["", f"Command: `{command}`"]
    return "\n".join(lines) + "\n"


def synthesize(out_dir: str | os.PathLike, config: ModelConfig, seed: int = 0,
               progress: Progress | None = None, command: str | None = None, force: bool = False) -> dict:
    """Write a complete model directory at ``out_dir`` with streamed random weights; return a summary.

    ``out_dir`` follows moerun.files.fileio's rules for directory outputs: its parent must exist; an existing
    empty directory is taken; an existing model directory is replaced only with ``force``; anything else
    is refused (OutputError), as is a disk without the space, before anything is written.  On any failure
    or interruption nothing is left under ``out_dir``; a killed run's temporary directory is removed by
    the next run to the same ``out_dir``.
    """
    out = Path(out_dir)
    check_output_dir(out, force, what="OUT", allow_empty=True)
    dtype = config.dtype
    if dtype not in NUMPY_OF:
        raise BadOption(f"weights dtype {dtype!r} cannot be synthesized (F32 or F16)")
    layout = tensor_layout(config, dtype)
    metadata = {"note": RANDOM_NOTE}
    file_bytes = weights_file_bytes(layout, metadata)
    tokenizer = byte_tokenizer_json()
    config_text = json.dumps(config.to_json(), indent=2) + "\n"
    card = card_text(config, seed, file_bytes, command)
    need = file_bytes + len(tokenizer) + len(config_text) + len(card) + (1 << 20)
    remove_stale_temporaries(out)  # a killed run's hundreds of MiB count as free space
    free = shutil.disk_usage(out.absolute().parent).free
    if need > free:
        raise OutputError(
            f"{out}: the model needs {need:,} bytes ({need / 2**30:.2f} GiB) but only {free:,} bytes "
            f"({free / 2**30:.2f} GiB) are free on that disk; nothing was written"
        )
    t0 = time.monotonic()
    shapes = {n: s for n, _, s in layout}

    def produce(name: str):
        return tensor_chunks(name, shapes[name], dtype, seed, config.d_model)

    with atomic_dir(out, force=force, what="OUT", allow_empty=True) as tmp:
        try:
            write_tensors_streaming(tmp / "model.safetensors", layout, produce, metadata, progress)
        except OutputError as e:
            if e.errno in (errno.ENOSPC, errno.EDQUOT, errno.EFBIG):
                raise OutputError(f"{out}: the disk filled up while writing the model; nothing was kept") from None
            raise
        write_text_atomic(tmp / "config.json", config_text)
        write_text_atomic(tmp / "tokenizer.json", tokenizer)
        write_text_atomic(tmp / "CARD.md", card)
    expert_nbytes = DTYPE_SIZES[dtype] * sum(int(np.prod(s)) for s in config.expert_shapes().values())
    return {
        "model_dir": str(out),
        "file_bytes": file_bytes,
        "expert_bytes": expert_nbytes,
        "experts_total_bytes": expert_nbytes * config.n_layers * config.n_experts,
        "seconds": time.monotonic() - t0,
        "seed": seed,
        "dtype": dtype,
        "config": config.to_json(),
        "note": RANDOM_NOTE,
    }
