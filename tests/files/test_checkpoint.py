"""moerun.files.checkpoint: open checkpoints read in place; span maps, page-in, dtypes and sizes against the tensors written.

The checkpoints are built here, tiny, for the three supported types, per-expert and fused, in one file and in
shards where an expert's three matrices sit in different files, with 4.x and 5.x config spellings.  Files are
written by the safetensors library (version 0.8.0): F16 and F32 with ``safetensors.numpy.save_file``, BF16 (numpy
has no bfloat16) from uint16 bits with ``safetensors.serialize_file`` and a ``TensorSpec`` of dtype "bfloat16".
Files whose tensors must lie in a chosen order (the library orders them itself) are written here byte by byte
following the safetensors format specification (8-byte little-endian header length, JSON header with dtype tag
"BF16"/"F16"/"F32", shape and data_offsets, then the data); a test checks the library reads those identically.
The expected tensor names are written out by hand below, from /work/shared/OPEN-CHECKPOINTS.md, not taken
from the module under test.  The builder is imported by the other test_checkpoint_* files.
"""

from __future__ import annotations

import json
import os
import struct
import tracemalloc
from pathlib import Path

import numpy as np
import pytest
import safetensors
from conftest import read_raw, write_raw
from safetensors.numpy import save_file

from moerun.errors import PageInError
from moerun.files import checkpoint as ckmod
from moerun.files.checkpoint import (
    Checkpoint,
    decode_bf16,
    is_open_checkpoint,
    read_expert,
    widen_into,
)
from moerun.files.ckpt_config import load_checkpoint_config
from moerun.files.ckpt_tensors import dense_tensors

# ---------------------------------------------------------------------------- the builder

TYPES = ("qwen3_moe", "qwen2_moe", "olmoe")
H, HEADS, KV, E, K, I_EXP, DENSE, SHARED, VOCAB = 16, 4, 2, 4, 2, 8, 24, 12, 32


def raw_config(mt: str, spelling: str = "4x", dtype: str = "float32", **over) -> dict:
    """A config.json for a tiny model of type ``mt`` in the 4.x or 5.x library's spelling."""
    c: dict = {
        "model_type": mt,
        "architectures": [{"qwen3_moe": "Qwen3MoeForCausalLM", "qwen2_moe": "Qwen2MoeForCausalLM", "olmoe": "OlmoeForCausalLM"}[mt]],
        "hidden_size": H,
        "num_attention_heads": HEADS,
        "num_key_value_heads": KV,
        "vocab_size": VOCAB,
        "num_experts_per_tok": K,
        "rms_norm_eps": 1e-6,
        "max_position_embeddings": 128,
        "tie_word_embeddings": False,
        "hidden_act": "silu",
        "bos_token_id": 1,
        "eos_token_id": 2,
    }
    if mt == "qwen3_moe":
        c.update(num_hidden_layers=3, head_dim=6, moe_intermediate_size=I_EXP, intermediate_size=DENSE,
                 mlp_only_layers=[1], decoder_sparse_step=1, norm_topk_prob=True, use_sliding_window=False,
                 sliding_window=None, attention_bias=False)
    elif mt == "qwen2_moe":
        c.update(num_hidden_layers=3, moe_intermediate_size=I_EXP, intermediate_size=DENSE, mlp_only_layers=[0],
                 decoder_sparse_step=1, shared_expert_intermediate_size=SHARED, norm_topk_prob=False,
                 use_sliding_window=False, sliding_window=64)
    else:
        c.update(num_hidden_layers=2, intermediate_size=I_EXP, clip_qkv=None, norm_topk_prob=False, attention_bias=False)
    experts_key = "num_local_experts" if (spelling == "5x" and mt == "qwen3_moe") else "num_experts"
    c[experts_key] = E
    if spelling == "4x":
        c.update(rope_theta=1e6, rope_scaling=None, torch_dtype=dtype)
    else:
        c.update(rope_parameters={"rope_theta": 1e6, "rope_type": "default"}, dtype=dtype)
        if mt == "qwen2_moe":
            c["qkv_bias"] = True
    c.update(over)
    return c


def spec(raw: dict) -> tuple[dict[str, tuple[int, ...]], list[int]]:
    """Hand-written: every non-expert tensor of the tiny model with its shape, and the MoE layers."""
    mt, h = raw["model_type"], raw["hidden_size"]
    hd = raw.get("head_dim") or h // raw["num_attention_heads"]
    q, kv = raw["num_attention_heads"] * hd, raw["num_key_value_heads"] * hd
    vocab, n_exp = raw["vocab_size"], raw.get("num_experts") or raw["num_local_experts"]
    out: dict[str, tuple[int, ...]] = {"model.embed_tokens.weight": (vocab, h), "model.norm.weight": (h,)}
    if not raw.get("tie_word_embeddings", False):
        out["lm_head.weight"] = (vocab, h)
    moe = []
    for layer in range(raw["num_hidden_layers"]):
        p = f"model.layers.{layer}."
        out[p + "input_layernorm.weight"] = (h,)
        out[p + "post_attention_layernorm.weight"] = (h,)
        out[p + "self_attn.q_proj.weight"] = (q, h)
        out[p + "self_attn.k_proj.weight"] = (kv, h)
        out[p + "self_attn.v_proj.weight"] = (kv, h)
        out[p + "self_attn.o_proj.weight"] = (h, q)
        if mt == "qwen2_moe" and raw.get("qkv_bias", True):
            out[p + "self_attn.q_proj.bias"] = (q,)
            out[p + "self_attn.k_proj.bias"] = (kv,)
            out[p + "self_attn.v_proj.bias"] = (kv,)
        if mt == "qwen3_moe":
            out[p + "self_attn.q_norm.weight"] = (hd,)
            out[p + "self_attn.k_norm.weight"] = (hd,)
        if mt == "olmoe":
            out[p + "self_attn.q_norm.weight"] = (h,)
            out[p + "self_attn.k_norm.weight"] = (kv,)
        if mt != "olmoe" and layer in raw.get("mlp_only_layers", []):
            w = raw["intermediate_size"]
            out[p + "mlp.gate_proj.weight"] = (w, h)
            out[p + "mlp.up_proj.weight"] = (w, h)
            out[p + "mlp.down_proj.weight"] = (h, w)
            continue
        moe.append(layer)
        out[p + "mlp.gate.weight"] = (n_exp, h)
        if mt == "qwen2_moe":
            s = raw["shared_expert_intermediate_size"]
            out[p + "mlp.shared_expert.gate_proj.weight"] = (s, h)
            out[p + "mlp.shared_expert.up_proj.weight"] = (s, h)
            out[p + "mlp.shared_expert.down_proj.weight"] = (h, s)
            out[p + "mlp.shared_expert_gate.weight"] = (1, h)
    return out, moe


def _values(rng, shape, tag: str) -> np.ndarray:
    """Float32 values exactly representable in ``tag`` (BF16: low 16 bits zero; F16: through float16)."""
    a = rng.standard_normal(shape).astype(np.float32)
    if tag == "BF16":
        return (a.view(np.uint32) & np.uint32(0xFFFF0000)).view(np.float32)
    if tag == "F16":
        return a.astype(np.float16).astype(np.float32)
    return a


def stored(values: np.ndarray, tag: str) -> np.ndarray:
    """The stored array of float32 ``values`` in ``tag`` (BF16 as its uint16 bits)."""
    if tag == "BF16":
        return (np.ascontiguousarray(values).view(np.uint32) >> 16).astype("<u2")
    return values.astype({"F16": "<f2", "F32": "<f4"}[tag])


class Built:
    """What a test checkpoint holds: the float32 value of every tensor, each expert's parts, the dtype."""

    def __init__(self, directory: Path, raw: dict, values: dict, experts: dict, tag: str, moe: list, layout: str):
        self.dir, self.raw, self.values, self.experts, self.tag, self.moe, self.layout = directory, raw, values, experts, tag, moe, layout


def write_safetensors(path: Path, arrays: dict[str, tuple[str, np.ndarray]], metadata: dict | None = None) -> None:
    """A safetensors file in the order given, by the format specification (used for BF16, which numpy lacks)."""
    header: dict = {"__metadata__": metadata or {"format": "pt"}}
    offset = 0
    for name, (tag, a) in arrays.items():
        header[name] = {"dtype": tag, "shape": list(a.shape), "data_offsets": [offset, offset + a.nbytes]}
        offset += a.nbytes
    blob = json.dumps(header).encode()
    blob += b" " * (-len(blob) % 8)
    with open(path, "wb") as f:
        f.write(struct.pack("<Q", len(blob)) + blob)
        for _, (_, a) in arrays.items():
            f.write(np.ascontiguousarray(a).tobytes())


def build(
    directory: Path,
    mt: str = "qwen3_moe",
    layout: str = "per_expert",
    tag: str = "F32",
    shards: int = 1,
    spelling: str = "4x",
    seed: int = 0,
    order=None,
    raw: dict | None = None,
    tokenizer: bool = True,
) -> Built:
    """Write a tiny checkpoint of type ``mt`` into ``directory``.

    ``shards`` > 1 deals the tensors round-robin (in name order) over that many files with an index, so an expert's
    three matrices land in different files.  ``order``: a function reordering each file's tensor names (BF16
    files and custom orders are written by ``write_safetensors``, the rest by the safetensors library).
    """
    directory.mkdir(parents=True, exist_ok=True)
    raw = raw or raw_config(mt, spelling, {"BF16": "bfloat16", "F16": "float16", "F32": "float32"}[tag])
    rng = np.random.default_rng(seed)
    shapes, moe = spec(raw)
    values = {name: _values(rng, shape, tag) for name, shape in shapes.items()}
    experts: dict = {}
    for layer in moe:
        for e in range(E):
            experts[layer, e] = {
                "gate": _values(rng, (I_EXP, H), tag),
                "up": _values(rng, (I_EXP, H), tag),
                "down": _values(rng, (H, I_EXP), tag),
            }
        if layout == "fused":
            values[f"model.layers.{layer}.mlp.experts.gate_up_proj"] = np.stack(
                [np.concatenate([experts[layer, e]["gate"], experts[layer, e]["up"]]) for e in range(E)])
            values[f"model.layers.{layer}.mlp.experts.down_proj"] = np.stack([experts[layer, e]["down"] for e in range(E)])
        else:
            for e in range(E):
                for part, a in experts[layer, e].items():
                    values[f"model.layers.{layer}.mlp.experts.{e}.{part}_proj.weight"] = a
    all_names = sorted(values)
    groups = [all_names[i::shards] for i in range(shards)]
    files = ["model.safetensors"] if shards == 1 else [f"model-{i + 1:05d}-of-{shards:05d}.safetensors" for i in range(shards)]
    for fname, group in zip(files, groups):
        group = order(group) if order else group
        if order is not None or (tag == "BF16" and not hasattr(safetensors, "TensorSpec")):
            write_safetensors(directory / fname, {n: (tag, stored(values[n], tag)) for n in group})
        elif tag == "BF16":
            keep = {n: stored(values[n], tag) for n in group}  # alive while the library reads them
            specs = {n: safetensors.TensorSpec(dtype="bfloat16", shape=list(a.shape), data_ptr=a.ctypes.data, data_len=a.nbytes) for n, a in keep.items()}
            safetensors.serialize_file(specs, str(directory / fname), metadata={"format": "pt"})
        else:
            save_file({n: stored(values[n], tag) for n in group}, str(directory / fname), metadata={"format": "pt"})
    if shards > 1:
        wm = {n: files[i] for i, group in enumerate(groups) for n in group}
        total = sum(stored(values[n], tag).nbytes for n in values)
        (directory / "model.safetensors.index.json").write_text(json.dumps({"metadata": {"total_size": total}, "weight_map": wm}))
    (directory / "config.json").write_text(json.dumps(raw))
    if tokenizer:
        (directory / "tokenizer.json").write_text(json.dumps({"version": "1.0", "model": {"type": "BPE", "vocab": {}, "merges": []}}))
    return Built(directory, raw, values, experts, tag, moe, layout)


def bits(a: np.ndarray) -> bytes:
    return np.ascontiguousarray(a).tobytes()


def test_files_written_by_hand_here_read_back_identically_in_the_safetensors_library(tmp_path):
    rng = np.random.default_rng(5)
    arrays = {
        "z": ("BF16", rng.integers(0, 1 << 16, (3, 5), dtype=np.uint16).astype("<u2")),
        "a": ("F16", rng.standard_normal((4,)).astype("<f2")),
        "m": ("F32", rng.standard_normal((2, 2, 2)).astype("<f4")),
    }
    write_safetensors(tmp_path / "x.safetensors", arrays)
    lib = dict(safetensors.deserialize((tmp_path / "x.safetensors").read_bytes()))  # reference reader: safetensors 0.8.0
    assert set(lib) == set(arrays)
    for name, (tag, a) in arrays.items():
        assert lib[name]["dtype"] == tag and list(lib[name]["shape"]) == list(a.shape)
        assert bytes(lib[name]["data"]) == bits(a)


@pytest.mark.parametrize("layout", ["per_expert", "fused"])
def test_every_tensor_read_in_place_equals_the_safetensors_librarys_bytes(tmp_path, layout):
    b = build(tmp_path / "ck", "qwen2_moe", layout, "BF16", shards=2)
    with Checkpoint.open(b.dir) as ck:
        seen = set()
        for path in ck.files:
            for name, t in safetensors.deserialize(path.read_bytes()):  # reference reader: safetensors 0.8.0
                v = ck.tensor(name)
                assert ck.files[ck.tensors[name].file] == path
                assert t["dtype"] == ck.tensors[name].info.dtype and list(t["shape"]) == list(v.shape)
                assert bytes(t["data"]) == bits(v)
                seen.add(name)
        assert seen == set(ck.tensors)


# ---------------------------------------------------------------------------- names and shapes


@pytest.mark.parametrize("mt", TYPES)
@pytest.mark.parametrize("spelling", ["4x", "5x"])
def test_expected_dense_tensors_are_the_hand_written_list_of_each_type(mt, spelling):
    raw = raw_config(mt, spelling)
    want, moe = spec(raw)
    c = load_config_from(raw)
    assert dense_tensors(c) == want
    assert list(c.moe_layers) == moe


def load_config_from(raw: dict):
    from moerun.files.ckpt_config import parse_checkpoint_config

    return parse_checkpoint_config(raw)


# ---------------------------------------------------------------------------- every expert, bit for bit


@pytest.mark.parametrize("shards", [1, 3])
@pytest.mark.parametrize("tag", ["BF16", "F16", "F32"])
@pytest.mark.parametrize("layout", ["per_expert", "fused"])
@pytest.mark.parametrize("mt", TYPES)
def test_every_paged_in_expert_equals_the_written_matrices_bit_for_bit(tmp_path, mt, layout, tag, shards):
    b = build(tmp_path / "ck", mt, layout, tag, shards, spelling="5x" if shards == 3 else "4x")
    with Checkpoint.open(b.dir) as ck:
        assert ck.layouts == tuple(layout if layer in b.moe else None for layer in range(b.raw["num_hidden_layers"]))
        assert ck.expert_dtype == tag
        size = ck.sizes().expert_slot
        slot = np.full(size + 64, 0xAB, np.uint8)
        scratch = {p: np.empty(s, np.float32) for p, s in (("gate", (I_EXP, H)), ("up", (I_EXP, H)), ("down", (H, I_EXP)))}
        for (layer, e), want in b.experts.items():
            got = ck.page_in(layer, e, slot)
            for part, arr in zip(("gate", "up", "down"), got):
                assert arr.shape == want[part].shape  # [out, in] as stored
                assert bits(arr) == bits(stored(want[part], tag))
                assert np.shares_memory(arr, slot)
                w = widen_into(arr, tag, scratch[part])
                assert w is scratch[part]
                assert bits(w) == bits(want[part])
        for name, want in b.values.items():
            if ".experts." not in name:
                assert bits(ck.tensor(name)) == bits(stored(want, tag))
                assert bits(ck.tensor_f32(name)) == bits(want)


@pytest.mark.parametrize("layout", ["per_expert", "fused"])
def test_experts_straddling_three_shards_have_spans_in_several_files_and_reads_in_file_and_offset_order(tmp_path, layout):
    b = build(tmp_path / "ck", "qwen3_moe", layout, "BF16", shards=3)
    with Checkpoint.open(b.dir) as ck:
        assert len(ck.files) == 3
        several = 0
        for row in ck.span_map:
            if row is None:
                continue
            for sp in row:
                several += len(sp.files) > 1
                keys = [(r.file, r.offset) for r in sp.reads]
                assert keys == sorted(keys)
                for r in sp.reads:
                    assert r.nbytes == sum(n for _, n in r.pieces)
                    assert sp.reads_in(r.file)[0].file == r.file
                # every part is read exactly once, into its own destination
                covered = sorted(p for r in sp.reads for p in r.pieces if p[0] != ckmod.DISCARD)
                assert covered == sorted(zip(sp.dst_offsets, (p.nbytes for p in sp.parts)))
                for p in sp.parts:
                    info = ck.tensors[p.tensor].info
                    assert ck.files[p.file] == ck.headers[ck.tensors[p.tensor].file].path
                    assert info.start <= p.offset and p.offset + p.nbytes <= info.end
        assert several > 0  # the round-robin deal put some experts' parts in different files


def _count_preadv(monkeypatch) -> list:
    calls = []
    real = os.preadv

    def counting(fd, bufs, offset):
        calls.append((fd, offset, [len(b) for b in bufs]))
        return real(fd, bufs, offset)

    monkeypatch.setattr(ckmod.os, "preadv", counting)
    return calls


def test_a_library_written_per_expert_file_pages_each_expert_in_with_one_preadv(tmp_path, monkeypatch):
    # the library writes tensors in name order: an expert's down, gate and up matrices are adjacent
    b = build(tmp_path / "ck", "olmoe", "per_expert", "F32")
    with Checkpoint.open(b.dir) as ck:
        slot = np.zeros(ck.sizes().expert_slot, np.uint8)
        calls = _count_preadv(monkeypatch)
        for layer in b.moe:
            for e in range(E):
                sp = ck.expert_spans(layer, e)
                assert len(sp.reads) == 1 and len(sp.reads[0].pieces) == 3
                ck.page_in(layer, e, slot)
        assert len(calls) == len(b.moe) * E
        assert all(sizes == [H * I_EXP * 4] * 3 for _, _, sizes in calls)


def test_a_fused_expert_is_one_block_of_each_fused_tensor_with_the_gate_rows_first(tmp_path, monkeypatch):
    b = build(tmp_path / "ck", "qwen2_moe", "fused", "BF16")
    with Checkpoint.open(b.dir) as ck:
        gu = ck.tensors["model.layers.1.mlp.experts.gate_up_proj"].info
        dn = ck.tensors["model.layers.1.mlp.experts.down_proj"].info
        for e in range(E):
            sp = ck.expert_spans(1, e)
            assert sp.gate.offset == gu.start + e * 2 * I_EXP * H * 2  # expert e: one contiguous block of the tensor
            assert sp.up.offset == sp.gate.offset + I_EXP * H * 2  # the gate's rows first
            assert sp.down.offset == dn.start + e * H * I_EXP * 2
            assert sp.gate.tensor == sp.up.tensor == gu.name and sp.down.tensor == dn.name
        slot = np.zeros(ck.sizes().expert_slot, np.uint8)
        calls = _count_preadv(monkeypatch)
        for e in range(E):
            ck.page_in(2, e, slot)
        assert len(calls) == sum(len(ck.expert_spans(2, e).reads) for e in range(E))


def _span(file, offset, nbytes, shape=(2, 2)):
    return ckmod.Span(file, offset, nbytes, "F32", shape, "t")


def test_reads_group_an_experts_parts_into_runs_per_file_in_offset_order():
    G = ckmod.GAP_LIMIT
    # adjacent in one file, stored down, gate, up (the library's name order): one read, three pieces
    sp = ckmod.make_expert_spans(0, 0, [_span(0, 116, 16), _span(0, 132, 16), _span(0, 100, 16)])
    assert sp.dst_offsets == (0, 64, 128)
    assert sp.reads == (ckmod.Read(0, 100, 48, ((128, 16), (0, 16), (64, 16))),)
    # a small gap is read and dropped within the same call
    sp = ckmod.make_expert_spans(0, 0, [_span(0, 100, 16), _span(0, 116 + 40, 16), _span(0, 172, 16)])
    assert sp.reads == (ckmod.Read(0, 100, 88, ((0, 16), (ckmod.DISCARD, 40), (64, 16), (128, 16))),)
    # a gap larger than the limit (a fused layer's down rows, a whole tensor away) starts another call
    sp = ckmod.make_expert_spans(0, 0, [_span(0, 0, 16), _span(0, 16, 16), _span(0, 32 + G + 1, 16)])
    assert [(r.offset, r.nbytes) for r in sp.reads] == [(0, 32), (32 + G + 1, 16)]
    assert ckmod.make_expert_spans(0, 0, [_span(0, 0, 16), _span(0, 16, 16), _span(0, 32 + G, 16)]).reads[0].nbytes == 48 + G
    # three files: one read each, by file number whatever the part order
    sp = ckmod.make_expert_spans(0, 0, [_span(2, 8, 16), _span(0, 8, 16), _span(1, 8, 16)])
    assert [(r.file, r.pieces) for r in sp.reads] == [(0, ((64, 16),)), (1, ((128, 16),)), (2, ((0, 16),))]
    assert sp.files == (0, 1, 2) and sp.nbytes == 48 and sp.slot_nbytes == 192
    # no merging at all when asked
    assert len(ckmod.make_expert_spans(0, 0, [_span(0, 0, 16), _span(0, 20, 16), _span(0, 36, 16)], gap_limit=0).reads) == 2


def test_parts_with_padding_between_them_are_still_paged_in_with_one_preadv(tmp_path, monkeypatch):
    b = build(tmp_path / "ck", "olmoe", "per_expert", "F32")
    path = b.dir / "model.safetensors"
    doc, data = read_raw(path)
    arrays = [(n, doc[n]) for n in sorted((n for n in doc if n != "__metadata__"), key=lambda n: doc[n]["data_offsets"][0])]
    out, new_doc = b"", {"__metadata__": doc.get("__metadata__", {})}
    for n, entry in arrays:  # another tool's layout: each tensor followed by 24 bytes of padding
        b0, b1 = entry["data_offsets"]
        new_doc[n] = {**entry, "data_offsets": [len(out), len(out) + b1 - b0]}
        out += data[b0:b1] + b"\xee" * 24
    write_raw(path, new_doc, out)
    with Checkpoint.open(b.dir) as ck:
        slot = np.zeros(ck.sizes().expert_slot, np.uint8)
        calls = _count_preadv(monkeypatch)
        for (layer, e), want in b.experts.items():
            sp = ck.expert_spans(layer, e)
            assert len(sp.reads) == 1 and [n for o, n in sp.reads[0].pieces if o == ckmod.DISCARD] == [24, 24]
            got = ck.page_in(layer, e, slot)
            for arr, part in zip(got, ("gate", "up", "down")):
                assert bits(arr) == bits(want[part])
        assert len(calls) == len(b.experts)


def test_parts_stored_out_of_order_with_gaps_are_read_with_one_preadv_per_run(tmp_path):
    # another tool's order: every up, the dense tensors, then the rest reversed (gate before down), so an expert's
    # up lies far from its gate and down -- the span map follows the headers, not the names
    def scramble(group):
        ex = [n for n in group if ".experts." in n]
        rest = [n for n in group if ".experts." not in n]
        ups = [n for n in ex if n.endswith("up_proj.weight")]
        others = [n for n in ex if not n.endswith("up_proj.weight")]
        return ups + rest + others[::-1]

    b = build(tmp_path / "ck", "qwen3_moe", "per_expert", "F16", order=scramble)
    with Checkpoint.open(b.dir) as ck:
        slot = np.zeros(ck.sizes().expert_slot, np.uint8)
        for (layer, e), want in b.experts.items():
            sp = ck.expert_spans(layer, e)
            assert sp.up.offset < sp.gate.offset and sp.gate.offset + sp.gate.nbytes == sp.down.offset
            assert [r.pieces for r in sp.reads] == [((sp.dst_offsets[1], sp.up.nbytes),),
                                                    ((sp.dst_offsets[0], sp.gate.nbytes), (sp.dst_offsets[2], sp.down.nbytes))]
            got = ck.page_in(layer, e, slot)
            for arr, part in zip(got, ("gate", "up", "down")):
                assert bits(arr) == bits(stored(want[part], "F16"))


def test_page_in_finishes_after_short_reads(tmp_path, monkeypatch):
    b = build(tmp_path / "ck", "qwen2_moe", "per_expert", "F32", shards=2)
    real = os.preadv

    def dribble(fd, bufs, offset):  # at most 7 bytes per call: short reads are legal
        first = memoryview(bufs[0])[:7]
        return real(fd, [first], offset)

    with Checkpoint.open(b.dir) as ck:
        slot = np.zeros(ck.sizes().expert_slot, np.uint8)
        monkeypatch.setattr(ckmod.os, "preadv", dribble)
        for (layer, e), want in b.experts.items():
            got = ck.page_in(layer, e, slot)
            for arr, part in zip(got, ("gate", "up", "down")):
                assert bits(arr) == bits(want[part])


def test_a_shard_truncated_after_opening_fails_the_page_in_with_one_line_naming_it(tmp_path):
    b = build(tmp_path / "ck", "qwen3_moe", "per_expert", "F32", shards=2)
    with Checkpoint.open(b.dir) as ck:
        sp = ck.expert_spans(2, 3)
        victim = ck.files[sp.down.file]
        os.truncate(victim, sp.down.offset + 4)
        slot = np.zeros(ck.sizes().expert_slot, np.uint8)
        with pytest.raises(PageInError) as ei:
            ck.page_in(2, 3, slot)
        msg = str(ei.value)
        assert "\n" not in msg and str(victim) in msg and "expert 3 of layer 2" in msg and "file ended" in msg


def test_page_in_refuses_a_destination_too_small_or_read_only(tmp_path):
    b = build(tmp_path / "ck", "olmoe", "fused", "F32")
    with Checkpoint.open(b.dir) as ck:
        need = ck.sizes().expert_slot
        with pytest.raises(ValueError, match=str(need)):
            ck.page_in(0, 0, np.zeros(need - 1, np.uint8))
        ro = np.zeros(need, np.uint8)
        ro.flags.writeable = False
        with pytest.raises(ValueError):
            ck.page_in(0, 0, ro)
        with pytest.raises(ValueError):
            ck.page_in(0, 0, bytes(need))
        got = ck.page_in(0, 0, bytearray(need))  # any writable buffer will do
        assert bits(got[2]) == bits(b.experts[0, 0]["down"])


def test_read_expert_works_on_the_callers_own_descriptors_and_buffer(tmp_path):
    b = build(tmp_path / "ck", "qwen2_moe", "per_expert", "BF16", shards=3)
    with Checkpoint.open(b.dir) as ck:
        spans = ck.expert_spans(1, 2)
        paths = ck.files
    fds = [os.open(p, os.O_RDONLY) for p in paths]  # e.g. a reader process's own descriptors
    try:
        buf = memoryview(bytearray(spans.slot_nbytes + 128))[64:]  # a view into the middle of a larger buffer
        gate, up, down = read_expert(fds, spans, buf)
        for arr, part in ((gate, "gate"), (up, "up"), (down, "down")):
            assert bits(decode_bf16(arr)) == bits(b.experts[1, 2][part])
    finally:
        for fd in fds:
            os.close(fd)


def test_a_slot_bound_once_shows_each_expert_read_into_it_after(tmp_path):
    b = build(tmp_path / "ck", "qwen3_moe", "fused", "F16", shards=2)
    with Checkpoint.open(b.dir) as ck:
        slot = np.zeros(ck.sizes().expert_slot, np.uint8)
        bound = ck.expert_spans(0, 0).views(slot)  # every expert has the same destination layout
        for (layer, e), want in b.experts.items():
            assert ck.expert_spans(layer, e).dst_offsets == ck.expert_spans(0, 0).dst_offsets
            ck.page_in(layer, e, slot)
            for arr, part in zip(bound, ("gate", "up", "down")):
                assert bits(arr) == bits(stored(want[part], "F16"))
    with pytest.raises(ValueError, match="closed"):
        ck.page_in(0, 0, slot)


def test_expert_spans_of_a_dense_layer_or_out_of_range_are_refused(tmp_path):
    b = build(tmp_path / "ck", "qwen3_moe")
    with Checkpoint.open(b.dir) as ck:
        with pytest.raises(ValueError, match="dense layer"):
            ck.expert_spans(1, 0)
        with pytest.raises(IndexError):
            ck.expert_spans(0, E)
        assert ck.span_map[1] is None and len(ck.span_map[0]) == E


# ---------------------------------------------------------------------------- mapping and dense tensors


def test_dense_tensors_are_read_only_views_of_the_shard_mapping_never_copies(tmp_path):
    b = build(tmp_path / "ck", "qwen2_moe", "per_expert", "BF16", shards=2)
    with Checkpoint.open(b.dir) as ck:
        name = "model.embed_tokens.weight"
        v = ck.tensor(name)
        assert not v.flags.writeable and v.dtype == np.dtype("<u2") and v.shape == (VOCAB, H)
        m = ck.mapping(ck.tensors[name].file)
        base = np.frombuffer(m, np.uint8)
        assert np.shares_memory(v, base)
        assert ck.mapping(ck.tensors[name].file) is m  # mapped once
        row = np.empty(H, np.float32)
        widen_into(v[5], "BF16", row)  # one embedding row on demand
        assert bits(row) == bits(b.values[name][5])
        del v, base


def test_embedding_rows_are_widened_on_demand_into_the_callers_buffer(tmp_path):
    b = build(tmp_path / "ck", "qwen3_moe", "per_expert", "BF16", shards=3)
    name = "model.embed_tokens.weight"
    with Checkpoint.open(b.dir) as ck:
        out = np.empty((4, H), np.float32)
        assert ck.rows_f32(name, [3, 0, 31, 3], out) is out
        assert bits(out) == bits(b.values[name][[3, 0, 31, 3]])
        with pytest.raises(IndexError, match="row 32"):
            ck.rows_f32(name, [32], np.empty((1, H), np.float32))
        with pytest.raises(ValueError):
            ck.rows_f32(name, [1, 2], np.empty((1, H), np.float32))


def test_the_summary_is_plain_json_with_the_architecture_shards_and_bytes(tmp_path):
    b = build(tmp_path / "ck", "qwen2_moe", "per_expert", "F16", shards=3, spelling="5x")
    with Checkpoint.open(b.dir) as ck:
        doc = json.loads(json.dumps(ck.summary()))
        s = ck.sizes()
    assert doc["config"]["model_type"] == "qwen2_moe" and doc["config"]["shared_expert_width"] == SHARED
    assert [x["file"] for x in doc["shards"]] == [f"model-0000{i}-of-00003.safetensors" for i in (1, 2, 3)]
    assert sum(x["tensors"] for x in doc["shards"]) == len(b.values)
    assert doc["layouts"] == [None, "per_expert", "per_expert"] and doc["expert_dtype"] == "F16"
    assert doc["experts_straddling_files"] > 0 and doc["reads_per_expert"] >= 2
    assert doc["sizes"]["expert_stored"] == s.expert_stored and doc["sizes"]["experts_f32"] == s.experts_f32
    assert doc["bos_ids"] == [1] and doc["eos_ids"] == [2]


def test_opening_maps_nothing_and_reads_no_tensor_data(tmp_path):
    b = build(tmp_path / "ck", "qwen3_moe", "per_expert", "F32")
    with Checkpoint.open(b.dir) as ck:
        assert ck._maps == {}
        assert len(ck.fds) == 1


# ---------------------------------------------------------------------------- sizes


@pytest.mark.parametrize("tag,size", [("BF16", 2), ("F16", 2), ("F32", 4)])
def test_sizes_count_expert_and_dense_bytes_as_stored_and_as_float32(tmp_path, tag, size):
    b = build(tmp_path / "ck", "qwen2_moe", "fused", tag)
    with Checkpoint.open(b.dir) as ck:
        s = ck.sizes()
    assert s.expert_stored == 3 * I_EXP * H * size
    assert s.expert_f32 == 3 * I_EXP * H * 4
    assert s.expert_slot >= s.expert_stored and s.expert_slot % 64 == 0
    assert s.experts == len(b.moe) * E == 2 * E
    assert s.experts_stored == s.expert_stored * s.experts
    shapes, _ = spec(b.raw)
    dense_elems = sum(int(np.prod(sh)) for n, sh in shapes.items() if n != "model.embed_tokens.weight")
    assert s.dense_stored == dense_elems * size
    assert s.dense_f32 == dense_elems * 4
    assert s.embed_stored == VOCAB * H * size and s.embed_f32 == VOCAB * H * 4
    assert not s.tied


REAL = {  # the real sizes on OPEN-CHECKPOINTS.md, with its figure for one BF16 expert
    "qwen3_moe": (dict(num_hidden_layers=48, hidden_size=2048, num_experts=128, moe_intermediate_size=768,
                       num_experts_per_tok=8, num_attention_heads=32, num_key_value_heads=4, head_dim=128,
                       vocab_size=151936, intermediate_size=6144), 9.4e6),
    "qwen2_moe": (dict(num_hidden_layers=24, hidden_size=2048, num_experts=60, moe_intermediate_size=1408,
                       num_experts_per_tok=4, shared_expert_intermediate_size=5632, num_attention_heads=16,
                       num_key_value_heads=16, vocab_size=151936, intermediate_size=5632), 17.3e6),
    "olmoe": (dict(num_hidden_layers=16, hidden_size=2048, num_experts=64, intermediate_size=1024,
                   num_experts_per_tok=8, num_attention_heads=16, num_key_value_heads=16, vocab_size=50304), 12.6e6),
}


def test_sizes_of_the_real_models_on_the_page_match_its_expert_bytes():
    # OPEN-CHECKPOINTS.md: one BF16 expert is 9.4 MB (qwen3_moe 30B), 17.3 MB (qwen2_moe A2.7B), 12.6 MB (olmoe)
    from moerun.files.ckpt_tensors import per_expert_shapes

    for mt, (fields, mb) in REAL.items():
        c = load_config_from({"model_type": mt, **fields})
        n = sum(2 * a * b for a, b in per_expert_shapes(c).values())
        assert round(n / 1e5) == round(mb / 1e5), mt
        if mt == "qwen3_moe":
            assert c.head_dim == 128 and c.q_dim == 4096 != c.hidden_size


@pytest.mark.parametrize("mt", TYPES)
def test_a_real_size_checkpoint_in_sparse_shards_opens_with_its_real_span_map_and_sizes(tmp_path, mt):
    # Headers of the real model's every tensor, in name order, dealt into shards of at most 4 GB as the library
    # does; the data is a hole (sparse files: no disk is used).  Experts straddle shard boundaries.
    fields, mb = REAL[mt]
    raw = {"model_type": mt, "torch_dtype": "bfloat16", **fields}
    shapes, moe = spec(raw)
    n_exp, i_exp = fields["num_experts"], fields.get("moe_intermediate_size") or fields["intermediate_size"]
    h = fields["hidden_size"]
    for layer in moe:
        for e in range(n_exp):
            shapes[f"model.layers.{layer}.mlp.experts.{e}.gate_proj.weight"] = (i_exp, h)
            shapes[f"model.layers.{layer}.mlp.experts.{e}.up_proj.weight"] = (i_exp, h)
            shapes[f"model.layers.{layer}.mlp.experts.{e}.down_proj.weight"] = (h, i_exp)
    shards: list[list[str]] = [[]]
    room = 0
    for name in sorted(shapes):
        nbytes = 2 * int(np.prod(shapes[name]))
        if room + nbytes > 4 << 30 and shards[-1]:
            shards.append([])
            room = 0
        shards[-1].append(name)
        room += nbytes
    d = tmp_path / "real"
    d.mkdir()
    files = [f"model-{i + 1:05d}-of-{len(shards):05d}.safetensors" for i in range(len(shards))]
    for fname, group in zip(files, shards):
        header, offset = {}, 0
        for name in group:
            nbytes = 2 * int(np.prod(shapes[name]))
            header[name] = {"dtype": "BF16", "shape": list(shapes[name]), "data_offsets": [offset, offset + nbytes]}
            offset += nbytes
        blob = json.dumps(header).encode()
        with open(d / fname, "wb") as f:
            f.write(struct.pack("<Q", len(blob)) + blob)
        os.truncate(d / fname, 8 + len(blob) + offset)
    wm = {n: files[i] for i, group in enumerate(shards) for n in group}
    (d / "model.safetensors.index.json").write_text(json.dumps({"metadata": {}, "weight_map": wm}))
    (d / "config.json").write_text(json.dumps(raw))
    with Checkpoint.open(d, require_tokenizer=False) as ck:
        s = ck.sizes()
        assert len(ck.files) == len(shards) > 1
        assert round(s.expert_stored / 1e5) == round(mb / 1e5)
        assert s.expert_stored == 3 * 2 * i_exp * h and s.expert_f32 == 2 * s.expert_stored
        assert s.experts == len(moe) * n_exp == fields["num_hidden_layers"] * n_exp
        dense = sum(2 * int(np.prod(sh)) for n, sh in spec(raw)[0].items() if n != "model.embed_tokens.weight")
        assert (s.dense_stored, s.dense_f32) == (dense, 2 * dense)
        assert s.embed_stored == 2 * fields["vocab_size"] * h
        straddling = [sp for row in ck.span_map if row for sp in row if len(sp.files) > 1]
        assert straddling  # the deal split some experts between two files
        sp = straddling[0]
        slot = np.full(s.expert_slot, 0xFF, np.uint8)
        gate, up, down = ck.page_in(sp.layer, sp.expert, slot)  # reads the hole: zeros, from two files
        assert gate.shape == (i_exp, h) and down.shape == (h, i_exp)
        assert not gate.any() and not up.any() and not down.any()


# ---------------------------------------------------------------------------- BF16, F16, F32


def test_bf16_hand_picked_values_widen_exactly():
    # Outside definition: bfloat16 is the top 16 bits of an IEEE-754 binary32 (as described in Intel's
    # "BFLOAT16 - Hardware Numerics Definition", 2018): sign, 8 exponent bits, 7 fraction bits.
    cases = {
        0x3F80: 1.0,
        0xC000: -2.0,
        0x0000: 0.0,
        0x3FC0: 1.5,
        0x4049: 3.140625,
        0x3E80: 0.25,
        0x4780: 65536.0,
        0x7F7F: 3.3895313892515355e38,  # the largest finite bfloat16
        0x0080: 2.0**-126,  # the smallest normal
        0x0001: 2.0**-133,  # the smallest subnormal
        0x7F80: np.inf,
        0xFF80: -np.inf,
    }
    got = decode_bf16(np.array(list(cases), "<u2"))
    assert got.dtype == np.float32
    assert got.tolist() == list(cases.values())
    neg_zero, nan = decode_bf16(np.array([0x8000, 0x7FC1], "<u2"))
    assert np.signbit(neg_zero) and neg_zero == 0
    assert np.isnan(nan) and np.array(nan, np.float32).view(np.uint32) == 0x7FC10000  # the payload is kept, not canonicalised


def test_bf16_round_trips_every_float32_whose_low_16_bits_are_zero():
    rng = np.random.default_rng(7)
    words = rng.integers(0, 1 << 32, 200_000, dtype=np.uint64).astype(np.uint32) & np.uint32(0xFFFF0000)
    words = np.concatenate([words, np.arange(0, 1 << 16, dtype=np.uint32) << 16])  # and every bfloat16 bit pattern
    f = words.view(np.float32)
    got = decode_bf16((words >> 16).astype("<u2"))
    assert bits(got) == bits(f)


def test_widening_allocates_nothing_per_call():
    rng = np.random.default_rng(3)
    src16 = rng.integers(0, 1 << 16, (768, 512), dtype=np.uint16).astype("<u2")
    srch = rng.standard_normal((768, 512)).astype("<f2")
    out = np.empty((768, 512), np.float32)  # 1.5 MiB
    widen_into(src16, "BF16", out)
    widen_into(srch, "F16", out)
    tracemalloc.start()
    try:
        for _ in range(3):
            widen_into(src16, "BF16", out)
            widen_into(srch, "F16", out)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 64 * 1024  # numpy traces its data allocations: nothing array-sized was made
    widen_into(srch, "F16", out)
    assert bits(out) == bits(srch.astype(np.float32))


def test_widening_refuses_a_mismatched_scratch_or_dtype():
    src = np.zeros((4, 3), "<u2")
    with pytest.raises(ValueError):
        widen_into(src, "BF16", np.empty((3, 4), np.float32))
    with pytest.raises(ValueError):
        widen_into(src, "BF16", np.empty((4, 3), np.float64))
    with pytest.raises(ValueError):
        widen_into(src, "BF16", np.empty((4, 6), np.float32)[:, ::2])
    with pytest.raises(ValueError):
        widen_into(src, "F16", np.empty((4, 3), np.float32))  # uint16 bits are not F16
    with pytest.raises(ValueError):
        widen_into(src, "I16", np.empty((4, 3), np.float32))


# ---------------------------------------------------------------------------- the directory


def test_an_open_checkpoint_is_told_from_a_moerun_model_directory(tmp_path, small_model):
    b = build(tmp_path / "ck", "olmoe")
    assert is_open_checkpoint(b.dir)
    assert not is_open_checkpoint(small_model)  # moerun's own: format tag and d_model
    assert not is_open_checkpoint(tmp_path / "nowhere")
    (tmp_path / "odd").mkdir()
    (tmp_path / "odd" / "config.json").write_text('{"model_type": "lichen_dense", "format": "moerun/1"}')
    assert not is_open_checkpoint(tmp_path / "odd")
    (tmp_path / "other").mkdir()
    (tmp_path / "other" / "config.json").write_text('{"model_type": "lichen_dense"}')
    assert is_open_checkpoint(tmp_path / "other")  # open, though not a supported type: Checkpoint.open says so


def test_bos_and_eos_come_from_generation_config_then_tokenizer_config_then_config(tmp_path):
    b = build(tmp_path / "ck", "qwen3_moe")
    with Checkpoint.open(b.dir) as ck:
        assert (ck.bos_ids, ck.eos_ids) == ((1,), (2,))  # config.json's
    (b.dir / "tokenizer_config.json").write_text(json.dumps({
        "bos_token": {"content": "<s>"}, "eos_token": "</s>",
        "added_tokens_decoder": {"5": {"content": "<s>"}, "6": {"content": "</s>"}},
    }))
    with Checkpoint.open(b.dir) as ck:
        assert (ck.bos_ids, ck.eos_ids) == ((5,), (6,))
    (b.dir / "generation_config.json").write_text(json.dumps({"bos_token_id": 7, "eos_token_id": [8, 9, 8]}))
    with Checkpoint.open(b.dir) as ck:
        assert (ck.bos_ids, ck.eos_ids) == ((7,), (8, 9))
    (b.dir / "generation_config.json").write_text(json.dumps({"eos_token_id": [10]}))
    with Checkpoint.open(b.dir) as ck:
        assert (ck.bos_ids, ck.eos_ids) == ((5,), (10,))  # each id from the first source that has it


def test_the_tokenizer_may_be_optional_for_callers_that_need_no_text(tmp_path):
    b = build(tmp_path / "ck", "qwen3_moe", tokenizer=False)
    with Checkpoint.open(b.dir, require_tokenizer=False) as ck:
        assert ck.tokenizer_path is None
    (b.dir / "tokenizer.json").write_text("{}")
    with Checkpoint.open(b.dir) as ck:
        assert ck.tokenizer_path == b.dir / "tokenizer.json"


def test_a_tied_checkpoint_has_no_lm_head_and_counts_the_table_once(tmp_path):
    raw = raw_config("olmoe", tie_word_embeddings=True)
    b = build(tmp_path / "ck", "olmoe", raw=raw)
    assert "lm_head.weight" not in b.values
    with Checkpoint.open(b.dir) as ck:
        s = ck.sizes()
        assert s.tied and s.embed_stored == VOCAB * H * 4
        assert load_checkpoint_config(b.dir).tie_word_embeddings
