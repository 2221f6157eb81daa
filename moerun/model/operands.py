"""A dense matrix kept as stored (BF16 or F16) and widened to float32 a block of rows at a time when it is used.

``x @ m`` for a ``StoredMatrix`` m (the [in, out] operand of an [out, in] matrix as an open checkpoint stores
it) widens ``BLOCK_BYTES`` worth of its rows at a time into one scratch buffer shared by every such matrix of a
model, and multiplies by each block's transposed view: the matrix takes its stored bytes (half of float32's)
plus the one buffer, at the cost of widening it at every use.  The products are those of float32 weights
(BF16 widens exactly), summed per block of output columns, so they can differ in the last bits from one
product over the whole matrix; a run keeps one choice throughout, so offloaded and resident runs still agree
bit for bit.
"""

from __future__ import annotations

import numpy as np

from moerun.files.checkpoint import widen_into

BLOCK_BYTES = 16 << 20  # float32 bytes of rows widened at a time


class WidenScratch:
    """The buffer every ``StoredMatrix`` of a model widens its blocks into (one product runs at a time)."""

    def __init__(self, nbytes: int = BLOCK_BYTES):
        self.buf = np.empty(max(1, nbytes // 4), np.float32)

    @property
    def nbytes(self) -> int:
        return self.buf.nbytes


class StoredMatrix:
    """The [in, out] operand of ``stored`` ([out, in], dtype tag ``dtype``), widened per block at each ``x @ self``."""

    __array_ufunc__ = None  # ``ndarray @ self`` leaves the product to __rmatmul__ (no float32 copy of the whole)

    def __init__(self, stored: np.ndarray, dtype: str, scratch: WidenScratch):
        self.stored = stored
        self.dtype = dtype
        self.scratch = scratch
        out_dim, in_dim = stored.shape
        self.shape = (in_dim, out_dim)
        self.rows = max(1, min(out_dim, scratch.buf.size // in_dim))  # rows of ``stored`` widened at a time

    @property
    def nbytes(self) -> int:
        return self.stored.nbytes

    def __rmatmul__(self, x: np.ndarray) -> np.ndarray:
        out_dim, in_dim = self.stored.shape
        y = np.empty((*x.shape[:-1], out_dim), np.float32)
        for r0 in range(0, out_dim, self.rows):
            r1 = min(out_dim, r0 + self.rows)
            block = self.scratch.buf[: (r1 - r0) * in_dim].reshape(r1 - r0, in_dim)
            widen_into(self.stored[r0:r1], self.dtype, block)
            y[..., r0:r1] = x @ block.T
        return y
