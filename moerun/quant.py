"""Group-wise low-bit quantization of expert (and attention) matrices, and the codec that decodes them.

A matrix ``W`` of shape (in, out) is cut along its input axis into groups of
``group`` consecutive rows (the last group may be shorter); every column of
every group has its own float16 scale ``s`` and zero point ``z``, and every
weight becomes a code ``q`` in ``0 .. 2**bits - 1``::

    q = clip(round(W / s + z), 0, 2**bits - 1)        (quantize)
    w = (float32(q) - float32(z)) * float32(s)        (dequantize, float32)

Two ways to choose ``s`` and ``z`` (docs/quant.md has the derivations):

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

Codes are packed densely and *planar* (see ``pack_codes``), so unpacking is a
handful of whole-array shifts and masks.  One expert is ONE uint8 blob
(``layers.{l}.experts.{e}.packed``) holding the codes of w_gate, w_up and
w_down as one stream, then the float16 scales and zero points; ``BlobLayout``
describes the bytes and docs/quant.md draws them.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from .codec import Codec, Part
from .config import ModelConfig
from .errors import BadModelFile, BadOption

FORMAT = "moerun-packed/1"
EXPERT_BITS = (8, 4, 3, 2)
ATTN_BITS = (16, 8, 4)
METHODS = ("rtn", "hqq")
EXPERT_PARTS = ("w_gate", "w_up", "w_down")
ATTN_PARTS = ("wq", "wk", "wv", "wo")
PARAMS_DTYPE = "F16"
ALIGN = 16  # the parameter section of a blob starts on a 16-byte boundary
MAX_GROUP = 1 << 16

# hqq settings (fixed; recorded in config.json): lp "norm" exponent, initial
# penalty weight beta (in units of quantization steps), its growth per
# iteration, and the number of iterations.
HQQ_P = 0.7
HQQ_BETA = 10.0
HQQ_KAPPA = 1.01
HQQ_ITERS = 20
# hqq keeps an iterate only if it lowers a group's lp error by more than this
# relative margin, so float summation order can never flip the comparison.
HQQ_MARGIN = 1e-9

F32 = np.float32
F16 = np.dtype("<f2")


# ---------------------------------------------------------------------------- the config entry


@dataclass(frozen=True)
class QuantSpec:
    """The ``quant`` entry of a quantized model's config.json."""

    expert_bits: int
    attn_bits: int = 16
    group: int = 64
    method: str = "rtn"
    hqq: dict = field(default_factory=lambda: {"p": HQQ_P, "beta": HQQ_BETA, "kappa": HQQ_KAPPA, "iters": HQQ_ITERS})

    def to_json(self) -> dict:
        doc = {
            "format": FORMAT,
            "method": self.method,
            "expert_bits": self.expert_bits,
            "attn_bits": self.attn_bits,
            "group": self.group,
            "group_axis": "input",
            "params_dtype": PARAMS_DTYPE,
        }
        if self.method == "hqq":
            doc["hqq"] = dict(self.hqq)
        return doc

    @classmethod
    def checked(cls, expert_bits, attn_bits, group, method, error=BadOption, where: str = "") -> QuantSpec:
        """Validate the four settings; raise ``error`` with a one-line message naming the bad one."""

        def bad(what: str, got) -> None:
            raise error(f"{where}{what}, got {got!r}")

        if isinstance(expert_bits, bool) or not isinstance(expert_bits, int) or expert_bits not in EXPERT_BITS:
            bad("expert bits must be 8, 4, 3 or 2", expert_bits)
        if isinstance(attn_bits, bool) or not isinstance(attn_bits, int) or attn_bits not in ATTN_BITS:
            bad("attention bits must be 16 (float16), 8 or 4", attn_bits)
        if isinstance(group, bool) or not isinstance(group, int) or not 1 <= group <= MAX_GROUP:
            bad(f"the group size must be a whole number from 1 to {MAX_GROUP}", group)
        if method not in METHODS:
            bad("the method must be rtn or hqq", method)
        return cls(int(expert_bits), int(attn_bits), int(group), str(method))

    @classmethod
    def from_config(cls, config: ModelConfig) -> QuantSpec:
        raw = config.extra.get("quant")
        where = "config.json: quant entry: "
        if not isinstance(raw, dict):
            raise BadModelFile(f"{where}expected a JSON object, got {type(raw).__name__}")
        if raw.get("format") != FORMAT:
            raise BadModelFile(f"{where}unknown format {raw.get('format')!r} (this moerun reads {FORMAT!r})")
        if raw.get("params_dtype", PARAMS_DTYPE) != PARAMS_DTYPE:
            raise BadModelFile(f"{where}params_dtype must be {PARAMS_DTYPE!r}, got {raw.get('params_dtype')!r}")
        if raw.get("group_axis", "input") != "input":
            raise BadModelFile(f"{where}group_axis must be 'input', got {raw.get('group_axis')!r}")
        return cls.checked(
            raw.get("expert_bits"), raw.get("attn_bits", 16), raw.get("group"), raw.get("method", "rtn"), BadModelFile, where
        )


_RECORDED_KEYS = ("format", "method", "expert_bits", "attn_bits", "group", "group_axis", "params_dtype", "hqq")


def recorded_quant_problem(config: ModelConfig, metadata: dict) -> str | None:
    """Where config.json's quant entry disagrees with the one ``moerun quantize`` recorded in the weights file.

    ``metadata``: the file's ``__metadata__``.  Both are written from one setting; an edit to either (a
    group size changed by hand) makes the engine decode the blobs with the wrong layout.  None when they
    agree, or when neither says anything.
    """
    import json

    cfg = config.extra.get("quant")
    raw = metadata.get("quant")
    if raw is None:
        return None  # a file without the record: nothing to compare (like a file without digests)
    try:
        rec = json.loads(raw)
    except (ValueError, RecursionError):
        return "the weights file's 'quant' metadata is not JSON"
    if not isinstance(rec, dict):
        return "the weights file's 'quant' metadata is not a JSON object"
    if cfg is None:
        return f"the weights file records {rec.get('expert_bits')}-bit quantization but config.json has no quant entry"
    if not isinstance(cfg, dict):
        return None  # reported by QuantSpec.from_config
    for key in _RECORDED_KEYS:
        if cfg.get(key) != rec.get(key):
            return (f"config.json says {key} {cfg.get(key)!r} but the weights file was quantized with "
                    f"{key} {rec.get(key)!r}; they must agree")
    return None


def codec_from_config(config: ModelConfig) -> QuantCodec:
    """The codec of a model whose config.json has a ``quant`` entry (validated here)."""
    return QuantCodec(config, QuantSpec.from_config(config))


def packed_dense_names(config: ModelConfig) -> dict[str, str]:
    """Dense tensors a quantized file stores as packed blobs: ``{dense name: blob tensor name}``."""
    spec = QuantSpec.from_config(config)
    if spec.attn_bits == 16:
        return {}
    return {f"layers.{layer}.attn.{p}": f"layers.{layer}.attn.{p}.packed" for layer in range(config.n_layers) for p in ATTN_PARTS}


def expert_blob_name(layer: int, expert: int) -> str:
    return f"layers.{layer}.experts.{expert}.packed"


# ---------------------------------------------------------------------------- packing


def _ceil(a: int, b: int) -> int:
    return -(-a // b)


def packed_nbytes(n: int, bits: int) -> int:
    """Bytes that ``n`` codes of ``bits`` bits take when packed."""
    if bits == 8:
        return n
    if bits == 4:
        return _ceil(n, 2)
    if bits == 2:
        return _ceil(n, 4)
    if bits == 3:
        return _ceil(n, 4) + _ceil(n, 8)
    raise ValueError(f"cannot pack {bits}-bit codes")


def unpacked_len(n: int, bits: int) -> int:
    """Length of the uint8 buffer ``unpack_into`` writes (``n`` rounded up to whole bytes' worth)."""
    if bits == 8:
        return n
    if bits == 4:
        return 2 * _ceil(n, 2)
    return 4 * _ceil(n, 4)  # bits 2 and 3


def _planes(codes: np.ndarray, per_byte: int) -> np.ndarray:
    m = _ceil(codes.size, per_byte)
    padded = np.zeros(per_byte * m, np.uint8)
    padded[: codes.size] = codes
    return padded.reshape(per_byte, m)


def _pack_planar(codes: np.ndarray, width: int) -> np.ndarray:
    per = 8 // width
    planes = _planes(codes, per)
    out = np.zeros(planes.shape[1], np.uint8)
    for k in range(per):
        out |= planes[k] << (width * k)
    return out


def pack_codes(codes: np.ndarray, bits: int) -> np.ndarray:
    """Pack a stream of codes (< 2**bits) into bytes, planar.

    With ``k = 8 // width`` codes per byte and ``m = ceil(n / k)`` bytes, byte
    ``j`` holds codes ``j, j + m, j + 2m, ...`` in its bit fields from the
    least significant up (the stream is padded with zero codes to ``k * m``).
    8 bits: one code per byte.  4 bits: two planes.  2 bits: four planes.
    3 bits: the low two bits of every code as a 2-bit stream, followed by the
    high bit of every code as a 1-bit stream (eight planes).
    """
    c = np.ascontiguousarray(codes, np.uint8).reshape(-1)
    if c.size and int(c.max()) >= 1 << bits:
        raise ValueError(f"a code does not fit in {bits} bits")
    if bits == 8:
        return c.copy()
    if bits in (4, 2):
        return _pack_planar(c, bits)
    if bits == 3:
        return np.concatenate([_pack_planar(c & 3, 2), _pack_planar(c >> 2, 1)])
    raise ValueError(f"cannot pack {bits}-bit codes")


_SHIFT2 = np.array([0, 2, 4, 6], np.uint8)[:, None]
_MUL1_UP = np.array([4, 2, 1], np.uint8)[:, None]  # bit k of a byte moved up to bit 2, k = 0..2 (multiply: numpy's uint8 left shift is slow)
_SHIFT1_DOWN = np.array([1, 2, 3, 4, 5], np.uint8)[:, None]  # k = 3..7


def unpack_into(packed: np.ndarray, bits: int, n: int, out: np.ndarray, tmp: np.ndarray | None = None) -> None:
    """Unpack ``n`` codes into ``out[:n]`` (uint8, length >= unpacked_len) with whole-array ops.

    3 bits needs ``tmp`` (uint8, length >= 8 * ceil(n / 8)).  Allocates nothing.
    """
    if bits == 8:
        np.copyto(out[:n], packed[:n])
    elif bits == 4:
        h = _ceil(n, 2)
        np.bitwise_and(packed[:h], 15, out=out[:h])
        np.right_shift(packed[:h], 4, out=out[h : 2 * h])
    elif bits in (2, 3):
        m = _ceil(n, 4)
        planes = out[: 4 * m].reshape(4, m)
        np.right_shift(packed[None, :m], _SHIFT2, out=planes)
        np.bitwise_and(planes, 3, out=planes)
        if bits == 3:
            m1 = _ceil(n, 8)
            high = packed[None, m : m + m1]
            t = tmp[: 8 * m1]
            t8 = t.reshape(8, m1)
            np.multiply(high, _MUL1_UP, out=t8[:3])
            np.right_shift(high, _SHIFT1_DOWN, out=t8[3:])
            np.bitwise_and(t, 4, out=t)
            np.bitwise_or(out[:n], t[:n], out=out[:n])
    else:
        raise ValueError(f"cannot unpack {bits}-bit codes")


def unpack_codes(packed: np.ndarray, bits: int, n: int) -> np.ndarray:
    """The ``n`` codes of a packed stream, as a new uint8 array."""
    packed = np.ascontiguousarray(packed, np.uint8).reshape(-1)
    if packed.size != packed_nbytes(n, bits):
        raise ValueError(f"{packed.size} bytes cannot hold exactly {n} {bits}-bit codes")
    out = np.empty(unpacked_len(n, bits), np.uint8)
    tmp = np.empty(8 * _ceil(n, 8), np.uint8) if bits == 3 else None
    unpack_into(packed, bits, n, out, tmp)
    return out[:n].copy()


# ---------------------------------------------------------------------------- choosing scales and zeros


def _groups(rows: int, group: int) -> list[tuple[int, int, int]]:
    """Row blocks of a matrix as (first row, number of groups, rows per group): full groups, then a short tail."""
    full = rows // group
    out = []
    if full:
        out.append((0, full, group))
    if rows % group:
        out.append((full * group, 1, rows % group))
    return out


def n_groups(rows: int, group: int) -> int:
    return _ceil(rows, group)


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


def quantize_groups(x: np.ndarray, s16: np.ndarray, z16: np.ndarray, bits: int) -> np.ndarray:
    """Codes (float32 values, integral) for groups x [N, rows, O] with scale/zero [N, O]."""
    s = s16.astype(F32)[:, None, :]
    z = z16.astype(F32)[:, None, :]
    return np.clip(np.rint(x / s + z), 0, (1 << bits) - 1)


def dequantize_groups(q: np.ndarray, s16: np.ndarray, z16: np.ndarray) -> np.ndarray:
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
    best_err = lp_error(x, dequantize_groups(quantize_groups(x, s16, best, bits), s16, best), p)
    z = z16.astype(F32)[:, None, :]
    for _ in range(iters):
        q = np.clip(np.rint(xs + z), 0, qmax)
        e = _shrink(xs - (q - z), beta, p)
        z = np.mean(q - xs + e, axis=1, keepdims=True, dtype=F32)
        beta *= kappa
        cand = z[:, 0, :].astype(F16)
        if not np.all(np.isfinite(cand)):
            break
        err = lp_error(x, dequantize_groups(quantize_groups(x, s16, cand, bits), s16, cand), p)
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
    for r0, ng, size in _groups(rows, group):
        x = w[r0 : r0 + ng * size].reshape(ng, size, cols)
        s16, z16 = rtn_params(x, bits)
        if method == "hqq":
            z16 = hqq_zero(x, s16, z16, bits)
        codes[r0 : r0 + ng * size] = quantize_groups(x, s16, z16, bits).astype(np.uint8).reshape(ng * size, cols)
        scale[g0 : g0 + ng] = s16
        zero[g0 : g0 + ng] = z16
        g0 += ng
    return codes, scale, zero


def dequantize_matrix(codes: np.ndarray, scale: np.ndarray, zero: np.ndarray, group: int) -> np.ndarray:
    """The float32 (in, out) matrix that codes, scales and zeros stand for (the reference formula)."""
    rows, cols = codes.shape
    out = np.empty((rows, cols), F32)
    g0 = 0
    for r0, ng, size in _groups(rows, group):
        q = codes[r0 : r0 + ng * size].reshape(ng, size, cols)
        out[r0 : r0 + ng * size] = dequantize_groups(q, scale[g0 : g0 + ng], zero[g0 : g0 + ng]).reshape(ng * size, cols)
        g0 += ng
    return out


# ---------------------------------------------------------------------------- blob layout


@dataclass(frozen=True)
class BlobLayout:
    """Byte layout of one packed blob holding one or more (in, out) matrices.

    ``[codes of every matrix, row-major, one stream, packed] [zero padding to
    a multiple of 16] [float16 scales of every matrix] [float16 zeros of
    every matrix]``.  Scales (and zeros) of a matrix are its [groups, out]
    array, row-major; the matrices follow each other in the order given.
    """

    shapes: tuple[tuple[int, int], ...]
    bits: int
    group: int

    @property
    def n_codes(self) -> int:
        return sum(r * c for r, c in self.shapes)

    @property
    def codes_nbytes(self) -> int:
        return packed_nbytes(self.n_codes, self.bits)

    @property
    def params_offset(self) -> int:
        return _ceil(self.codes_nbytes, ALIGN) * ALIGN

    @property
    def n_params(self) -> int:
        """Scales (= zeros) in the blob: sum of groups x out over the matrices."""
        return sum(n_groups(r, self.group) * c for r, c in self.shapes)

    @property
    def nbytes(self) -> int:
        return self.params_offset + 2 * 2 * self.n_params

    def code_offsets(self) -> list[int]:
        offs, o = [], 0
        for r, c in self.shapes:
            offs.append(o)
            o += r * c
        return offs

    def param_offsets(self) -> list[int]:
        offs, o = [], 0
        for r, c in self.shapes:
            offs.append(o)
            o += n_groups(r, self.group) * c
        return offs

    def pack(self, quantized: Sequence[tuple[np.ndarray, np.ndarray, np.ndarray]]) -> np.ndarray:
        """One uint8 blob from [(codes, scale, zero)] per matrix (from quantize_matrix)."""
        if len(quantized) != len(self.shapes):
            raise ValueError("one (codes, scale, zero) per matrix")
        blob = np.zeros(self.nbytes, np.uint8)
        stream = np.concatenate([np.asarray(q, np.uint8).reshape(-1) for q, _, _ in quantized])
        blob[: self.codes_nbytes] = pack_codes(stream, self.bits)
        params = blob[self.params_offset :].view(F16).reshape(2, self.n_params)
        for (q, s, z), off, (r, c) in zip(quantized, self.param_offsets(), self.shapes):
            if q.shape != (r, c) or s.shape != (n_groups(r, self.group), c) or z.shape != s.shape:
                raise ValueError("quantized matrix does not match the layout")
            params[0, off : off + s.size] = s.reshape(-1)
            params[1, off : off + z.size] = z.reshape(-1)
        return blob

    def unpack(self, blob: np.ndarray) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
        """Inverse of ``pack`` (a reference path for tests and tools, not the hot path)."""
        blob = np.ascontiguousarray(blob, np.uint8).reshape(-1)
        if blob.size != self.nbytes:
            raise ValueError(f"blob holds {blob.size} bytes, layout needs {self.nbytes}")
        stream = unpack_codes(blob[: self.codes_nbytes], self.bits, self.n_codes)
        params = blob[self.params_offset :].view(F16).reshape(2, self.n_params)
        out = []
        for (r, c), co, po in zip(self.shapes, self.code_offsets(), self.param_offsets()):
            g = n_groups(r, self.group)
            out.append(
                (
                    stream[co : co + r * c].reshape(r, c),
                    params[0, po : po + g * c].reshape(g, c).copy(),
                    params[1, po : po + g * c].reshape(g, c).copy(),
                )
            )
        return out


def expert_layout(config: ModelConfig, bits: int, group: int) -> BlobLayout:
    shapes = config.expert_shapes()
    return BlobLayout(tuple(tuple(shapes[p]) for p in EXPERT_PARTS), bits, group)


def quantize_blob(mats: Sequence[np.ndarray], bits: int, group: int, method: str) -> tuple[BlobLayout, np.ndarray, list]:
    """Quantize matrices into one blob; also return the per-matrix (codes, scale, zero)."""
    layout = BlobLayout(tuple(tuple(m.shape) for m in mats), bits, group)
    q = [quantize_matrix(m, bits, group, method) for m in mats]
    return layout, layout.pack(q), q


# ---------------------------------------------------------------------------- decoding (the hot path)


class Dequantizer:
    """Decodes blobs of one layout into float32 matrices held in preallocated scratch.

    ``bind(blob)`` (once per pool slot) makes the views of that blob;
    ``decode(bound)`` writes every matrix into the scratch and returns the
    scratch matrices.  Decoding is: unpack the code stream with a few
    whole-array shifts and masks (nothing for 8 bits, which reads the codes
    straight from the blob), widen the float16 scales and zeros in one copy,
    then one subtract and one multiply per run of same-shaped matrices
    (w_gate and w_up together), broadcasting a group's parameters over its rows.
    """

    def __init__(self, layout: BlobLayout):
        self.layout = layout
        n = layout.n_codes
        bits = layout.bits
        self._codes = None if bits == 8 else np.empty(unpacked_len(n, bits), np.uint8)
        self._tmp = np.empty(8 * _ceil(n, 8), np.uint8) if bits == 3 else None
        self._float = np.empty(n, F32)
        self._params = np.empty((2, layout.n_params), F32)
        self.matrices = tuple(
            self._float[o : o + r * c].reshape(r, c) for (r, c), o in zip(layout.shapes, layout.code_offsets())
        )
        self._runs = self._plan()

    def _plan(self) -> list[tuple[int, int, int, int, int]]:
        """Runs of whole-group blocks as (code offset, param offset, groups, rows per group, out)."""
        lay = self.layout
        runs: list[list[int]] = []
        for (r, c), co, po in zip(lay.shapes, lay.code_offsets(), lay.param_offsets()):
            for r0, ng, size in _groups(r, lay.group):
                cstart, pstart = co + r0 * c, po + (r0 // lay.group) * c
                last = runs[-1] if runs else None
                if last and last[3] == size and last[4] == c and last[0] + last[2] * size * c == cstart and last[1] + last[2] * c == pstart:
                    last[2] += ng
                else:
                    runs.append([cstart, pstart, ng, size, c])
        return [tuple(r) for r in runs]

    @property
    def scratch_bytes(self) -> int:
        n = self._float.nbytes + self._params.nbytes
        n += 0 if self._codes is None else self._codes.nbytes
        n += 0 if self._tmp is None else self._tmp.nbytes
        return n

    def bind(self, blob: np.ndarray):
        lay = self.layout
        packed = blob[: lay.codes_nbytes]
        params = np.ndarray((2, lay.n_params), dtype=F16, buffer=blob.data, offset=lay.params_offset)
        codes = packed if self._codes is None else self._codes
        ops = []
        for co, po, ng, size, c in self._runs:
            n = ng * size * c
            ops.append(
                (
                    codes[co : co + n].reshape(ng, size, c),
                    self._float[co : co + n].reshape(ng, size, c),
                    self._params[0, po : po + ng * c].reshape(ng, 1, c),
                    self._params[1, po : po + ng * c].reshape(ng, 1, c),
                )
            )
        return packed, params, ops

    def decode(self, bound) -> tuple[np.ndarray, ...]:
        packed, params, ops = bound
        if self._codes is not None:
            unpack_into(packed, self.layout.bits, self.layout.n_codes, self._codes, self._tmp)
        np.copyto(self._params, params)
        for q, w, s, z in ops:
            np.subtract(q, z, out=w)
            np.multiply(w, s, out=w)
        return self.matrices


class QuantCodec(Codec):
    """Experts stored as one packed blob each (``layers.{l}.experts.{e}.packed``, U8)."""

    def __init__(self, config: ModelConfig, spec: QuantSpec, offsets: dict[str, int] | None = None):
        self.config = config
        self.spec = spec
        self.layout = expert_layout(config, spec.expert_bits, spec.group)
        self.name = f"{spec.expert_bits}-bit {spec.method}, group {spec.group}"
        self.parts = (Part("packed", "U8", (self.layout.nbytes,), (offsets or {}).get("packed", 0)),)
        self._deq = Dequantizer(self.layout)

    def with_offsets(self, offsets: dict[str, int]) -> QuantCodec:
        return QuantCodec(self.config, self.spec, offsets)

    def bind(self, slot: np.ndarray):
        p = self.parts[0]
        return self._deq.bind(slot[p.offset : p.offset + p.nbytes])

    def weights(self, bound):
        return self._deq.decode(bound)

    def scratch_bytes(self) -> int:
        return self._deq.scratch_bytes


# ---------------------------------------------------------------------------- dense (attention) blobs


def read_packed_dense(store, name: str, blob_name: str) -> np.ndarray:
    """Read and decode a packed attention matrix at load time (a float32 copy); BadModelFile if it does not fit."""
    spec = QuantSpec.from_config(store.config)
    shape = store.config.dense_shapes()[name]
    layout = BlobLayout((tuple(shape),), spec.attn_bits, spec.group)
    t = store.header.tensors.get(blob_name)
    if t is None:
        raise BadModelFile(f"{store.path}: missing tensor {blob_name!r} ({spec.attn_bits}-bit attention per config.json)")
    if t.dtype != "U8" or t.shape != (layout.nbytes,):
        raise BadModelFile(
            f"{store.path}: tensor {blob_name!r} is {t.dtype} {list(t.shape)}, but {spec.attn_bits}-bit {list(shape)} "
            f"with group {spec.group} needs U8 [{layout.nbytes}] (layout in docs/quant.md)"
        )
    blob = np.frombuffer(store._read(t.start, t.nbytes), np.uint8)
    deq = Dequantizer(layout)
    return deq.decode(deq.bind(blob))[0].copy()


# ---------------------------------------------------------------------------- building a quantized model directory


@dataclass
class QuantReport:
    """What ``quantize_model`` made and measured."""

    out_dir: str
    spec: QuantSpec
    source_name: str
    file_bytes: int
    source_file_bytes: int
    expert_bytes: int
    source_expert_bytes: int
    expert_rel_rms: float  # ||W - w|| / ||W|| over all experts
    attn_rel_rms: float  # the same for attention (float16 rounding when attn_bits is 16)
    seconds: float
    heldout: dict | None = None  # perplexities measured in the same run

    def to_json(self) -> dict:
        return {
            "out_dir": self.out_dir,
            "quant": self.spec.to_json(),
            "source": self.source_name,
            "file_bytes": self.file_bytes,
            "source_file_bytes": self.source_file_bytes,
            "expert_bytes": self.expert_bytes,
            "source_expert_bytes": self.source_expert_bytes,
            "expert_rel_rms_error": self.expert_rel_rms,
            "attn_rel_rms_error": self.attn_rel_rms,
            "seconds": self.seconds,
            "heldout": self.heldout,
        }


def setting_tag(spec: QuantSpec) -> str:
    return f"e{spec.expert_bits}-a{spec.attn_bits}-{spec.method}-g{spec.group}"


def bench_rows_path():
    """The last results of scripts/bench_quant.py, shipped inside the package (moerun/data/quant_bench.json)."""
    from importlib.resources import files

    return files("moerun") / "data" / "quant_bench.json"


def _bench_row(source_name: str, spec: QuantSpec) -> tuple[dict, dict] | None:
    """The row of scripts/bench_quant.py's last run for this setting, if the package carries its results."""
    import json

    path = bench_rows_path()
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
        for row in doc.get("rows", []):
            if (
                row.get("model") == source_name
                and row.get("expert_bits") == spec.expert_bits
                and row.get("attn_bits") == spec.attn_bits
                and row.get("method") == spec.method
                and row.get("group") == spec.group
            ):
                return doc, row
    except (OSError, ValueError, AttributeError):
        return None
    return None


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
    import datetime
    import json
    import os
    import platform
    import shutil
    import time
    from pathlib import Path

    from . import __version__
    from .config import expert_tensor_name
    from .fileio import atomic_dir, write_text_atomic
    from .modelfile import save_model_file
    from .store import ModelStore

    t_start = time.monotonic()
    src = Path(src)
    out = Path(out)
    store = ModelStore.open(src)
    try:
        c = store.config
        if c.extra.get("quant"):
            raise BadOption(f"{src} is already quantized; quantize the float model it was made from")
        # OUT may not be, contain or lie inside the source; it is built beside itself and appears whole
        # (moerun.fileio.atomic_dir: without force nothing at OUT is replaced, with force the old model is
        # exchanged for the new one in one step)
        with atomic_dir(out, force=force, protect=[src], what="OUT") as tmp:
            tensors: dict[str, np.ndarray] = {}
            attn_names = {f"layers.{layer}.attn.{p}" for layer in range(c.n_layers) for p in ATTN_PARTS}
            attn_err = [0.0, 0.0]
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
                    layout, blob, q = quantize_blob([w], spec.attn_bits, spec.group, spec.method)
                    tensors[name + ".packed"] = blob
                    approx = dequantize_matrix(*q[0], spec.group)
                attn_err[0] += float(np.sum((w.astype(np.float64) - approx) ** 2))
                attn_err[1] += float(np.sum(w.astype(np.float64) ** 2))
            total = c.n_layers * c.n_experts
            err = [0.0, 0.0]
            layout = expert_layout(c, spec.expert_bits, spec.group)
            for layer in range(c.n_layers):
                for e in range(c.n_experts):
                    mats = [store.read_tensor(expert_tensor_name(layer, e, p)).astype(F32) for p in EXPERT_PARTS]
                    q = [quantize_matrix(m, spec.expert_bits, spec.group, spec.method) for m in mats]
                    tensors[expert_blob_name(layer, e)] = layout.pack(q)
                    for m, qq in zip(mats, q):
                        d = dequantize_matrix(*qq, spec.group)
                        err[0] += float(np.sum((m.astype(np.float64) - d) ** 2))
                        err[1] += float(np.sum(m.astype(np.float64) ** 2))
                    if on_progress is not None:
                        on_progress(layer * c.n_experts + e + 1, total)
            tag = setting_tag(spec)
            entry = {**spec.to_json(), "source": c.name or src.name}
            meta = {"quant": json.dumps(entry, separators=(",", ":"))}
            if c.extra.get("synthetic"):
                meta["note"] = "random weights: routing is meaningless"
            save_model_file(tmp / "model.safetensors", tensors, meta)
            del tensors
            raw = c.to_json()
            raw["name"] = f"{c.name or src.name}-{tag}"
            raw["quant"] = entry
            write_text_atomic(tmp / "config.json", json.dumps(raw, indent=2) + "\n")
            for extra in ("tokenizer.json", "heldout.txt"):
                if (src / extra).exists():
                    shutil.copyfile(src / extra, tmp / extra)
            report = QuantReport(
                out_dir=str(out),
                spec=spec,
                source_name=c.name or src.name,
                file_bytes=(tmp / "model.safetensors").stat().st_size,
                source_file_bytes=store.header.file_size,
                expert_bytes=layout.nbytes,
                source_expert_bytes=store.expert_nbytes,
                expert_rel_rms=math.sqrt(err[0] / err[1]) if err[1] else 0.0,
                attn_rel_rms=math.sqrt(attn_err[0] / attn_err[1]) if attn_err[1] else 0.0,
                seconds=0.0,
            )
            if score and (src / "heldout.txt").exists() and (src / "tokenizer.json").exists():
                report.heldout = _score_pair(src, tmp, score_tokens)
            report.seconds = time.monotonic() - t_start
            when = datetime.datetime.now().astimezone().strftime("%Y-%m-%d %H:%M %Z")
            machine = f"{platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, numpy {np.__version__}"
            card = _card(report, c, src, command, when, machine, __version__)
            write_text_atomic(tmp / "CARD.md", card)
        return report
    finally:
        store.close()


def _score_pair(src, quantized, max_tokens: int | None) -> dict:
    from .engine import load
    from .score import score_text
    from .tokenizer import read_text_file

    text = read_text_file(src / "heldout.txt")
    doc = {}
    for key, path in (("source", src), ("quantized", quantized)):
        with load(path) as eng:
            r = score_text(eng, text, max_tokens)
            doc[key] = {"perplexity": r.perplexity, "cross_entropy_nats": r.cross_entropy, "tok_s": r.tok_s}
            doc["predicted_tokens"] = r.predicted
    doc["relative_change"] = doc["quantized"]["perplexity"] / doc["source"]["perplexity"] - 1
    return doc


def _card(r: QuantReport, c: ModelConfig, src, command: str | None, when: str, machine: str, version: str) -> str:
    s = r.spec
    name = c.name or src.name
    cmd = command or (
        f"moerun quantize --model {src} {r.out_dir} --expert-bits {s.expert_bits} "
        f"--attn-bits {s.attn_bits} --group {s.group} --method {s.method}"
    )
    if s.method == "rtn":
        method = "Scales and zeros come from round-to-nearest over each group's range widened to include zero (rtn)."
    else:
        method = (
            "Scales come from round-to-nearest over each group's range widened to include zero; zero points are then "
            f"refined by half-quadratic quantization (Badri and Shaji, 2023) for the lp error with p = {s.hqq['p']}, "
            f"beta = {s.hqq['beta']} (in quantization steps), kappa = {s.hqq['kappa']}, {s.hqq['iters']} iterations, "
            "keeping per group whichever zero point (the rtn start or an iterate) has the smallest lp error."
        )
    attn = (
        "Attention matrices are stored as float16."
        if s.attn_bits == 16
        else f"Attention matrices are quantized the same way to {s.attn_bits} bits and dequantized once at load."
    ) + " Either way the engine holds attention as float32 in memory: this choice changes the file, not the memory use."
    lines = [
        f"# {name}, quantized: {s.expert_bits}-bit experts ({s.method}), "
        + ("float16 attention" if s.attn_bits == 16 else f"{s.attn_bits}-bit attention"),
        "",
        f"Made from `{src}` ({name}) by moerun {version} on {when} ({machine}), in {r.seconds:.1f} s:",
        "",
        f"    {cmd}",
        "",
        "## How",
        "",
        f"Every expert matrix (w_gate, w_up, w_down, shapes (in, out)) is cut along its input axis into groups of "
        f"{s.group} rows; each column of each group has a float16 scale s and zero point z, and each weight becomes a "
        f"{s.expert_bits}-bit code q = clip(round(W/s + z), 0, {(1 << s.expert_bits) - 1}); the engine computes "
        "w = (q - z) * s in float32 when it needs the expert.",
        "",
        method,
        "",
        attn,
        "",
        ("Embeddings, norms, routers and the shared expert (dense, always resident)" if c.d_shared else "Embeddings, norms and routers")
        + " keep the source's dtype. Each expert is one uint8 tensor "
        "`layers.{l}.experts.{e}.packed`; the byte layout is in docs/quant.md of moerun.",
        "",
        "## Measured while quantizing",
        "",
        "| quantity | value |",
        "| --- | --- |",
        f"| model.safetensors | {r.file_bytes:,} B (source {r.source_file_bytes:,} B, {100 * r.file_bytes / r.source_file_bytes:.1f} %) |",
        f"| one expert | {r.expert_bytes:,} B (source {r.source_expert_bytes:,} B, {100 * r.expert_bytes / r.source_expert_bytes:.1f} %) |",
        f"| expert weights, relative RMS error ‖W − w‖/‖W‖ | {100 * r.expert_rel_rms:.3f} % |",
        f"| attention weights, relative RMS error | {100 * r.attn_rel_rms:.3f} % |",
    ]
    h = r.heldout
    if h:
        lines += [
            f"| held-out perplexity, source (heldout.txt, {h['predicted_tokens']:,} tokens) | {h['source']['perplexity']:.4f} |",
            f"| held-out perplexity, this model (same tokens) | {h['quantized']['perplexity']:.4f} "
            f"({100 * h['relative_change']:+.2f} %) |",
            "",
            "Scoring rule (`moerun score`): windows of the bos token plus the next max_seq_len - 1 tokens; every token "
            "of the text is predicted once; perplexity = exp(mean cross-entropy). The source's own card may use another "
            "rule (`moerun score --plain-windows` scores windows without an inserted bos).",
        ]
    found = _bench_row(r.source_name, s)
    if found is not None:
        doc, row = found
        link = doc.get("link_speed_emulated")
        fp32_ppl = doc.get("fp32", {}).get("perplexity")
        lines += [
            "",
            "## From the quantization benchmark (not measured in this run)",
            "",
            f"scripts/bench_quant.py, {doc.get('date', '?')} on {doc.get('machine', '?')}; BLAS {doc.get('blas_threads', '?')}. "
            "Cap: the model's fixed parts plus one third of the float32 model's expert bytes (see docs/quant.md).",
            "",
            "| file | bytes/expert | held-out ppl (fp32) | cap | decode tok/s at cap |"
            + (f" same, {link / 1e9:g} GB/s link (emulated) |" if link else ""),
            "| --- | --- | --- | --- | --- |" + (" --- |" if link else ""),
            f"| {row['file_bytes'] / 2**20:.2f} MiB | {row['expert_bytes']:,} | {row['perplexity']:.4f}"
            + (f" ({fp32_ppl:.4f})" if fp32_ppl else "")
            + f" | {row['cap_bytes'] / 2**20:.2f} MiB | {row['decode_tok_s']:.0f} |"
            + (f" {row['decode_tok_s_link']:.0f} |" if link and "decode_tok_s_link" in row else (" - |" if link else "")),
        ]
    lines.append("")
    return "\n".join(lines)
