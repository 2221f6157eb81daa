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
from moerun.errors import BadOption
from moerun.files.config import RANDOM_NOTE, ModelConfig, expert_tensor_name
from moerun.files.fileio import atomic_dir, write_text_atomic
from moerun.files.modelfile import save_model_file
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
from moerun.model.tokenizer import read_text_file
from moerun.runtime.options import load

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


def quantized_dense(store: ModelStore, spec: QuantSpec) -> tuple[dict[str, np.ndarray], float]:
    """The dense tensors of the quantized file, and attention's relative RMS error.

    Everything but attention keeps the source's dtype (the shared expert's too); attention becomes float16
    (attn_bits 16) or a packed blob like an expert's, so the file shrinks while the engine, which holds
    attention as float32 either way, uses the same memory.
    """
    c = store.config
    attn_names = {f"layers.{layer}.attn.{p}" for layer in range(c.n_layers) for p in ATTN_PARTS}
    tensors: dict[str, np.ndarray] = {}
    errors = _ErrorSum()
    for name in c.dense_shapes():
        arr = store.read_tensor(name)
        if name not in attn_names:
            tensors[name] = arr
            continue
        w = arr.astype(F32)
        if spec.attn_bits == 16:
            h = w.astype(F16)
            if not np.all(np.isfinite(h)):
                raise BadOption(f"tensor {name!r} holds values too large for float16; use --attn-bits 8")
            tensors[name] = h
            approx = h.astype(F32)
        else:
            _, blob, q = quantize_blob([w], spec.attn_bits, spec.group, spec.method)
            tensors[name + ".packed"] = blob
            approx = dequantize_matrix(*q[0], spec.group)
        errors.add(w, approx)
    return tensors, errors.relative_rms


def quantized_experts(store: ModelStore, spec: QuantSpec, on_progress=None) -> tuple[dict[str, np.ndarray], BlobLayout, float]:
    """One packed blob per expert, the blobs' layout, and the experts' relative RMS error.

    ``on_progress(done, total)`` after each expert: the slow part of a quantization (hqq iterates per group).
    """
    c = store.config
    layout = expert_layout(c, spec.expert_bits, spec.group)
    blobs: dict[str, np.ndarray] = {}
    errors = _ErrorSum()
    total = c.n_layers * c.n_experts
    for layer in range(c.n_layers):
        for e in range(c.n_experts):
            mats = [store.read_tensor(expert_tensor_name(layer, e, p)).astype(F32) for p in EXPERT_PARTS]
            q = [quantize_matrix(m, spec.expert_bits, spec.group, spec.method) for m in mats]
            blobs[expert_blob_name(layer, e)] = layout.pack(q)
            for m, qq in zip(mats, q):
                errors.add(m, dequantize_matrix(*qq, spec.group))
            if on_progress is not None:
                on_progress(layer * c.n_experts + e + 1, total)
    return blobs, layout, errors.relative_rms


def _write_model_files(tmp: Path, src: Path, c: ModelConfig, spec: QuantSpec, tensors: dict[str, np.ndarray]) -> None:
    """The weights file (the setting recorded in its metadata), config.json with the same entry, tokenizer, held-out text.

    The setting is written twice from one value: ``moerun.files.packed.recorded_quant_problem`` refuses a model whose two
    copies were edited apart, since the blobs would be decoded with the wrong layout.
    """
    entry = {**spec.to_json(), "source": c.name or src.name}
    meta = {"quant": json.dumps(entry, separators=(",", ":"))}
    if c.extra.get("synthetic"):
        meta["note"] = RANDOM_NOTE
    save_model_file(tmp / "model.safetensors", tensors, meta)
    raw = c.to_json()
    raw["name"] = f"{c.name or src.name}-{setting_tag(spec)}"
    raw["quant"] = entry
    write_text_atomic(tmp / "config.json", json.dumps(raw, indent=2) + "\n")
    for extra in ("tokenizer.json", "heldout.txt"):
        if (src / extra).exists():
            shutil.copyfile(src / extra, tmp / extra)


def quantize_model(
    src,
    out,
    spec: QuantSpec,
    force: bool = False,
    score_tokens: int | None = None,
    score: bool = True,
    on_progress=None,
    command: str | None = None,
) -> QuantReport:
    """Write a quantized copy of the model directory ``src`` to ``out`` (atomically: a temp dir, then rename).

    Dense tensors other than attention (the shared expert's too) keep the source's dtype; attention is
    float16 (attn_bits 16) or packed like the experts.  ``score``: measure the
    held-out perplexity of source and result on the source's heldout.txt
    (its first ``score_tokens`` tokens, if given) for the card.
    ``on_progress(done, total)`` is called after each expert.
    """
    t_start = time.monotonic()
    src = Path(src)
    out = Path(out)
    store = ModelStore.open(src)
    try:
        c = store.config
        if c.extra.get("quant"):
            raise BadOption(f"{src} is already quantized; quantize the float model it was made from")
        # OUT may not be, contain or lie inside the source; it is built beside itself and appears whole
        # (moerun.files.fileio.atomic_dir: without force nothing at OUT is replaced, with force the old model is
        # exchanged for the new one in one step)
        with atomic_dir(out, force=force, protect=[src], what="OUT") as tmp:
            tensors, attn_rel_rms = quantized_dense(store, spec)
            blobs, layout, expert_rel_rms = quantized_experts(store, spec, on_progress)
            tensors.update(blobs)
            del blobs
            _write_model_files(tmp, src, c, spec, tensors)
            del tensors
            report = QuantReport(
                out_dir=str(out),
                spec=spec,
                source_name=c.name or src.name,
                file_bytes=(tmp / "model.safetensors").stat().st_size,
                source_file_bytes=store.header.file_size,
                expert_bytes=layout.nbytes,
                source_expert_bytes=store.expert_nbytes,
                expert_rel_rms=expert_rel_rms,
                attn_rel_rms=attn_rel_rms,
                seconds=0.0,
            )
            if score and (src / "heldout.txt").exists() and (src / "tokenizer.json").exists():
                report.heldout = score_pair(src, tmp, score_tokens)
            report.seconds = time.monotonic() - t_start
            write_text_atomic(tmp / "CARD.md", _card(report, c, src, command))
        return report
    finally:
        store.close()


def score_pair(src: Path, quantized: Path, max_tokens: int | None) -> dict:
    """Held-out perplexity of the source and the quantized model on the same tokens, and the relative change."""
    text = read_text_file(src / "heldout.txt")
    doc = {}
    for key, path in (("source", src), ("quantized", quantized)):
        with load(path) as eng:
            r = score_text(eng, text, max_tokens)
            doc[key] = {"perplexity": r.perplexity, "cross_entropy_nats": r.cross_entropy, "tok_s": r.tok_s}
            doc["predicted_tokens"] = r.predicted
    doc["relative_change"] = doc["quantized"]["perplexity"] / doc["source"]["perplexity"] - 1
    return doc


def _card(report: QuantReport, c: ModelConfig, src: Path, command: str | None) -> str:
    """The card, with when and where this run happened (the figures on it are this machine's)."""
    when = datetime.datetime.now().astimezone().strftime("%Y-%m-%d %H:%M %Z")
    machine = f"{platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, numpy {np.__version__}"
    return card_text(report, c, src, command, when, machine, __version__)
