"""The quantizing tool (offline): choosing scales and zero points, and writing a quantized model directory.

The stored format and its decoder live in ``moerun.files.packed`` (run time); this
module makes such files and is never imported by the engine.  For every group
of ``group`` input rows and every column (``moerun.files.packed`` says how a matrix
is cut) a weight becomes a code ``q`` in ``0 .. 2**bits - 1``::

    q = clip(round(W / s + z), 0, 2**bits - 1)        (quantize)

Two ways to choose ``s`` and ``z`` (docs/design/quant.md has the derivations):

``rtn``  round to nearest over the group's range, widened to include zero:
         ``lo = min(min W, 0)``, ``hi = max(max W, 0)``, ``s = (hi - lo) / (2**bits - 1)``
         rounded *up* to float16, ``z = -lo / s`` rounded to float16.  Every
         weight then lies within half a step (``s / 2``) of its dequantized value.
``hqq``  half-quadratic quantization (Badri and Shaji, 2023): starting from the
         rtn parameters, the zero point is refined to lower the lp error
         ``sum |W - w|**p`` (p < 1) by alternating a generalized soft-threshold
         of the residual and a closed-form zero-point update; per group the
         zero point with the smallest lp error among the rtn start and all
         iterates is kept, so hqq is never worse than rtn in that error.

``quantize_model`` writes the directory (atomically) and its CARD.md
(``moerun.makers._card``), scoring source and result on held-out text.
"""

from __future__ import annotations

import datetime
import json
import math
import os
import platform
import shutil
import time
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from moerun._version import __version__
from moerun.checks.score import score_text
from moerun.errors import BadInput, BadModelFile, BadOption
from moerun.files.checkpoint import Checkpoint, widen_into
from moerun.files.ckpt_config import is_open_checkpoint
from moerun.files.ckpt_store import (
    CheckpointStore,
    leading_special_id,
    model_config,
    moerun_sources,
    read_f32,
    read_stored,
    stored_finite,
)
from moerun.files.config import RANDOM_NOTE, ModelConfig
from moerun.files.fileio import atomic_dir, write_text_atomic
from moerun.files.modelfile import storage_order
from moerun.files.packed import (
    ATTN_PARTS,
    EXPERT_PARTS,
    F16,
    F32,
    HQQ_BETA,
    HQQ_ITERS,
    HQQ_KAPPA,
    HQQ_P,
    METHODS,
    BlobLayout,
    QuantSpec,
    expert_blob_name,
    expert_layout,
    group_blocks,
    n_groups,
)
from moerun.files.store import ModelStore
from moerun.makers._card import QuantReport, card_text, setting_tag
from moerun.makers.synthetic import write_tensors_streaming
from moerun.model.tokenizer import Tokenizer, read_text_file
from moerun.runtime.options import load

# scoring a model quantized from an open checkpoint (and its source) runs each with this many times top_k pool slots
# a layer: a few experts resident, never the model
SCORE_SLOTS = 2

# hqq keeps an iterate only if it lowers a group's lp error by more than this
# relative margin, so float summation order can never flip the comparison.
HQQ_MARGIN = 1e-9


# ---------------------------------------------------------------------------- choosing scales and zeros


def _f16_up(x: np.ndarray) -> np.ndarray:
    """Round positive float32 values to float16, upwards (the smallest float16 >= x)."""
    h = x.astype(F16)
    low = h.astype(F32) < x
    if low.any():
        h[low] = np.nextafter(h[low], F16.type(np.inf))
    return h


def rtn_params(x: np.ndarray, bits: int) -> tuple[np.ndarray, np.ndarray]:
    """Float16 (scale, zero) [N, O] for groups x [N, rows, O], over the range widened to include zero."""
    qmax = (1 << bits) - 1
    lo = np.minimum(x.min(axis=1), 0).astype(F32)
    hi = np.maximum(x.max(axis=1), 0).astype(F32)
    rng = hi - lo
    s = np.where(rng > 0, rng / F32(qmax), F32(1.0)).astype(F32)
    s16 = _f16_up(s)
    if not np.all(np.isfinite(s16)):
        raise BadOption("weights too large for float16 scales (a group spans more than 65504 quantization steps' worth)")
    z16 = (-lo / s16.astype(F32)).astype(F16)
    return s16, z16


def quantizegroup_blocks(x: np.ndarray, s16: np.ndarray, z16: np.ndarray, bits: int) -> np.ndarray:
    """Codes (float32 values, integral) for groups x [N, rows, O] with scale/zero [N, O]."""
    s = s16.astype(F32)[:, None, :]
    z = z16.astype(F32)[:, None, :]
    return np.clip(np.rint(x / s + z), 0, (1 << bits) - 1)


def dequantizegroup_blocks(q: np.ndarray, s16: np.ndarray, z16: np.ndarray) -> np.ndarray:
    """float32 (q - z) * s for codes q [N, rows, O] (any integer or float dtype) and scale/zero [N, O]."""
    return (q.astype(F32) - z16.astype(F32)[:, None, :]) * s16.astype(F32)[:, None, :]


def lp_error(x: np.ndarray, w: np.ndarray, p: float = HQQ_P) -> np.ndarray:
    """sum over each group's rows of |x - w|**p, in float64: [N, O] for x, w [N, rows, O]."""
    d = np.abs(x.astype(np.float64) - w.astype(np.float64))
    return np.sum(d**p, axis=1)


def _shrink(r: np.ndarray, beta: float, p: float) -> np.ndarray:
    """Generalized soft-thresholding, the proximal step of the lp penalty: sign(r) * max(|r| - |r|**(p-1) / beta, 0)."""
    a = np.abs(r)
    with np.errstate(divide="ignore"):
        thr = np.power(a, F32(p - 1)) / F32(beta)  # |r| = 0 gives inf, hence 0 below
    return np.sign(r) * np.maximum(a - thr, 0)


def hqq_zero(x: np.ndarray, s16: np.ndarray, z16: np.ndarray, bits: int,
             p: float = HQQ_P, beta: float = HQQ_BETA, kappa: float = HQQ_KAPPA, iters: int = HQQ_ITERS) -> np.ndarray:
    """Refine the zero points [N, O] of groups x [N, rows, O] for a lower lp error (half-quadratic splitting).

    Works in units of quantization steps (x / s), so it does not depend on the
    weights' scale.  With codes q = clip(round(x/s + z)) and the residual
    r = x/s - (q - z), each iteration solves
        e = argmin_e |e|_p^p + beta/2 |e - r|^2       ~ shrink(r)       (sparse error, in steps)
        z = argmin_z |e - (x/s - (q - z))|^2          = mean_rows(q - x/s + e)
    and multiplies beta by kappa.  Returns, per group, the float16 zero with
    the smallest lp error sum |x - (q - z) s|**p among the start and all
    iterates (a replacement must beat the incumbent by HQQ_MARGIN).
    """
    qmax = (1 << bits) - 1
    s = s16.astype(F32)[:, None, :]
    xs = x / s
    best = z16.copy()
    best_err = lp_error(x, dequantizegroup_blocks(quantizegroup_blocks(x, s16, best, bits), s16, best), p)
    z = z16.astype(F32)[:, None, :]
    for _ in range(iters):
        q = np.clip(np.rint(xs + z), 0, qmax)
        e = _shrink(xs - (q - z), beta, p)
        z = np.mean(q - xs + e, axis=1, keepdims=True, dtype=F32)
        beta *= kappa
        cand = z[:, 0, :].astype(F16)
        if not np.all(np.isfinite(cand)):
            break
        err = lp_error(x, dequantizegroup_blocks(quantizegroup_blocks(x, s16, cand, bits), s16, cand), p)
        better = err < best_err * (1 - HQQ_MARGIN)
        best = np.where(better, cand, best)
        best_err = np.where(better, err, best_err)
    return best


def quantize_matrix(w: np.ndarray, bits: int, group: int, method: str = "rtn") -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Quantize an (in, out) matrix: codes uint8 [in, out], scale and zero float16 [ceil(in/group), out]."""
    w = np.asarray(w, F32)
    if w.ndim != 2:
        raise ValueError("quantize_matrix takes a 2-D (in, out) matrix")
    if method not in METHODS:
        raise BadOption(f"unknown quantization method {method!r}: use rtn or hqq")
    rows, cols = w.shape
    codes = np.empty((rows, cols), np.uint8)
    scale = np.empty((n_groups(rows, group), cols), F16)
    zero = np.empty_like(scale)
    g0 = 0
    for r0, ng, size in group_blocks(rows, group):
        x = w[r0 : r0 + ng * size].reshape(ng, size, cols)
        s16, z16 = rtn_params(x, bits)
        if method == "hqq":
            z16 = hqq_zero(x, s16, z16, bits)
        codes[r0 : r0 + ng * size] = quantizegroup_blocks(x, s16, z16, bits).astype(np.uint8).reshape(ng * size, cols)
        scale[g0 : g0 + ng] = s16
        zero[g0 : g0 + ng] = z16
        g0 += ng
    return codes, scale, zero


def dequantize_matrix(codes: np.ndarray, scale: np.ndarray, zero: np.ndarray, group: int) -> np.ndarray:
    """The float32 (in, out) matrix that codes, scales and zeros stand for (the reference formula)."""
    rows, cols = codes.shape
    out = np.empty((rows, cols), F32)
    g0 = 0
    for r0, ng, size in group_blocks(rows, group):
        q = codes[r0 : r0 + ng * size].reshape(ng, size, cols)
        out[r0 : r0 + ng * size] = dequantizegroup_blocks(q, scale[g0 : g0 + ng], zero[g0 : g0 + ng]).reshape(ng * size, cols)
        g0 += ng
    return out


def quantize_blob(mats: Sequence[np.ndarray], bits: int, group: int, method: str) -> tuple[BlobLayout, np.ndarray, list]:
    """Quantize matrices into one blob; also return the per-matrix (codes, scale, zero)."""
    layout = BlobLayout(tuple(tuple(m.shape) for m in mats), bits, group)
    q = [quantize_matrix(m, bits, group, method) for m in mats]
    return layout, layout.pack(q), q


# ---------------------------------------------------------------------------- building a quantized model directory


class _ErrorSum:
    """Sums of squared errors and squared weights over many matrices: one relative RMS error for a whole model."""

    def __init__(self):
        self.err = 0.0
        self.ref = 0.0

    def add(self, w: np.ndarray, approx: np.ndarray) -> None:
        w64 = w.astype(np.float64)
        self.err += float(np.sum((w64 - approx) ** 2))
        self.ref += float(np.sum(w64**2))

    @property
    def relative_rms(self) -> float:
        return math.sqrt(self.err / self.ref) if self.ref else 0.0


class _MoerunSource:
    """A moerun model directory to quantize (``ModelStore``): tensors by their own names, experts read whole."""

    open_checkpoint = False

    def __init__(self, path: Path):
        self.path = path
        self.store = ModelStore.open(path)
        self.config = self.store.config
        self.file_bytes = self.store.header.file_size
        self.expert_nbytes = self.store.expert_nbytes
        self.tokenizer = path / "tokenizer.json"

    def dense_dtype(self, name: str) -> str:
        return self.store.header.tensors[name].dtype

    def dense_chunks(self, name: str):
        """The tensor as stored (``dense_dtype``), in pieces of whole rows, in file order."""
        yield self.store.read_tensor(name)

    def expert(self, layer: int, e: int) -> list[np.ndarray]:
        return [self.store.read_tensor(self.config.expert_name(layer, e, p)).astype(F32) for p in EXPERT_PARTS]

    def close(self) -> None:
        self.store.close()


class _OpenSource:
    """An open checkpoint to quantize, read in place: a dense tensor when it is written, an expert at a time into one
    slot (``CheckpointStore.copy_in``: its spans, across shards), nothing of the model held."""

    open_checkpoint = True
    ROWS_BYTES = 8 << 20  # a transposed matrix is written in pieces of about this many bytes

    def __init__(self, path: Path):
        self.path = path
        ck = Checkpoint.open(path)
        try:
            # the model's own context (the engine sizes a model from an open checkpoint's KV cache for at most
            # DEFAULT_CONTEXT positions unless asked for more, as it does the checkpoint's)
            self.config = model_config(ck, leading_special_id(ck.tokenizer_path), context=ck.config.max_position_embeddings)
            self.store = CheckpointStore(ck, self.config)  # no dense weights loaded: experts only
        except BaseException:
            ck.close()
            raise
        self.ck = ck
        self.sources = moerun_sources(self.config)
        self.file_bytes = sum(h.file_size for h in ck.headers)
        self.expert_nbytes = self.store.expert_nbytes
        self.tokenizer = ck.tokenizer_path
        self._slot = np.zeros(self.store.slot_nbytes, np.uint8)

    def dense_dtype(self, name: str) -> str:
        dtypes = {self.ck.tensors[n].info.dtype for n in self.sources[name][0]}
        return dtypes.pop() if len(dtypes) == 1 else "F32"

    def _stored(self, n: str, dtype: str) -> np.ndarray:
        a = read_f32(self.ck, n) if dtype == "F32" and self.ck.tensors[n].info.dtype != "F32" else read_stored(self.ck, n)
        if not stored_finite(a, dtype):
            raise BadModelFile(f"{self.ck.files[self.ck.tensors[n].file]}: tensor {n!r} holds NaN or infinite values")
        return a

    def dense_chunks(self, name: str):
        tensors, transposed = self.sources[name]
        dtype = self.dense_dtype(name)
        parts = [self._stored(n, dtype) for n in tensors]
        a = parts[0] if len(parts) == 1 else np.concatenate(parts, axis=0)
        del parts
        if not transposed:
            yield a
            return
        # (in, out) rows are the stored [out, in] matrix's columns: made a block of them at a time, so that a
        # 150k x 2048 output matrix is never held twice
        step = max(1, self.ROWS_BYTES // max(1, a.shape[0] * a.itemsize))
        for c0 in range(0, a.shape[1], step):
            yield np.ascontiguousarray(a[:, c0 : c0 + step].T)

    def expert(self, layer: int, e: int) -> list[np.ndarray]:
        self.store.copy_in(layer, e, self._slot)
        codec = self.store.codec
        mats = [np.array(w, F32) for w in codec.weights(codec.bind(self._slot))]  # (in, out) float32, exactly widened
        if not all(np.all(np.isfinite(m)) for m in mats):
            raise BadModelFile(f"{self.path}: expert {e} of layer {self.config.routed_blocks()[layer]} holds NaN or infinite values")
        return mats

    def close(self) -> None:
        self.store.close()


def open_source(path: Path) -> _MoerunSource | _OpenSource:
    """The model directory ``path`` as a quantizer's source: an open checkpoint's, or a moerun model's."""
    if path.is_dir() and is_open_checkpoint(path):
        return _OpenSource(path)
    return _MoerunSource(path)


class _Writer:
    """The quantized weights file's tensors (name, dtype, shape, in file order) and what makes each, one at a time.

    Everything but attention and the experts keeps the source's dtype (BF16 included: the engine widens it, exactly,
    a chunk at a time); attention becomes float16 (attn_bits 16; a BF16 source's stays BF16, which is as small and
    exact) or a packed blob like an expert's; each expert is quantized into one blob when its turn comes.
    """

    def __init__(self, src, spec: QuantSpec, on_progress=None):
        self.src = src
        self.spec = spec
        c = self.config = src.config
        self.layout = expert_layout(c, spec.expert_bits, spec.group)
        self.on_progress = on_progress
        self.attn_errors = _ErrorSum()
        self.expert_errors = _ErrorSum()
        self.attn = {f"layers.{b}.attn.{p}" for b in range(c.n_blocks) for p in ATTN_PARTS}
        self.make: dict[str, object] = {}
        self.attn_dtype = "F16"
        shapes = {}
        tags = {}
        for name, shape in c.dense_shapes().items():
            stored = src.dense_dtype(name)
            if name not in self.attn:
                tags[name], shapes[name] = stored, shape
                self.make[name] = (self._as_stored, name)
            elif spec.attn_bits == 16:
                tags[name], shapes[name] = ("BF16" if stored == "BF16" else "F16"), shape
                self.attn_dtype = tags[name]
                self.make[name] = (self._attn16, name)
            else:
                blob = BlobLayout((tuple(shape),), spec.attn_bits, spec.group)
                tags[name + ".packed"], shapes[name + ".packed"] = "U8", (blob.nbytes,)
                self.make[name + ".packed"] = (self._attn_packed, name)
        self.experts = {}
        for layer, block in enumerate(c.routed_blocks()):
            for e in range(c.n_experts):
                name = expert_blob_name(block, e)
                tags[name], shapes[name] = "U8", (self.layout.nbytes,)
                self.make[name] = (self._expert, (layer, e))
        self.total = c.n_layers * c.n_experts
        self.done = 0
        self.tensors = [(name, tags[name], tuple(shapes[name])) for name in storage_order(shapes)]

    def produce(self, name: str):
        fn, arg = self.make[name]
        return fn(arg)

    def _as_stored(self, name: str):
        yield from self.src.dense_chunks(name)

    def _whole_f32(self, name: str) -> tuple[np.ndarray, np.ndarray]:
        """A dense tensor as stored, and widened to float32."""
        a = np.concatenate(list(self.src.dense_chunks(name)), axis=0)
        if a.dtype == np.uint16:  # BF16 bits
            return a, widen_into(a, "BF16", np.empty(a.shape, F32))
        return a, a.astype(F32)

    def _attn16(self, name: str):
        stored, w = self._whole_f32(name)
        if stored.dtype == np.uint16:  # BF16 kept: exact
            self.attn_errors.add(w, w)
            yield stored
            return
        h = w.astype(F16)
        if not np.all(np.isfinite(h)):
            raise BadOption(f"tensor {name!r} holds values too large for float16; use --attn-bits 8")
        self.attn_errors.add(w, h.astype(F32))
        yield h

    def _attn_packed(self, name: str):
        _, w = self._whole_f32(name)
        _, blob, q = quantize_blob([w], self.spec.attn_bits, self.spec.group, self.spec.method)
        self.attn_errors.add(w, dequantize_matrix(*q[0], self.spec.group))
        yield blob

    def _expert(self, key: tuple[int, int]):
        mats = self.src.expert(*key)
        q = [quantize_matrix(m, self.spec.expert_bits, self.spec.group, self.spec.method) for m in mats]
        for m, qq in zip(mats, q):
            self.expert_errors.add(m, dequantize_matrix(*qq, self.spec.group))
        self.done += 1
        if self.on_progress is not None:
            self.on_progress(self.done, self.total)
        yield self.layout.pack(q)


def _write_model_files(tmp: Path, src, c: ModelConfig, spec: QuantSpec, writer: _Writer) -> None:
    """The weights file (the setting recorded in its metadata), streamed tensor by tensor; config.json with the same
    entry; the tokenizer and held-out text.

    The setting is written twice from one value: ``moerun.files.packed.recorded_quant_problem`` refuses a model whose two
    copies were edited apart, since the blobs would be decoded with the wrong layout.
    """
    entry = {**spec.to_json(), "source": c.name or src.path.name}
    meta = {"quant": json.dumps(entry, separators=(",", ":"))}
    if c.extra.get("synthetic"):
        meta["note"] = RANDOM_NOTE
    write_tensors_streaming(tmp / "model.safetensors", writer.tensors, writer.produce, meta)
    raw = c.to_json()
    raw["name"] = f"{c.name or src.path.name}-{setting_tag(spec)}"
    raw["quant"] = entry
    write_text_atomic(tmp / "config.json", json.dumps(raw, indent=2) + "\n")
    if src.tokenizer is not None and Path(src.tokenizer).exists():
        shutil.copyfile(src.tokenizer, tmp / "tokenizer.json")
    if (src.path / "heldout.txt").exists():
        shutil.copyfile(src.path / "heldout.txt", tmp / "heldout.txt")


def quantize_model(
    src,
    out,
    spec: QuantSpec,
    force: bool = False,
    score_tokens: int | None = None,
    score: bool = True,
    on_progress=None,
    command: str | None = None,
    text=None,
) -> QuantReport:
    """Write a quantized copy of the model directory ``src`` to ``out`` (atomically: a temp dir, then rename).

    ``src`` is a moerun model or an open checkpoint (read in place, one expert at a time: nothing needs the model
    resident).  Dense tensors other than attention (the shared expert's too) keep the source's dtype; attention is
    16-bit (attn_bits 16) or packed like the experts.  ``score``: measure the perplexity of source and result on
    ``text`` (a file; default the source's heldout.txt, which an open checkpoint does not have) for the card, its
    first ``score_tokens`` tokens if given; from an open checkpoint each model runs with SCORE_SLOTS x top_k pool
    slots a layer, its experts read as needed (a moerun model's run resident, as before).
    ``on_progress(done, total)`` is called after each expert.
    """
    t_start = time.monotonic()
    src = Path(src)
    out = Path(out)
    source = open_source(src)
    try:
        c = source.config
        if c.extra.get("quant"):
            raise BadOption(f"{src} is already quantized; quantize the float model it was made from")
        spec = spec.for_config(c)
        text_path = None
        if score:
            text_path = Path(text) if text is not None else src / "heldout.txt"
            if text is None and not text_path.exists() and source.open_checkpoint:
                raise BadOption(f"{src} is an open checkpoint and has no heldout.txt: name a held-out text to measure "
                                "perplexity on with --text FILE, or give --no-score")
            if text is not None and not text_path.is_file():
                raise BadOption(f"--text {text}: no such file")
            if not (text_path.exists() and source.tokenizer is not None and Path(source.tokenizer).exists()):
                text_path = None
        ids = None
        if text_path is not None and source.open_checkpoint:  # tokenized now: a bad text fails before the long part
            tok = Tokenizer(Path(source.tokenizer), c.vocab_size, c.bos_token_id)
            ids = tok.encode_file(text_path, score_tokens)
            if ids.size < 2:
                raise BadInput(f"{text_path}: the text has too few tokens to score")
        # OUT may not be, contain or lie inside the source; it is built beside itself and appears whole
        # (moerun.files.fileio.atomic_dir: without force nothing at OUT is replaced, with force the old model is
        # exchanged for the new one in one step)
        with atomic_dir(out, force=force, protect=[src], what="OUT") as tmp:
            writer = _Writer(source, spec, on_progress)
            _write_model_files(tmp, source, c, spec, writer)
            report = QuantReport(
                out_dir=str(out),
                spec=spec,
                source_name=c.name or src.name,
                file_bytes=(tmp / "model.safetensors").stat().st_size,
                source_file_bytes=source.file_bytes,
                expert_bytes=writer.layout.nbytes,
                source_expert_bytes=source.expert_nbytes,
                expert_rel_rms=writer.expert_errors.relative_rms,
                attn_rel_rms=writer.attn_errors.relative_rms,
                seconds=0.0,
                attn_dtype=writer.attn_dtype,
            )
            del writer
            source.close()  # scoring opens the source again, as an engine
            if text_path is not None:
                slots = [min(c.n_experts, SCORE_SLOTS * c.top_k)] * c.n_layers if source.open_checkpoint else None
                report.heldout = score_pair(src, tmp, score_tokens, text_path, slots, ids)
            report.seconds = time.monotonic() - t_start
            write_text_atomic(tmp / "CARD.md", _card(report, c, src, command))
        return report
    finally:
        source.close()


def score_pair(src: Path, quantized: Path, max_tokens: int | None, text_path: Path | None = None,
               slots: list[int] | None = None, ids: np.ndarray | None = None) -> dict:
    """Held-out perplexity of the source and the quantized model on the same tokens, and the relative change.

    ``text_path``: the text (default the source's heldout.txt); ``ids``: its tokens, when the caller has them.
    ``slots``: pool slots per layer for both models, their experts read as needed (the engine is bit-exact either way),
    so that a model larger than memory is scored within it; None keeps every expert resident."""
    text_path = src / "heldout.txt" if text_path is None else Path(text_path)
    text = read_text_file(text_path) if ids is None else None
    doc = {}
    settings = {} if slots is None else {"slots": slots}
    for key, path in (("source", src), ("quantized", quantized)):
        with load(path, **settings) as eng:
            r = score_text(eng, text, max_tokens, ids=ids)
            doc[key] = {"perplexity": r.perplexity, "cross_entropy_nats": r.cross_entropy, "tok_s": r.tok_s}
            doc["predicted_tokens"] = r.predicted
    doc["relative_change"] = doc["quantized"]["perplexity"] / doc["source"]["perplexity"] - 1
    doc["text"] = text_path.name
    return doc


def _card(report: QuantReport, c: ModelConfig, src: Path, command: str | None) -> str:
    """The card, with when and where this run happened (the figures on it are this machine's)."""
    when = datetime.datetime.now().astimezone().strftime("%Y-%m-%d %H:%M %Z")
    machine = f"{platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, numpy {np.__version__}"
    return card_text(report, c, src, command, when, machine, __version__)
