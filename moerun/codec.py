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

from .config import ModelConfig


@dataclass(frozen=True)
class Part:
    suffix: str
    dtype: str
    shape: tuple[int, ...]
    offset: int = 0  # byte offset inside the expert's range, filled in by the store

    @property
    def nbytes(self) -> int:
        from .modelfile import DTYPE_SIZES

        n = DTYPE_SIZES[self.dtype]
        for s in self.shape:
            n *= s
        return n


class Codec:
    """Interface: ``parts`` (expected layout) and ``bind``/``weights`` for slots."""

    name = "base"
    parts: tuple[Part, ...] = ()

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


def packed_dense_tensors(config: ModelConfig) -> dict[str, str]:
    """Dense tensors stored as packed blobs (quantized attention): ``{dense name: blob tensor name}``."""
    if config.extra.get("quant"):
        from .quant import packed_dense_names  # validates the quant entry

        return packed_dense_names(config)
    return {}


def codec_for(config: ModelConfig, expert_dtype: str) -> Codec:
    if config.extra.get("quant"):
        from .quant import codec_from_config  # packed low-bit experts

        return codec_from_config(config)
    return FloatCodec(config, expert_dtype)
