"""moerun.files.codec: how a slot's bytes become (w_gate, w_up, w_down) in float32.

References: an F32 expert is its bytes read as little-endian IEEE 754 binary32 (``np.frombuffer`` with
dtype '<f4', the reference reader); F16 is widened to float32, which is exact: every binary16 value is a
binary32 value (IEEE 754-2008, the binary16 and binary32 formats), so numpy's ``astype`` is the reference.
Which codec a model gets follows from config.json alone.
"""

from __future__ import annotations

import numpy as np
import pytest

from moerun.files.codec import FloatCodec, QuantCodec, codec_for, packed_dense_tensors
from moerun.files.packed import QuantSpec
from moerun.makers.synthetic import synth_config

CONFIG = synth_config(layers=2, experts=4, top_k=2, d_model=32, d_expert=64)


def _slot_with(codec, mats: dict[str, np.ndarray]) -> np.ndarray:
    slot = np.zeros(sum(p.nbytes for p in codec.parts) + 64, np.uint8)
    for p in codec.parts:
        slot[p.offset : p.offset + p.nbytes] = np.frombuffer(mats[p.suffix].tobytes(), np.uint8)
    return slot


def _codec_with_offsets(dtype: str) -> FloatCodec:
    base = FloatCodec(CONFIG, dtype)
    offsets, o = {}, 0
    for p in base.parts:
        offsets[p.suffix] = o
        o += p.nbytes
    return base.with_offsets(offsets)


def test_f32_experts_are_views_of_the_slot_with_the_stored_values():
    codec = _codec_with_offsets("F32")
    rng = np.random.default_rng(0)
    mats = {p.suffix: rng.standard_normal(p.shape).astype("<f4") for p in codec.parts}
    slot = _slot_with(codec, mats)
    out = codec.weights(codec.bind(slot))
    for p, w in zip(codec.parts, out):
        ref = np.frombuffer(slot[p.offset : p.offset + p.nbytes].tobytes(), "<f4").reshape(p.shape)
        assert w.dtype == np.float32 and np.array_equal(w, ref) and np.array_equal(w, mats[p.suffix])
        assert np.shares_memory(w, slot)  # zero-copy: no expert-sized allocation on the hot path
    assert codec.scratch_bytes() == 0


def test_f16_experts_are_widened_exactly_into_scratch_allocated_once():
    codec = _codec_with_offsets("F16")
    rng = np.random.default_rng(1)
    mats = {p.suffix: rng.standard_normal(p.shape).astype("<f2") for p in codec.parts}
    slot = _slot_with(codec, mats)
    bound = codec.bind(slot)
    first = codec.weights(bound)
    for p, w in zip(codec.parts, first):
        assert w.dtype == np.float32 and np.array_equal(w, mats[p.suffix].astype(np.float32))
        assert not np.shares_memory(w, slot)
    again = codec.weights(bound)
    assert all(a is b for a, b in zip(first, again))  # the same scratch arrays every time
    assert codec.scratch_bytes() == sum(4 * int(np.prod(p.shape)) for p in codec.parts)


def test_parts_are_the_three_matrices_with_the_configs_shapes():
    shapes = CONFIG.expert_shapes()
    codec = FloatCodec(CONFIG, "F32")
    assert [p.suffix for p in codec.parts] == ["w_gate", "w_up", "w_down"]
    assert all(p.shape == tuple(shapes[p.suffix]) and p.nbytes == 4 * int(np.prod(p.shape)) for p in codec.parts)


@pytest.mark.parametrize("attn_bits, packed_attention", [(16, False), (8, True)])
def test_config_json_alone_chooses_the_codec_and_the_packed_dense_tensors(attn_bits, packed_attention):
    assert isinstance(codec_for(CONFIG, "F32"), FloatCodec) and packed_dense_tensors(CONFIG) == {}
    spec = QuantSpec.checked(4, attn_bits, 16, "rtn")
    quantized = type(CONFIG)(**{**{k: getattr(CONFIG, k) for k in CONFIG.__dataclass_fields__ if k != "extra"},
                                "extra": {"quant": spec.to_json()}})
    codec = codec_for(quantized, "F32")
    assert isinstance(codec, QuantCodec) and [p.dtype for p in codec.parts] == ["U8"]
    packed = packed_dense_tensors(quantized)
    assert bool(packed) == packed_attention
    if packed:
        assert packed["layers.0.attn.wq"] == "layers.0.attn.wq.packed" and len(packed) == 4 * CONFIG.n_layers
