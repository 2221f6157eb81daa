"""The packed low-bit format of a quantized model, and its decoder: what the engine needs at run time.

A quantized model's config.json carries a ``quant`` entry (``QuantSpec``) and
its weights file stores every expert as ONE uint8 blob
(``layers.{l}.experts.{e}.packed``) holding the codes of w_gate, w_up and
w_down as one stream, then the float16 scales and zero points;
``BlobLayout`` describes the bytes and docs/design/quant.md draws them.  A matrix
``W`` of shape (in, out) is cut along its input axis into groups of ``group``
consecutive rows (the last group may be shorter); every column of every group
has its own float16 scale ``s`` and zero point ``z``, and the engine computes

    w = (float32(q) - float32(z)) * float32(s)        (dequantize, float32)

from the codes ``q``.  ``Dequantizer`` does that into scratch allocated once.
Making such a model (choosing ``s`` and ``z``, writing the directory) is the
offline tool's business (``moerun.makers.quantize``); nothing here imports it.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace

import numpy as np

from moerun.errors import BadModelFile, BadOption
from moerun.files.bitpack import ceil_div, pack_codes, packed_nbytes, unpack_codes, unpack_into, unpack_scratch_len, unpacked_len
from moerun.files.config import ModelConfig
from moerun.files.modelfile import Header

FORMAT = "moerun-packed/1"
# A model quantized from an open checkpoint: config.json records the architecture's fields (arch, dense_layers,
# qk_norm, ...) and the weights file holds the tensors they imply (moerun.files.config.ModelConfig.dense_shapes).
# Its own tag, so that a moerun that knows only FORMAT refuses it instead of computing without those parts.
FORMAT_ARCH = "moerun-packed/2"
FORMATS = (FORMAT, FORMAT_ARCH)
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
    format: str = FORMAT  # FORMAT_ARCH for a model with an open checkpoint's architecture fields

    def to_json(self) -> dict:
        doc = {
            "format": self.format,
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
        fmt = raw.get("format")
        if fmt not in FORMATS:
            raise BadModelFile(f"{where}unknown format {fmt!r} (this moerun reads {' and '.join(map(repr, FORMATS))})")
        if fmt == FORMAT and has_arch_fields(config):
            raise BadModelFile(f"{where}format {FORMAT!r} cannot carry the architecture fields config.json has "
                               f"(arch {config.arch!r}...); a model quantized from an open checkpoint says {FORMAT_ARCH!r}")
        if raw.get("params_dtype", PARAMS_DTYPE) != PARAMS_DTYPE:
            raise BadModelFile(f"{where}params_dtype must be {PARAMS_DTYPE!r}, got {raw.get('params_dtype')!r}")
        if raw.get("group_axis", "input") != "input":
            raise BadModelFile(f"{where}group_axis must be 'input', got {raw.get('group_axis')!r}")
        spec = cls.checked(
            raw.get("expert_bits"), raw.get("attn_bits", 16), raw.get("group"), raw.get("method", "rtn"), BadModelFile, where
        )
        return replace(spec, format=fmt)

    def for_config(self, config: ModelConfig) -> QuantSpec:
        """This setting with the format tag a quantized copy of a model of ``config`` records."""
        return replace(self, format=FORMAT_ARCH if has_arch_fields(config) else FORMAT)


def has_arch_fields(config: ModelConfig) -> bool:
    """Whether ``config`` has any of an open checkpoint's architecture fields (then it is written as FORMAT_ARCH)."""
    return bool(config.arch or config.dense_layers or config.qk_norm != "none" or config.qkv_bias
                or config.clip_qkv is not None or config.shared_gate or config.eos_token_ids)


_RECORDED_KEYS = ("format", "method", "expert_bits", "attn_bits", "group", "group_axis", "params_dtype", "hqq")


def recorded_quant_problem(config: ModelConfig, metadata: dict) -> str | None:
    """Where config.json's quant entry disagrees with the one ``moerun quantize`` recorded in the weights file.

    ``metadata``: the file's ``__metadata__``.  Both are written from one setting; an edit to either (a
    group size changed by hand) makes the engine decode the blobs with the wrong layout.  None when they
    agree, or when neither says anything.
    """
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


def packed_dense_names(config: ModelConfig) -> dict[str, str]:
    """Dense tensors a quantized file stores as packed blobs: ``{dense name: blob tensor name}``."""
    spec = QuantSpec.from_config(config)
    if spec.attn_bits == 16:
        return {}
    return {f"layers.{b}.attn.{p}": f"layers.{b}.attn.{p}.packed" for b in range(config.n_blocks) for p in ATTN_PARTS}


def expert_blob_name(layer: int, expert: int) -> str:
    """The one tensor a quantized file stores an expert as (``layer``: its block, ``ModelConfig.expert_name``)."""
    return f"layers.{layer}.experts.{expert}.packed"



# ---------------------------------------------------------------------------- groups of rows


def group_blocks(rows: int, group: int) -> list[tuple[int, int, int]]:
    """Row blocks of a matrix as (first row, number of groups, rows per group): full groups, then a short tail."""
    full = rows // group
    out = []
    if full:
        out.append((0, full, group))
    if rows % group:
        out.append((full * group, 1, rows % group))
    return out


def n_groups(rows: int, group: int) -> int:
    """Groups of ``group`` rows a matrix of ``rows`` rows is cut into (the last may be shorter)."""
    return ceil_div(rows, group)


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
        return ceil_div(self.codes_nbytes, ALIGN) * ALIGN

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
        self._tmp = np.empty(unpack_scratch_len(n, bits), np.uint8) if bits == 3 else None
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
            for r0, ng, size in group_blocks(r, lay.group):
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



# ---------------------------------------------------------------------------- dense (attention) blobs


def read_packed_dense(config: ModelConfig, header: Header, name: str, blob_name: str,
                      read: Callable[[int, int], bytes]) -> np.ndarray:
    """Decode a packed attention matrix at load time (a float32 copy); BadModelFile if the blob does not fit.

    ``read(start, nbytes)`` returns bytes of the weights file (the store's checked read): the store owns
    the file, this module only the format.
    """
    spec = QuantSpec.from_config(config)
    shape = config.dense_shapes()[name]
    layout = BlobLayout((tuple(shape),), spec.attn_bits, spec.group)
    t = header.tensors.get(blob_name)
    if t is None:
        raise BadModelFile(f"{header.path}: missing tensor {blob_name!r} ({spec.attn_bits}-bit attention per config.json)")
    if t.dtype != "U8" or t.shape != (layout.nbytes,):
        raise BadModelFile(
            f"{header.path}: tensor {blob_name!r} is {t.dtype} {list(t.shape)}, but {spec.attn_bits}-bit {list(shape)} "
            f"with group {spec.group} needs U8 [{layout.nbytes}] (layout in docs/design/quant.md)"
        )
    blob = np.frombuffer(read(t.start, t.nbytes), np.uint8)
    deq = Dequantizer(layout)
    return deq.decode(deq.bind(blob))[0].copy()
