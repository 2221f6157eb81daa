"""Low-bit codes packed into bytes, and back: the bit level of the packed format (docs/design/quant.md).

Codes are packed densely and *planar* (``pack_codes`` says how), so that
unpacking at run time is a handful of whole-array shifts and masks over the
whole stream instead of a loop per code: ``unpack_into`` writes into buffers
the caller allocated once, so decoding an expert allocates nothing.
"""

from __future__ import annotations

import numpy as np


def ceil_div(a: int, b: int) -> int:
    """``ceil(a / b)`` for non-negative integers, without floats."""
    return -(-a // b)


def packed_nbytes(n: int, bits: int) -> int:
    """Bytes that ``n`` codes of ``bits`` bits take when packed."""
    if bits == 8:
        return n
    if bits == 4:
        return ceil_div(n, 2)
    if bits == 2:
        return ceil_div(n, 4)
    if bits == 3:
        return ceil_div(n, 4) + ceil_div(n, 8)
    raise ValueError(f"cannot pack {bits}-bit codes")


def unpacked_len(n: int, bits: int) -> int:
    """Length of the uint8 buffer ``unpack_into`` writes (``n`` rounded up to whole bytes' worth)."""
    if bits == 8:
        return n
    if bits == 4:
        return 2 * ceil_div(n, 2)
    return 4 * ceil_div(n, 4)  # bits 2 and 3


def unpack_scratch_len(n: int, bits: int) -> int:
    """Length of the uint8 ``tmp`` buffer ``unpack_into`` needs for ``n`` codes (0 unless 3 bits)."""
    return 8 * ceil_div(n, 8) if bits == 3 else 0


def _planes(codes: np.ndarray, per_byte: int) -> np.ndarray:
    m = ceil_div(codes.size, per_byte)
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

    3 bits needs ``tmp`` (uint8, length >= unpack_scratch_len).  Allocates nothing.
    """
    if bits == 8:
        np.copyto(out[:n], packed[:n])
    elif bits == 4:
        h = ceil_div(n, 2)
        np.bitwise_and(packed[:h], 15, out=out[:h])
        np.right_shift(packed[:h], 4, out=out[h : 2 * h])
    elif bits in (2, 3):
        m = ceil_div(n, 4)
        planes = out[: 4 * m].reshape(4, m)
        np.right_shift(packed[None, :m], _SHIFT2, out=planes)
        np.bitwise_and(planes, 3, out=planes)
        if bits == 3:
            m1 = ceil_div(n, 8)
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
    tmp = np.empty(unpack_scratch_len(n, bits), np.uint8) if bits == 3 else None
    unpack_into(packed, bits, n, out, tmp)
    return out[:n].copy()
