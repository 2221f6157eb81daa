"""moerun.files.bitpack: low-bit codes packed planar into bytes, and unpacked into buffers allocated once.

The layout (docs/design/quant.md) is written out again below one code at a time, plainly, as the reference: with
k = 8 // width codes per byte and m = ceil(n / k) bytes, byte j holds codes j, j + m, j + 2m, ... from the
least significant bits up; 3-bit codes are their low two bits as a 2-bit stream followed by their high
bit as a 1-bit stream.  The 1-bit stream is also checked against numpy.packbits (bitorder="little"), an
independent packer, on the same planes.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from moerun.files.bitpack import (
    ceil_div,
    pack_codes,
    packed_nbytes,
    unpack_codes,
    unpack_into,
    unpack_scratch_len,
    unpacked_len,
)


def _reference_planar(codes: list[int], width: int) -> bytes:
    per = 8 // width
    m = -(-len(codes) // per)
    out = bytearray(m)
    for i, c in enumerate(codes):
        plane, j = divmod(i, m)
        out[j] |= c << (width * plane)
    return bytes(out)


def _reference_pack(codes: list[int], bits: int) -> bytes:
    if bits == 8:
        return bytes(codes)
    if bits in (4, 2):
        return _reference_planar(codes, bits)
    return _reference_planar([c & 3 for c in codes], 2) + _reference_planar([c >> 2 for c in codes], 1)


@settings(max_examples=200, deadline=None)
@given(st.sampled_from([8, 4, 3, 2]), st.integers(1, 300), st.data())
def test_packing_follows_the_documented_layout_and_unpacks_back(bits, n, data):
    codes = data.draw(st.lists(st.integers(0, (1 << bits) - 1), min_size=n, max_size=n))
    packed = pack_codes(np.array(codes, np.uint8), bits)
    assert packed.tobytes() == _reference_pack(codes, bits)
    assert packed.size == packed_nbytes(n, bits)
    assert unpack_codes(packed, bits, n).tolist() == codes


@settings(max_examples=100, deadline=None)
@given(st.integers(1, 200), st.data())
def test_the_high_bit_stream_of_3_bit_codes_matches_numpy_packbits(n, data):
    codes = np.array(data.draw(st.lists(st.integers(0, 7), min_size=n, max_size=n)), np.uint8)
    packed = pack_codes(codes, 3)
    m2, m1 = ceil_div(n, 4), ceil_div(n, 8)
    high = np.zeros(8 * m1, np.uint8)
    high[:n] = codes >> 2
    # planar: byte j holds high bits j, j + m1, ..., so byte j's bits are column j of the 8 x m1 planes
    ref = np.packbits(high.reshape(8, m1).T, axis=1, bitorder="little").reshape(-1)
    assert np.array_equal(packed[m2 : m2 + m1], ref)


@pytest.mark.parametrize("bits", [8, 4, 3, 2])
def test_unpack_into_needs_no_more_than_the_buffers_it_asks_for(bits):
    for n in range(1, 70):
        codes = (np.arange(n) % (1 << bits)).astype(np.uint8)
        out = np.full(unpacked_len(n, bits), 255, np.uint8)
        tmp = np.empty(unpack_scratch_len(n, bits), np.uint8) if bits == 3 else None
        unpack_into(pack_codes(codes, bits), bits, n, out, tmp)
        assert np.array_equal(out[:n], codes), (bits, n)


def test_codes_that_do_not_fit_and_unknown_widths_are_refused():
    with pytest.raises(ValueError, match="does not fit"):
        pack_codes(np.array([4], np.uint8), 2)
    with pytest.raises(ValueError, match="cannot pack"):
        pack_codes(np.array([1], np.uint8), 5)
    with pytest.raises(ValueError, match="cannot hold"):
        unpack_codes(np.zeros(3, np.uint8), 4, 8)
