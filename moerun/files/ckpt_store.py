"""An open checkpoint as the engine's store: the same surface as ``moerun.files.store.ModelStore``.

``CheckpointStore.open(dir)`` validates the directory (``moerun.files.checkpoint``), describes it as a
``ModelConfig`` (its optional parts: q/k norms, biases, a gated shared expert, dense layers), widens the dense
weights to float32 once, and leaves the routed experts in the shards: a page-in is one ``os.preadv`` per file
into a pool slot (``read_expert``), and ``CheckpointCodec`` turns a slot into the three matrices.  Nothing of
the checkpoint is converted or copied to disk.

Orientation: the checkpoint stores matrices [out, in] and the model computes ``x @ w`` with ``w`` [in, out],
so every matrix is handed over as the transposed *view* of its [out, in] array (BLAS reads it transposed; no
transposed copy is made).  The embedding table is not held: its rows are read from the shard when a token
needs them (``EmbeddingRows``), unless the output matrix is tied to it.  Everything is read with ``os.preadv``:
nothing of the checkpoint is mapped, so no page of it counts in the resident set.

Expert slots hold an expert as stored (BF16/F16 widened at each use into scratch) or, with ``widen``, as
float32 widened once after each read (``CheckpointCodec``; both give the same bits).  The prefetch reader
process reads an expert's pieces (``read_pieces``), one ring entry each.

Dense matrices are widened to float32 once, or with ``stored_dense`` kept as stored and widened a block of rows
at each use (``moerun.model.operands.StoredMatrix``).

A widened slot is rewritten after its read, so the pool never reads one here while the reader process may still
copy into it (``Codec.rewrites_slot``): it asks the reader to read that slot next and waits for it instead.

Not yet here (refused with one line where asked for): the ``mmap`` page-in mechanism.
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
import time
from pathlib import Path

import numpy as np

from moerun.errors import BadModelFile, BadOption, ModelFileChanged, PageInError
from moerun.files import ckpt_tensors as names
from moerun.files.checkpoint import (
    SLOT_ALIGN,
    STORED_DTYPES,
    Checkpoint,
    ExpertSpans,
    make_expert_spans,
    preadv_exact,
    read_expert,
    widen_into,
)
from moerun.files.codec import Codec
from moerun.files.config import ModelConfig
from moerun.files.pagecache import drop_pages, drop_problem
from moerun.files.store import file_change, file_stamp
from moerun.model.operands import BLOCK_BYTES, StoredMatrix, WidenScratch

# An open checkpoint's KV cache is sized for this many positions (or the model's maximum, when smaller):
# a model's maximum (32k-256k positions) would reserve gigabytes nobody asked for.
DEFAULT_CONTEXT = 4096


def widened_layout(spans: ExpertSpans) -> tuple[tuple[int, int, int], tuple[int, int, int], int]:
    """Where an expert lies in a slot that holds it as float32: each part's float32 region (aligned), the offset
    its stored bytes are read to (the upper half of the region, for a 2-byte dtype), and the slot's bytes."""
    regions, staged = [], []
    pos = 0
    for p in spans.parts:
        n = p.nbytes // STORED_DTYPES[p.dtype].itemsize
        regions.append(pos)
        staged.append(pos + 4 * n - p.nbytes)
        pos = -(-(pos + 4 * n) // SLOT_ALIGN) * SLOT_ALIGN
    return tuple(regions), tuple(staged), pos


class CheckpointCodec(Codec):
    """A slot holding one routed expert -> float32 ``(w_gate, w_up, w_down)`` [in, out], transposed views.

    As stored (``widened`` False): the parts at the offsets of the first expert's span map (every expert shares
    them); F32 parts are viewed in the slot, BF16 (exactly) and F16 parts widened at each use into scratch
    allocated once.  Widened (True; BF16 and F16 only): the slot holds float32 parts (``widened_layout``); a read
    lands in the upper half of each part and ``finish`` widens it in place, once, after the read."""

    def __init__(self, spans: ExpertSpans, widened: bool = False):
        self.spans = spans
        self.dtype = spans.gate.dtype
        self.widened = widened and self.dtype != "F32"
        self.rewrites_slot = self.widened
        self.name = self.dtype + (", widened to float32 when read" if self.widened else "")
        self._scratch = None
        if self.widened:
            self.regions, _, self.slot_nbytes = widened_layout(spans)
        else:
            self.slot_nbytes = spans.slot_nbytes
            if self.dtype != "F32":
                self._scratch = tuple(np.empty(p.shape, np.float32) for p in spans.parts)
                self._scratch_t = tuple(s.T for s in self._scratch)

    def bind(self, slot: np.ndarray):
        if not self.widened:
            return self.spans.views(slot)
        view = memoryview(slot).cast("B")
        return tuple(np.frombuffer(view, np.float32, _elements(p.shape), r).reshape(p.shape)
                     for p, r in zip(self.spans.parts, self.regions))

    def finish(self, slot) -> None:
        """Widen a freshly read slot in place (widened codecs only; the stored bits sit in each part's upper half)."""
        if not self.widened:
            return
        view = memoryview(slot).cast("B")
        for p, r, at in zip(self.spans.parts, self.regions, self.spans.dst_offsets):
            n = _elements(p.shape)
            out = np.frombuffer(view, np.uint32, n, r)
            staged = np.frombuffer(view, STORED_DTYPES[p.dtype], n, at)
            if self.dtype == "BF16":  # numpy sees the overlap and reads the input through a temporary
                np.left_shift(staged, np.uint32(16), out=out, dtype=np.uint32)
            else:
                np.copyto(out.view(np.float32), staged, casting="safe")

    def weights(self, bound):
        if self._scratch is None:
            return bound[0].T, bound[1].T, bound[2].T
        for dst, src in zip(self._scratch, bound):
            widen_into(src, self.dtype, dst)
        return self._scratch_t

    def scratch_bytes(self) -> int:
        if self.widened:  # the temporary numpy reads an overlapping input through
            return max(p.nbytes for p in self.spans.parts)
        return 0 if self._scratch is None else sum(s.nbytes for s in self._scratch)


def _elements(shape) -> int:
    n = 1
    for s in shape:
        n *= s
    return n


def read_stored(ck: Checkpoint, name: str, rows: tuple[int, int] | None = None, into: np.ndarray | None = None) -> np.ndarray:
    """Tensor ``name`` (or its rows [r0, r1)) as stored (BF16 as uint16 bits), read with ``os.preadv`` from its
    shard into ``into`` or a new array: no page of the file is mapped, so nothing read stays in the resident set."""
    loc = ck.tensors[name]
    t = loc.info
    shape = t.shape
    start = t.start
    if rows is not None:
        r0, r1 = rows
        row_bytes = t.nbytes // shape[0]
        start += r0 * row_bytes
        shape = (r1 - r0, *shape[1:])
    stored = np.empty(shape, STORED_DTYPES[t.dtype]) if into is None else into
    try:
        preadv_exact(ck.fds[loc.file], [memoryview(stored).cast("B")], start)
    except (EOFError, OSError) as e:
        why = "the file ended" if isinstance(e, EOFError) else f"a read failed ({e.strerror or e})"
        raise PageInError(f"{ck.files[loc.file]}: {why} while reading tensor {name!r} (changed while open?)") from None
    return stored


def read_f32(ck: Checkpoint, name: str, rows: tuple[int, int] | None = None) -> np.ndarray:
    """Tensor ``name`` (or its rows [r0, r1)) widened to float32 (``read_stored``): F32 is read straight into the
    result; BF16 and F16 through a buffer of their own size."""
    t = ck.tensors[name].info
    shape = t.shape if rows is None else (rows[1] - rows[0], *t.shape[1:])
    out = np.empty(shape, np.float32)
    if t.dtype == "F32":
        return read_stored(ck, name, rows, into=out)
    return widen_into(read_stored(ck, name, rows), t.dtype, out)


def stored_finite(a: np.ndarray, dtype: str) -> bool:
    """No NaN or infinity among stored values (BF16: an exponent of all ones is one)."""
    if dtype == "BF16":
        return not np.any((a & np.uint16(0x7F80)) == np.uint16(0x7F80))
    return bool(np.all(np.isfinite(a)))


class EmbeddingRows:
    """``rows[ids]`` -> float32 [len(ids), d_model]: the embedding rows of ``ids``, each read from the shard when
    asked for (``read_f32``): the table is never held, and nothing read stays resident."""

    def __init__(self, checkpoint: Checkpoint):
        self.ck = checkpoint
        self.vocab = checkpoint.tensors[names.EMBED].info.shape[0]

    def __getitem__(self, ids) -> np.ndarray:
        ids = np.atleast_1d(np.asarray(ids))
        rows = [read_f32(self.ck, names.EMBED, (int(i), int(i) + 1)) for i in ids.tolist()]
        return np.concatenate(rows) if rows else np.empty((0, self.ck.config.hidden_size), np.float32)


def model_config(ck: Checkpoint, bos_token_id: int | None, context: int = DEFAULT_CONTEXT) -> ModelConfig:
    """The checkpoint described as a ``ModelConfig`` (the routed layers numbered in stack order)."""
    c = ck.config
    routed = c.moe_layers
    if not routed:
        raise BadModelFile(f"{ck.directory / 'config.json'}: no layer routes to experts (every layer is dense); moerun runs mixture-of-experts models")
    return ModelConfig(
        vocab_size=c.vocab_size, d_model=c.hidden_size, n_layers=len(routed), n_heads=c.num_heads,
        n_kv_heads=c.num_kv_heads, head_dim=c.head_dim, n_experts=c.num_experts, top_k=c.top_k,
        d_expert=c.expert_width, max_seq_len=min(c.max_position_embeddings, context), rope_theta=c.rope_theta,
        norm_eps=c.rms_norm_eps, tied_embeddings=c.tie_word_embeddings, name=ck.directory.name,
        bos_token_id=bos_token_id, dtype=ck.expert_dtype or "F32", d_shared=c.shared_expert_width,
        norm_topk=c.norm_topk_prob, arch=c.model_type,
        dense_layers=tuple(b for b in range(c.num_layers) if b not in set(routed)), d_dense=c.dense_width,
        qk_norm=c.qk_norm, qkv_bias=c.qkv_bias, clip_qkv=c.clip_qkv, shared_gate=bool(c.shared_expert_width),
        eos_token_ids=tuple(ck.eos_ids),
        extra={"synthetic": True} if ck.random_weights else {},
    )


def leading_special_id(tokenizer_path: Path | None) -> int | None:
    """The token the tokenizer's own post-processor puts before every text, or None: the library's
    ``encode(text)`` (special tokens added) is then ``[that id] + encode(text, add_special_tokens=False)``."""
    if tokenizer_path is None:
        return None
    try:
        from tokenizers import Tokenizer as _Tok

        tok = _Tok.from_file(str(tokenizer_path))
        with_, without = tok.encode("x").ids, tok.encode("x", add_special_tokens=False).ids
    except Exception:  # a malformed tokenizer is reported where it is loaded (moerun.model.tokenizer)
        return None
    if len(with_) == len(without) + 1 and with_[1:] == without:
        return with_[0]
    return None


def pieces_of(spans: ExpertSpans) -> tuple[tuple[int, int, int, int], ...]:
    """An expert's parts as (file, offset, nbytes, slot offset), in file order, neighbours in both joined."""
    out: list[list[int]] = []
    for p, at in sorted(zip(spans.parts, spans.dst_offsets), key=lambda x: (x[0].file, x[0].offset)):
        last = out[-1] if out else None
        if last is not None and last[0] == p.file and last[1] + last[2] == p.offset and last[3] + last[2] == at:
            last[2] += p.nbytes
        else:
            out.append([p.file, p.offset, p.nbytes, at])
    return tuple(tuple(x) for x in out)


def moerun_sources(config: ModelConfig) -> dict[str, tuple[tuple[str, ...], bool]]:
    """Where each dense tensor of a moerun file (``ModelConfig.dense_shapes``, its names) comes from in the checkpoint
    ``config`` describes: ``{moerun name: (checkpoint tensors, stacked along their first axis; transposed)}``;
    transposed: the checkpoint's [out, in] matrix is the moerun file's (in, out)."""
    out: dict[str, tuple[tuple[str, ...], bool]] = {"embed": ((names.EMBED,), False), "final_norm": ((names.FINAL_NORM,), False)}
    if not config.tied_embeddings:
        out["lm_head"] = ((names.LM_HEAD,), True)
    routed = set(config.routed_blocks())
    mine = dict(zip(("w_gate", "w_up", "w_down"), names.PARTS))
    for b in range(config.n_blocks):
        src, dst = f"model.layers.{b}", f"layers.{b}."
        a = f"{src}.self_attn"
        out[dst + "attn_norm"] = ((f"{src}.input_layernorm.weight",), False)
        out[dst + "moe_norm"] = ((f"{src}.post_attention_layernorm.weight",), False)
        for p in "qkvo":
            out[dst + f"attn.w{p}"] = ((f"{a}.{p}_proj.weight",), True)
        if config.qkv_bias:
            out[dst + "attn.bqkv"] = (tuple(f"{a}.{p}_proj.bias" for p in "qkv"), False)
        if config.qk_norm != "none":
            out[dst + "attn.q_norm"] = ((f"{a}.q_norm.weight",), False)
            out[dst + "attn.k_norm"] = ((f"{a}.k_norm.weight",), False)
        if b in routed:
            out[dst + "router"] = ((names.router(b),), True)
            if config.d_shared:
                for part, theirs in mine.items():
                    out[dst + "shared." + part] = ((f"{src}.mlp.shared_expert.{theirs}_proj.weight",), True)
                if config.shared_gate:
                    out[dst + "shared_gate"] = ((f"{src}.mlp.shared_expert_gate.weight",), True)
        else:
            for part, theirs in mine.items():
                out[dst + "mlp." + part] = ((f"{src}.mlp.{theirs}_proj.weight",), True)
    return out


class CheckpointStore:
    """An opened, validated open checkpoint, serving the engine as a ``ModelStore`` does."""

    def __init__(self, ck: Checkpoint, config: ModelConfig, widen: bool = False, stored_dense: bool = False):
        self.checkpoint = ck
        self.model_dir = ck.directory
        self.config = config
        self.path = ck.directory
        self.spans = [row for row in ck.span_map if row is not None]  # routed layer -> its experts' span maps
        first = self.spans[0][0]
        for row in self.spans:
            for sp in row:
                if sp.dst_offsets != first.dst_offsets or [p.dtype for p in sp.parts] != [p.dtype for p in first.parts]:
                    raise BadModelFile(f"{ck.files[sp.gate.file]}: expert {sp.expert} is not laid out like the others")
        self.codec = CheckpointCodec(first, widen)
        if self.codec.widened:  # every read lands in the upper halves of the float32 parts
            staged = widened_layout(first)[1]
            self.spans = [[make_expert_spans(sp.layer, sp.expert, sp.parts, dst_offsets=staged) for sp in row]
                          for row in self.spans]
            self.codec = CheckpointCodec(self.spans[0][0], True)
        self._pieces = [[pieces_of(sp) for sp in row] for row in self.spans]
        self.expert_nbytes = first.nbytes  # what a page-in reads
        self.slot_nbytes = self.codec.slot_nbytes  # what a slot holds: the parts as stored and aligned, or widened
        self.mechanism = "pread"
        self.link_rate: float | None = None
        self.cold_reads = False
        self.fault_hook = None  # the one fault seam, as ModelStore's
        self._stamps = [file_stamp(os.fstat(fd)) for fd in ck.fds]
        self.dense: dict[str, np.ndarray] = {}
        self._dense_nbytes = 0
        self.embed = None
        self.stored_dense = stored_dense  # matrices kept as stored, widened a block at a time at each use
        self.widen_scratch: WidenScratch | None = None

    # ---------------------------------------------------------------- opening
    @classmethod
    def open(cls, model_dir: str | os.PathLike, context: int = DEFAULT_CONTEXT, widen: bool = False,
             stored_dense: bool = False) -> CheckpointStore:
        """``widen``: pool slots hold BF16 and F16 experts as float32, widened once when read (twice the memory of
        a BF16 slot; no widening at each use).  ``stored_dense``: the dense matrices stay as stored
        (``moerun.model.operands.StoredMatrix``; half the memory, widened at each use)."""
        ck = Checkpoint.open(model_dir)
        try:
            bos = leading_special_id(ck.tokenizer_path)
            store = cls(ck, model_config(ck, bos, context), widen, stored_dense)
            store._load_dense()
        except BaseException:
            ck.close()
            raise
        return store

    def _f32(self, name: str) -> np.ndarray:
        a = read_f32(self.checkpoint, name)
        if not np.all(np.isfinite(a)):
            raise BadModelFile(f"{self.checkpoint.files[self.checkpoint.tensors[name].file]}: tensor {name!r} holds NaN or infinite values")
        return a

    def _stacked(self, tensor_names: list[str]) -> np.ndarray:
        """Tensors [out_i, in] (or vectors) widened into one float32 array, stacked along their first axis."""
        parts = [self._f32(n) for n in tensor_names]
        return np.concatenate(parts, axis=0)

    def _matrix(self, tensor_names: list[str]):
        """The [in, out] operand of one matrix (or of several stacked along out): the transposed view of its float32
        array, or with ``stored_dense`` a ``StoredMatrix`` of its stored bits, widened a block at each use."""
        dtype = self.checkpoint.tensors[tensor_names[0]].info.dtype
        if not self.stored_dense or dtype == "F32" or any(self.checkpoint.tensors[n].info.dtype != dtype for n in tensor_names):
            return self._stacked(tensor_names).T
        parts = []
        for n in tensor_names:
            a = read_stored(self.checkpoint, n)
            if not stored_finite(a, dtype):
                raise BadModelFile(f"{self.checkpoint.files[self.checkpoint.tensors[n].file]}: tensor {n!r} holds NaN or infinite values")
            parts.append(a)
        stored = parts[0] if len(parts) == 1 else np.concatenate(parts, axis=0)
        if self.widen_scratch is None:  # a block of the largest matrix, no more than BLOCK_BYTES
            c = self.config
            largest = max(c.vocab_size * c.d_model, (c.q_dim + 2 * c.kv_dim) * c.d_model, max(c.d_shared, c.d_dense) * c.d_model)
            self.widen_scratch = WidenScratch(min(BLOCK_BYTES, 4 * largest))
        return StoredMatrix(stored, dtype, self.widen_scratch)

    def _load_dense(self) -> None:
        ck, c = self.checkpoint, self.config
        d = self.dense
        d["final_norm"] = self._f32(names.FINAL_NORM)
        if c.tied_embeddings:  # the table is also the output matrix: held whole
            d["embed"] = self._f32(names.EMBED)
        else:
            d["lm_head"] = self._matrix([names.LM_HEAD])
            d["embed"] = None
            self.embed = EmbeddingRows(ck)
        routed = set(c.routed_blocks())
        for b in range(c.n_blocks):
            src, dst = f"model.layers.{b}", f"layers.{b}."
            a = f"{src}.self_attn"
            d[dst + "attn_norm"] = self._f32(f"{src}.input_layernorm.weight")
            d[dst + "moe_norm"] = self._f32(f"{src}.post_attention_layernorm.weight")
            d[dst + "attn.wqkv"] = self._matrix([f"{a}.{p}_proj.weight" for p in "qkv"])
            d[dst + "attn.wo"] = self._matrix([f"{a}.o_proj.weight"])
            if c.qkv_bias:
                d[dst + "attn.bqkv"] = self._stacked([f"{a}.{p}_proj.bias" for p in "qkv"])
            if c.qk_norm != "none":
                d[dst + "attn.q_norm"] = self._f32(f"{a}.q_norm.weight")
                d[dst + "attn.k_norm"] = self._f32(f"{a}.k_norm.weight")
            if b in routed:
                d[dst + "router"] = self._f32(names.router(b)).T
                if c.d_shared:
                    for part, mine in zip(names.PARTS, ("w_gate", "w_up", "w_down")):
                        d[dst + "shared." + mine] = self._matrix([f"{src}.mlp.shared_expert.{part}_proj.weight"])
                    d[dst + "shared_gate"] = self._f32(f"{src}.mlp.shared_expert_gate.weight").T
            else:
                for part, mine in zip(names.PARTS, ("w_gate", "w_up", "w_down")):
                    d[dst + "mlp." + mine] = self._matrix([f"{src}.mlp.{part}_proj.weight"])
        self._dense_nbytes = sum(a.nbytes for a in d.values() if a is not None)
        if self.widen_scratch is not None:
            self._dense_nbytes += self.widen_scratch.nbytes

    def release_dense(self, names_) -> None:
        for name in names_:
            self.dense.pop(name, None)

    # ---------------------------------------------------------------- sizes
    @property
    def dense_nbytes(self) -> int:
        """Bytes the dense weights take in memory as float32 (the embedding table only when tied)."""
        return self._dense_nbytes

    @property
    def expert_total_nbytes(self) -> int:
        return self.expert_nbytes * self.config.n_layers * self.config.n_experts

    # ---------------------------------------------------------------- checks
    def check_unchanged(self, files=None) -> None:
        """ModelFileChanged if any shard (of ``files``, indexes into the shards; default all) has been written to since
        it was opened (``ModelStore.check_unchanged``)."""
        fds = self.checkpoint.fds
        for i in range(len(fds)) if files is None else files:
            fd = fds[i]
            try:
                now = file_stamp(os.fstat(fd))
            except OSError as e:
                raise PageInError(f"{self.checkpoint.files[i]}: cannot check the file ({e.strerror or e})") from None
            what = file_change(self._stamps[i], now)
            if what is None:
                self._stamps[i] = now
                continue
            raise ModelFileChanged(
                f"{self.checkpoint.files[i]}: the checkpoint changed while this run was using it ({what}); results "
                f"computed from it cannot be trusted. Replace a checkpoint's files by renaming new ones over them, never "
                f"by writing into them"
            )

    # ---------------------------------------------------------------- page-in
    @property
    def fds(self) -> tuple[int, ...]:
        """The shards' open descriptors, as ``read_pieces`` numbers them."""
        return self.checkpoint.fds

    def read_pieces(self, layer: int, expert: int) -> tuple[tuple[int, int, int, int], ...]:
        """How the reader process copies an expert: ((file, offset, nbytes, slot offset), ...), one per part,
        parts contiguous in both the file and the slot joined (at most three)."""
        return self._pieces[layer][expert]

    def set_mechanism(self, mechanism: str) -> None:
        if mechanism != "pread":
            raise BadOption(f"page-in mechanism {mechanism!r} is not available for an open checkpoint yet; use 'pread'")
        self.mechanism = mechanism

    def page_in(self, layer: int, expert: int, dst: np.ndarray) -> int:
        t0 = time.monotonic_ns()
        self.copy_in(layer, expert, dst)
        return time.monotonic_ns() - t0

    def finish_read(self, dst) -> None:
        """Make a slot the reader process filled ready for the codec (widen it, for a widened codec)."""
        self.codec.finish(dst)

    def fault(self, layer: int, expert: int, guess: bool = False) -> None:
        if self.fault_hook is not None:
            self.fault_hook(layer, expert, guess)

    def copy_in(self, layer: int, expert: int, dst: np.ndarray, guess: bool = False) -> int:
        """Read routed layer ``layer``'s expert into ``dst`` (one preadv per file); return ns."""
        spans = self.spans[layer][expert]
        t0 = time.monotonic_ns()
        if self.fault_hook is not None:
            try:
                self.fault_hook(layer, expert, guess)
            except OSError as e:
                raise PageInError(f"{self.path}: reading expert {expert} of layer {layer} failed ({e.strerror or e})") from None
        read_expert(self.checkpoint.fds, spans, dst, self.checkpoint.files)
        self.codec.finish(dst)
        ns = time.monotonic_ns() - t0
        self.check_unchanged(spans.files)  # the shards just read (the engine checks them all after each call)
        if self.cold_reads and drop_problem() is None:
            for r in spans.reads:
                with contextlib.suppress(OSError):
                    drop_pages(self.checkpoint.fds[r.file], r.offset, r.nbytes)
        return ns

    def drop_cache(self) -> bool:
        if drop_problem() is not None:
            return False
        for fd in self.checkpoint.fds:
            with contextlib.suppress(OSError):
                drop_pages(fd)
        return True

    def close(self) -> None:
        self.checkpoint.close()

    def __del__(self):
        with contextlib.suppress(Exception):
            self.close()


def open_store(model_dir: str | os.PathLike, max_context: int | None = None, widen: bool = False,
               stored_dense: bool = False):
    """The store of a model directory: a ``CheckpointStore`` for an open checkpoint, else a ``ModelStore``.

    ``max_context``: the positions the KV cache is sized for, at most the model's own context (default: the
    model's context; an open checkpoint's, or a model quantized from one, at most DEFAULT_CONTEXT: its own is often
    32k-256k positions).
    ``widen``: an open checkpoint's BF16/F16 experts are held as float32 in their slots; ``stored_dense``: its
    dense matrices stay as stored (``CheckpointStore.open``)."""
    from moerun.files.ckpt_config import is_open_checkpoint
    from moerun.files.store import ModelStore

    if Path(model_dir).is_dir() and is_open_checkpoint(model_dir):
        return CheckpointStore.open(model_dir, max_context or DEFAULT_CONTEXT, widen, stored_dense)
    store = ModelStore.open(model_dir)
    if max_context is None and store.config.arch:  # quantized from an open checkpoint: sized as the checkpoint is
        max_context = DEFAULT_CONTEXT
    if max_context is not None and max_context < store.config.max_seq_len:
        store.config = dataclasses.replace(store.config, max_seq_len=max_context)
    return store
