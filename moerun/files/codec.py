"""How an expert's bytes in a pool slot become the three float32 matrices.

A codec names the tensors one expert is stored as (their suffixes after
``layers.{l}.experts.{e}.``, dtypes and shapes) and turns the bytes of one
slot into ``(w_gate, w_up, w_down)``.  Unquantized float32 experts are
zero-copy views of the slot; float16 and packed low-bit experts are decoded
into scratch buffers that are allocated once, so the decode hot path makes no
expert-sized allocations.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from moerun.files.config import ModelConfig
from moerun.files.modelfile import DTYPE_SIZES
from moerun.files.packed import Dequantizer, QuantSpec, expert_layout, packed_dense_names


@dataclass(frozen=True)
class Part:
    suffix: str
    dtype: str
    shape: tuple[int, ...]
    offset: int = 0  # byte offset inside the expert's range, filled in by the store

    @property
    def nbytes(self) -> int:
        n = DTYPE_SIZES[self.dtype]
        for s in self.shape:
            n *= s
        return n


class Codec:
    """Interface: ``parts`` (expected layout) and ``bind``/``weights`` for slots."""

    name = "base"
    parts: tuple[Part, ...] = ()
    # True when a slot is rewritten after its read (widened in place): a second copy of the stored bytes
    # would then corrupt it, so the pool never reads such a slot while the reader process may still write it.
    rewrites_slot = False

    def with_offsets(self, offsets: dict[str, int]) -> Codec:
        raise NotImplementedError

    def bind(self, slot: np.ndarray) -> object:
        """Precompute whatever views a slot needs; called once per slot."""
        raise NotImplementedError

    def weights(self, bound: object) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Return float32 ``(w_gate, w_up, w_down)`` for a bound slot."""
        raise NotImplementedError

    def scratch_bytes(self) -> int:
        return 0


class FloatCodec(Codec):
    """Experts stored as three float matrices (F32 views, or F16 widened into scratch)."""

    def __init__(self, config: ModelConfig, dtype: str = "F32", offsets: dict[str, int] | None = None):
        self.config = config
        self.dtype = dtype
        self.name = dtype
        shapes = config.expert_shapes()
        offsets = offsets or {}
        self.parts = tuple(Part(s, dtype, shapes[s], offsets.get(s, 0)) for s in ("w_gate", "w_up", "w_down"))
        self._np = np.float32 if dtype == "F32" else np.float16
        self._scratch = None
        if dtype != "F32":
            self._scratch = tuple(np.empty(p.shape, np.float32) for p in self.parts)

    def with_offsets(self, offsets: dict[str, int]) -> FloatCodec:
        return FloatCodec(self.config, self.dtype, offsets)

    def bind(self, slot: np.ndarray):
        return tuple(
            np.ndarray(p.shape, dtype=self._np, buffer=slot.data, offset=p.offset) for p in self.parts
        )

    def weights(self, bound):
        if self._scratch is None:
            return bound
        for dst, src in zip(self._scratch, bound):
            np.copyto(dst, src)
        return self._scratch

    def scratch_bytes(self) -> int:
        return 0 if self._scratch is None else sum(s.nbytes for s in self._scratch)


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



def packed_dense_tensors(config: ModelConfig) -> dict[str, str]:
    """Dense tensors stored as packed blobs (quantized attention): ``{dense name: blob tensor name}``."""
    if config.extra.get("quant"):
        return packed_dense_names(config)  # validates the quant entry
    return {}


def codec_for(config: ModelConfig, expert_dtype: str) -> Codec:
    """The codec of a model's experts: packed low-bit when config.json has a quant entry (validated here), else float."""
    if config.extra.get("quant"):
        return QuantCodec(config, QuantSpec.from_config(config))
    return FloatCodec(config, expert_dtype)
