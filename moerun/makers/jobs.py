"""``moerun.synth`` and ``moerun.quantize``: the jobs that write model directories, as library functions.

Each returns a result whose ``to_json()`` is what ``moerun synth --json`` / ``moerun quantize --json``
prints; errors are ``moerun.errors``; progress goes to the callback given, never to a stream.
"""

from __future__ import annotations

import os
import shlex
from collections.abc import Callable
from dataclasses import dataclass

from moerun.errors import BadModelFile, BadOption
from moerun.files.bundled import resolve_model
from moerun.files.config import ModelConfig
from moerun.files.packed import QuantSpec
from moerun.makers._card import QuantReport
from moerun.makers.quantize import quantize_model
from moerun.makers.synth_open import DEFAULT_SHARD, OpenShape, synthesize_open
from moerun.makers.synthetic import BITS, synth_config, synthesize

# What moerun.quantize returns: the report quantize_model makes (its to_json is the --json document).
QuantizeResult = QuantReport


@dataclass
class SynthResult:
    """What ``moerun.synth`` wrote: the directory, its sizes, and the config it holds."""

    model_dir: str
    file_bytes: int
    expert_bytes: int
    experts_total_bytes: int
    seconds: float
    seed: int
    dtype: str
    config: ModelConfig
    note: str

    def to_json(self) -> dict:
        return {
            "model_dir": self.model_dir,
            "file_bytes": self.file_bytes,
            "expert_bytes": self.expert_bytes,
            "experts_total_bytes": self.experts_total_bytes,
            "seconds": self.seconds,
            "seed": self.seed,
            "dtype": self.dtype,
            "config": self.config.to_json(),
            "note": self.note,
        }


def synth_shape(out: str | os.PathLike, *, layers: int, experts: int, d_model: int, d_expert: int, top_k: int = 2,
                heads: int | None = None, kv_heads: int | None = None, head_dim: int | None = None, vocab: int = 257,
                context: int = 256, untied: bool = False, d_shared: int = 0, renorm: bool = True, bits: int = 32,
                seed: int = 0, name: str | None = None) -> ModelConfig:
    """The config ``synth`` writes, every shape checked (BadOption names the command line's option)."""

    def positive(value, option: str) -> int:
        if value is None or value < 1:
            raise BadOption(f"{option} must be a positive whole number, got {value}")
        return value

    layers = positive(layers, "--layers")
    experts = positive(experts, "--experts")
    d_model = positive(d_model, "--d-model")
    d_expert = positive(d_expert, "--d-expert")
    top_k = positive(top_k, "--top-k")
    if top_k > experts:
        raise BadOption(f"--top-k {top_k} is more than --experts {experts}")
    heads = positive(heads, "--heads") if heads is not None else max(1, d_model // 64)
    if head_dim is not None:
        head_dim = positive(head_dim, "--head-dim")
    else:
        if d_model % heads:
            raise BadOption(f"--d-model {d_model} is not a multiple of {heads} heads; give --head-dim")
        head_dim = d_model // heads
    if head_dim % 2:
        raise BadOption(f"head width {head_dim} must be even (rotary embeddings); give --heads or --head-dim")
    kv_heads = positive(kv_heads, "--kv-heads") if kv_heads is not None else heads
    if heads % kv_heads:
        raise BadOption(f"--heads {heads} must be a multiple of --kv-heads {kv_heads}")
    vocab = positive(vocab, "--vocab")
    if vocab < 257:
        raise BadOption(f"--vocab must be at least 257 (the byte tokenizer's 256 bytes and <doc>), got {vocab}")
    context = positive(context, "--context")
    if d_shared < 0:
        raise BadOption(f"--d-shared must be 0 (no shared expert) or a positive whole number, got {d_shared}")
    if bits not in BITS:
        raise BadOption(f"bits must be one of {', '.join(map(str, sorted(BITS)))}, got {bits}")
    if name is None:
        name = str(out).rstrip("/").split("/")[-1] or "synthetic"
    try:
        return synth_config(
            layers=layers, experts=experts, top_k=top_k, d_model=d_model, d_expert=d_expert, n_heads=heads,
            n_kv_heads=kv_heads, head_dim=head_dim, max_seq_len=context, vocab_size=vocab, name=name,
            dtype=BITS[bits], tied_embeddings=not untied, seed=seed,
            d_shared=d_shared, norm_topk=renorm,
        )
    except BadModelFile as e:  # the config's own checks, phrased for options
        raise BadOption(str(e).replace("config.json: ", "")) from None


def synth_command(out: str | os.PathLike, c: ModelConfig, bits: int, seed: int) -> str:
    """The command that rebuilds this model, every shape option spelled out (for CARD.md)."""
    parts = [
        "moerun", "synth", str(out), "--layers", c.n_layers, "--experts", c.n_experts, "--d-model", c.d_model,
        "--d-expert", c.d_expert, "--top-k", c.top_k, "--heads", c.n_heads, "--kv-heads", c.n_kv_heads,
        "--head-dim", c.head_dim, "--vocab", c.vocab_size, "--context", c.max_seq_len, "--bits", bits,
        "--seed", seed, "--name", c.name,
    ]
    if not c.tied_embeddings:
        parts.append("--untied")
    if c.d_shared:
        parts += ["--d-shared", c.d_shared]
    if not c.norm_topk:
        parts.append("--no-renorm")
    return " ".join(shlex.quote(str(p)) for p in parts)


def synth(out: str | os.PathLike, *, layers: int, experts: int, d_model: int, d_expert: int, top_k: int = 2,
          heads: int | None = None, kv_heads: int | None = None, head_dim: int | None = None, vocab: int = 257,
          context: int = 256, untied: bool = False, d_shared: int = 0, renorm: bool = True, bits: int = 32,
          seed: int = 0, name: str | None = None, force: bool = False,
          progress: Callable[[int, int], None] | None = None) -> SynthResult:
    """Write a model directory with random weights at ``out`` (``moerun synth``); its routing is meaningless.

    ``progress(bytes_done, bytes_total)`` is called as the weights file is written.  ``out`` follows the
    directory-output rules (moerun.files.fileio): replaced only with ``force``, and only if it is a model.
    """
    config = synth_shape(out, layers=layers, experts=experts, d_model=d_model, d_expert=d_expert, top_k=top_k,
                         heads=heads, kv_heads=kv_heads, head_dim=head_dim, vocab=vocab, context=context,
                         untied=untied, d_shared=d_shared, renorm=renorm, bits=bits, seed=seed, name=name)
    doc = synthesize(out, config, seed=seed, progress=progress, command=synth_command(out, config, bits, seed), force=force)
    return SynthResult(
        model_dir=doc["model_dir"], file_bytes=doc["file_bytes"], expert_bytes=doc["expert_bytes"],
        experts_total_bytes=doc["experts_total_bytes"], seconds=doc["seconds"], seed=doc["seed"], dtype=doc["dtype"],
        config=config, note=doc["note"],
    )


@dataclass
class SynthOpenResult:
    """What ``moerun.synth_open`` wrote: an open checkpoint of random weights (``moerun synth --open-type``)."""

    model_dir: str
    model_type: str
    files: list[str]
    file_bytes: int
    dtype: str
    seconds: float
    seed: int
    config: dict  # the config.json written
    note: str

    def to_json(self) -> dict:
        return dict(self.__dict__)


def synth_open(out: str | os.PathLike, *, model_type: str, layers: int, experts: int, d_model: int, d_expert: int,
               top_k: int = 2, heads: int | None = None, kv_heads: int | None = None, head_dim: int | None = None,
               vocab: int = 258, context: int = 4096, untied: bool = True, d_shared: int = 0, renorm: bool = False,
               bits: int = 16, dense_layers: tuple[int, ...] = (), dense_width: int = 0, shard_bytes: int = DEFAULT_SHARD,
               seed: int = 0, force: bool = False, progress: Callable[[int, int], None] | None = None) -> SynthOpenResult:
    """Write an open checkpoint of random weights of ``model_type`` at ``out`` (``moerun synth --open-type``): BF16
    (``bits`` 16) or F32 (32), sharded at ``shard_bytes``; its text is noise and its routing meaningless."""
    shape = synth_shape(out, layers=layers, experts=experts, d_model=d_model, d_expert=d_expert, top_k=top_k,
                        heads=heads, kv_heads=kv_heads, head_dim=head_dim, vocab=max(vocab, 257), context=context,
                        untied=untied, d_shared=d_shared, renorm=renorm, bits=bits, seed=seed)
    if vocab < 258:
        raise BadOption(f"--vocab must be at least 258 for an open checkpoint (its two special tokens and 256 bytes), got {vocab}")
    for layer in dense_layers:
        if not 0 <= layer < layers:
            raise BadOption(f"--dense-layers names layer {layer}, but there are {layers} (0..{layers - 1})")
    spec = OpenShape(
        model_type, layers, experts, d_model, d_expert, top_k=top_k, heads=shape.n_heads, kv_heads=shape.n_kv_heads,
        head_dim=head_dim, vocab=vocab, context=context, shared_width=d_shared, dense_layers=tuple(sorted(set(dense_layers))),
        dense_width=dense_width, norm_topk=renorm, tied=not untied, dtype={16: "BF16", 32: "F32"}[bits],
    )
    try:
        doc = synthesize_open(out, spec, seed=seed, shard_bytes=shard_bytes, progress=progress, force=force)
    except BadModelFile as e:  # the reader's own checks of the config, phrased for options
        raise BadOption(str(e).replace("the synthesized config.json: ", "")) from None
    return SynthOpenResult(**doc)


def quantize(out: str | os.PathLike, model_dir: str | os.PathLike | None = None, *, expert_bits: int = 4,
             attn_bits: int = 16, group: int = 64, method: str = "hqq", force: bool = False, score: bool = True,
             max_tokens: int | None = None, progress: Callable[[int, int], None] | None = None,
             command: str | None = None, text: str | os.PathLike | None = None) -> QuantizeResult:
    """Write a quantized copy of ``model_dir`` (default: the bundled model; a moerun model or an open checkpoint) to
    ``out`` (``moerun quantize``).

    ``score``: measure the perplexity of source and result for the card on ``text`` (default the model's
    heldout.txt; an open checkpoint has none, and needs ``text`` or ``score=False``), its first ``max_tokens``
    tokens if given.  ``progress(done, total)`` is called after each expert; ``command`` is recorded
    in CARD.md as the command that made the copy.
    """
    spec = QuantSpec.checked(expert_bits, attn_bits, group, method, BadOption)
    if max_tokens is not None and not score:
        raise BadOption("--max-tokens and --no-score contradict each other (--max-tokens says how much of heldout.txt "
                        "to score, --no-score skips scoring); give one")
    if text is not None and not score:
        raise BadOption("--text and --no-score contradict each other (--text names the text to score, --no-score "
                        "skips scoring); give one")
    src = resolve_model(model_dir)
    return quantize_model(src, out, spec, force=force, score=score, score_tokens=max_tokens, on_progress=progress,
                          command=command, text=text)
