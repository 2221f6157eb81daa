"""moerun.files.checkpoint: a bad checkpoint directory is refused with one BadModelFile line naming the file and the field.

Each test breaks one thing in a freshly built tiny checkpoint (tests/files/test_checkpoint.py builds them).
"""

from __future__ import annotations

import json
import os
import shutil
import struct

import numpy as np
import pytest
from conftest import edit_header, read_raw, write_raw
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_checkpoint import E, build, raw_config, write_safetensors

from moerun.errors import BadModelFile
from moerun.files.checkpoint import INDEX_FILE, Checkpoint

SHARDS = [f"model-{i:05d}-of-00003.safetensors" for i in (1, 2, 3)]


def refused(directory, *fragments: str, **kw) -> str:
    with pytest.raises(BadModelFile) as ei:
        Checkpoint.open(directory, **kw)
    msg = str(ei.value)
    assert "\n" not in msg, msg
    for f in fragments:
        assert f in msg, msg
    return msg


def index(d) -> dict:
    return json.loads((d / INDEX_FILE).read_text())


def set_index(d, doc) -> None:
    (d / INDEX_FILE).write_text(doc if isinstance(doc, str) else json.dumps(doc))


@pytest.fixture
def sharded(tmp_path):
    return build(tmp_path / "ck", "qwen3_moe", "per_expert", "BF16", shards=3).dir


@pytest.fixture
def single(tmp_path):
    return build(tmp_path / "ck", "qwen2_moe", "fused", "F32").dir


# ---------------------------------------------------------------------------- the directory and the index


def test_a_missing_directory_or_a_file_in_its_place_is_refused(tmp_path):
    refused(tmp_path / "absent", "absent", "no such checkpoint directory")
    (tmp_path / "f").write_text("x")
    refused(tmp_path / "f", "not a directory")


def test_a_missing_shard_is_refused_naming_it_and_the_index(sharded):
    os.unlink(sharded / SHARDS[1])
    refused(sharded, str(sharded / SHARDS[1]), "missing", INDEX_FILE)


@pytest.mark.parametrize("name", ["../model-00002-of-00003.safetensors", "sub/model.safetensors", "/etc/passwd", "..", ".",
                                  "", "a\\b.safetensors", "x\n.safetensors", "\0", "\ud800.safetensors", 7, None])
def test_an_index_naming_anything_but_a_plain_file_name_inside_the_directory_is_refused(sharded, name):
    doc = index(sharded)
    first = sorted(doc["weight_map"])[0]
    doc["weight_map"][first] = name
    set_index(sharded, doc)
    refused(sharded, str(sharded / INDEX_FILE), "weight_map")


def test_a_shard_that_is_a_link_out_of_the_directory_is_refused(sharded, tmp_path):
    outside = tmp_path / "elsewhere.safetensors"
    shutil.move(sharded / SHARDS[2], outside)
    os.symlink(outside, sharded / SHARDS[2])
    refused(sharded, str(sharded / SHARDS[2]), "outside the checkpoint directory")
    os.unlink(sharded / SHARDS[2])
    os.symlink("../elsewhere.safetensors", sharded / SHARDS[2])  # relative, the same place
    refused(sharded, "outside the checkpoint directory")


def test_a_shard_that_is_a_link_inside_the_directory_is_read(sharded):
    os.rename(sharded / SHARDS[0], sharded / "blob-0")
    os.symlink("blob-0", sharded / SHARDS[0])
    with Checkpoint.open(sharded) as ck:
        assert len(ck.files) == 3


def test_a_weights_file_that_is_a_dangling_link_is_refused_as_missing(single):
    os.unlink(single / "model.safetensors")
    os.symlink("gone.safetensors", single / "model.safetensors")
    msg = refused(single, str(single / "model.safetensors"), "missing")
    assert INDEX_FILE not in msg


def test_a_shard_that_is_a_directory_or_a_fifo_is_refused(sharded):
    os.unlink(sharded / SHARDS[0])
    os.mkdir(sharded / SHARDS[0])
    refused(sharded, str(sharded / SHARDS[0]), "a directory")
    os.rmdir(sharded / SHARDS[0])
    try:
        os.mkfifo(sharded / SHARDS[0])
    except OSError as e:
        pytest.skip(f"cannot make a FIFO here ({e})")
    refused(sharded, str(sharded / SHARDS[0]), "FIFO")  # refused without blocking on it


@pytest.mark.parametrize("doc,fragment", [
    ("{not json", "not a JSON document"),
    ("[]", "expected a JSON object"),
    ({"metadata": {}}, "weight_map"),
    ({"weight_map": {}}, "weight_map"),
    ({"weight_map": ["a"]}, "weight_map"),
    ({"metadata": [], "weight_map": {"x": "model-00001-of-00003.safetensors"}}, "metadata"),
])
def test_a_malformed_index_is_refused_naming_it(sharded, doc, fragment):
    set_index(sharded, doc)
    refused(sharded, str(sharded / INDEX_FILE), fragment)


def test_an_index_naming_a_tensor_its_shard_lacks_is_refused(sharded):
    doc = index(sharded)
    doc["weight_map"]["model.layers.0.mlp.experts.9.up_proj.weight"] = SHARDS[0]
    set_index(sharded, doc)
    refused(sharded, str(sharded / SHARDS[0]), "lacks tensor 'model.layers.0.mlp.experts.9.up_proj.weight'", INDEX_FILE)


def test_a_shard_holding_a_tensor_the_index_does_not_name_is_refused(sharded):
    doc = index(sharded)
    name = "model.layers.2.mlp.experts.1.down_proj.weight"
    where = doc["weight_map"].pop(name)
    set_index(sharded, doc)
    refused(sharded, str(sharded / where), repr(name), "does not name it")


def test_a_shard_holding_a_tensor_the_index_maps_to_another_shard_is_refused(sharded):
    doc = index(sharded)
    name = "model.norm.weight"
    where = doc["weight_map"][name]
    other = next(s for s in SHARDS if s != where)
    doc["weight_map"][name] = other
    set_index(sharded, doc)
    msg = refused(sharded, repr(name))
    assert f"maps it to {other}" in msg or f"{other}: lacks tensor" in msg


def test_a_tensor_stored_in_two_shards_is_refused(sharded):
    doc, data = read_raw(sharded / SHARDS[0])
    name = next(n for n in doc if n != "__metadata__")
    other = sharded / SHARDS[1]
    odoc, odata = read_raw(other)
    entry = dict(doc[name])
    begin, end = entry["data_offsets"]
    entry["data_offsets"] = [len(odata), len(odata) + end - begin]
    odoc[name] = entry
    write_raw(other, odoc, odata + data[begin:end])
    refused(sharded, repr(name), "also in")


def test_both_a_single_file_and_an_index_are_refused_as_ambiguous(sharded):
    shutil.copy(sharded / SHARDS[0], sharded / "model.safetensors")
    refused(sharded, "model.safetensors", INDEX_FILE, "both")


def test_a_directory_without_weights_or_tokenizer_or_config_is_refused(single):
    os.unlink(single / "tokenizer.json")
    refused(single, str(single / "tokenizer.json"), "missing")
    os.unlink(single / "model.safetensors")
    refused(single, "no weights", "model.safetensors", INDEX_FILE, require_tokenizer=False)
    os.unlink(single / "config.json")
    refused(single, str(single / "config.json"), "missing")


def test_an_unsupported_model_type_is_refused_before_any_weight_is_read(single):
    (single / "config.json").write_text(json.dumps({**raw_config("qwen2_moe"), "model_type": "tarn_moe"}))
    os.unlink(single / "model.safetensors")
    refused(single, str(single / "config.json"), "'tarn_moe'", "qwen3_moe, qwen2_moe, olmoe")


@pytest.mark.parametrize("source,field", [("generation_config.json", "eos_token_id"), ("tokenizer_config.json", "bos_token_id")])
@pytest.mark.parametrize("value", [10_000, -1, "2", [1, True], 1.5])
def test_a_bos_or_eos_id_that_is_not_a_token_id_is_refused(single, source, field, value):
    (single / source).write_text(json.dumps({field: value}))
    refused(single, str(single / source), field)


# ---------------------------------------------------------------------------- the shards' headers


def test_a_truncated_shard_is_refused_naming_it(sharded):
    path = sharded / SHARDS[2]
    os.truncate(path, os.path.getsize(path) - 3)
    refused(sharded, str(path), "outside the data")
    os.truncate(path, 5)
    refused(sharded, str(path), "truncated")


def test_shard_headers_are_validated_as_moerun_files_are(single):
    path = single / "model.safetensors"
    doc, data = read_raw(path)
    names_ = [n for n in doc if n != "__metadata__"]
    a, b = names_[0], names_[1]
    doc[b]["data_offsets"] = [doc[a]["data_offsets"][0], doc[a]["data_offsets"][0] + doc[b]["data_offsets"][1] - doc[b]["data_offsets"][0]]
    write_raw(path, doc, data)
    refused(single, str(path), "overlap")
    with open(path, "r+b") as f:
        f.write(struct.pack("<Q", 1 << 40))
    refused(single, str(path), "header length")


def test_a_tensor_whose_shape_disagrees_with_the_config_is_refused(single):
    edit_header(single / "model.safetensors", lambda d: d["model.layers.1.mlp.gate.weight"].update(shape=[E * 16]))
    refused(single, "model.layers.1.mlp.gate.weight", "shape [64]", f"config.json implies [{E}, 16]")


def test_a_fused_expert_tensor_of_the_wrong_shape_is_refused(single):
    name = "model.layers.2.mlp.experts.gate_up_proj"
    edit_header(single / "model.safetensors", lambda d: d[name].update(shape=[2 * E, 8, 16]))  # the same bytes
    refused(single, repr(name), f"shape [{2 * E}, 8, 16]", f"[{E}, 16, 16]")


def test_a_config_that_disagrees_with_the_header_is_refused(single):
    raw = json.loads((single / "config.json").read_text())
    raw["moe_intermediate_size"] = 10
    (single / "config.json").write_text(json.dumps(raw))
    refused(single, "model.safetensors", "config.json implies")


def test_a_missing_expected_tensor_is_refused_naming_it(sharded):
    name = "model.layers.2.mlp.experts.3.up_proj.weight"
    doc = index(sharded)
    where = doc["weight_map"].pop(name)
    set_index(sharded, doc)
    edit_header(sharded / where, lambda d: d.pop(name))
    refused(sharded, "missing tensor", repr(name))


def test_a_tensor_no_config_expects_is_refused_naming_it(single):
    doc, data = read_raw(single / "model.safetensors")
    doc["model.layers.0.self_attn.rotary_emb.inv_freq"] = {"dtype": "F32", "shape": [2], "data_offsets": [len(data), len(data) + 8]}
    write_raw(single / "model.safetensors", doc, data + bytes(8))
    refused(single, "model.safetensors", "'model.layers.0.self_attn.rotary_emb.inv_freq'", "not part of the qwen2_moe model")


def test_an_lm_head_in_a_tied_checkpoint_is_refused(tmp_path):
    b = build(tmp_path / "ck", "olmoe", raw=raw_config("olmoe", tie_word_embeddings=True))
    doc, data = read_raw(b.dir / "model.safetensors")
    doc["lm_head.weight"] = {"dtype": "F32", "shape": [32, 16], "data_offsets": [len(data), len(data) + 32 * 16 * 4]}
    write_raw(b.dir / "model.safetensors", doc, data + bytes(32 * 16 * 4))
    refused(b.dir, "'lm_head.weight'", "not part of")


def test_a_layer_mixing_per_expert_and_fused_tensors_is_refused(tmp_path):
    fused = build(tmp_path / "f", "olmoe", "fused", "F32")
    per = build(tmp_path / "p", "olmoe", "per_expert", "F32", seed=0)
    pdoc, pdata = read_raw(per.dir / "model.safetensors")
    fdoc, fdata = read_raw(fused.dir / "model.safetensors")
    name = "model.layers.0.mlp.experts.gate_up_proj"
    entry = dict(fdoc[name])
    b0, b1 = entry["data_offsets"]
    entry["data_offsets"] = [len(pdata), len(pdata) + b1 - b0]
    pdoc[name] = entry
    write_raw(per.dir / "model.safetensors", pdoc, pdata + fdata[b0:b1])
    refused(per.dir, str(per.dir / "model.safetensors"), "layer 0", "both layouts", "'model.layers.0.mlp.experts.0.")


@pytest.mark.parametrize("dtype,size", [("I32", 4), ("F64", 8), ("F8_E4M3", 1), ("U8", 1)])
def test_a_tensor_of_a_dtype_other_than_bf16_f16_f32_is_refused(single, dtype, size):
    name = "model.norm.weight"

    def edit(d):
        b0, _ = d[name]["data_offsets"]
        d[name].update(dtype=dtype, shape=[16 * 4 // size], data_offsets=[b0, b0 + 64])

    edit_header(single / "model.safetensors", edit)
    refused(single, repr(name), f"dtype {dtype}", "BF16, F16 or F32")


def test_experts_of_mixed_dtypes_are_refused(tmp_path):
    b = build(tmp_path / "ck", "olmoe", "per_expert", "F32")
    doc, data = read_raw(b.dir / "model.safetensors")
    name = "model.layers.1.mlp.experts.2.up_proj.weight"
    b0, b1 = doc[name]["data_offsets"]
    half = (b1 - b0) // 2
    doc[name].update(dtype="F16", data_offsets=[b0, b0 + half])  # a gap after it is allowed; a dtype mix is not
    write_raw(b.dir / "model.safetensors", doc, data)
    refused(b.dir, repr(name), "F16", "F32", "one dtype")


def test_bf16_checkpoints_may_keep_dense_tensors_in_another_dtype(tmp_path):
    b = build(tmp_path / "ck", "qwen3_moe", "per_expert", "BF16")
    doc, data = read_raw(b.dir / "model.safetensors")
    arrays = {}
    for n, e in doc.items():
        if n == "__metadata__":
            continue
        b0, b1 = e["data_offsets"]
        a = np.frombuffer(data[b0:b1], "<u2").reshape(e["shape"])
        arrays[n] = ("BF16", a)
    norm = arrays["model.norm.weight"][1]
    arrays["model.norm.weight"] = ("F32", (norm.astype(np.uint32) << 16).view(np.float32))
    write_safetensors(b.dir / "model.safetensors", arrays)
    with Checkpoint.open(b.dir) as ck:
        assert ck.tensors["model.norm.weight"].info.dtype == "F32" and ck.expert_dtype == "BF16"
        assert np.array_equal(ck.tensor_f32("model.norm.weight"), b.values["model.norm.weight"])


# ---------------------------------------------------------------------------- fuzzing


_FUZZ = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
_names = st.one_of(
    st.sampled_from(SHARDS + ["../" + SHARDS[0], "/" + SHARDS[0], ".", "..", "", "model.safetensors", "x/" + SHARDS[1]]),
    st.text(max_size=12),
    st.integers(),
    st.none(),
)


@_FUZZ
@given(edits=st.lists(st.tuples(st.integers(0, 10_000), _names), max_size=4), drop=st.lists(st.integers(0, 10_000), max_size=3))
def test_any_edit_of_the_index_is_read_or_refused_with_one_line(tmp_path_factory, edits, drop):
    d = tmp_path_factory.mktemp("fz")
    if not (d / "ck").exists():
        build(d / "ck", "olmoe", "per_expert", "F16", shards=3)
    ck_dir = d / "ck"
    doc = index(ck_dir)
    keys = sorted(doc["weight_map"])
    for i, name in edits:
        doc["weight_map"][keys[i % len(keys)]] = name
    for i in drop:
        doc["weight_map"].pop(keys[i % len(keys)], None)
    set_index(ck_dir, doc)
    try:
        Checkpoint.open(ck_dir).close()
    except BadModelFile as e:
        assert "\n" not in str(e) and str(e)


@_FUZZ
@given(data=st.data())
def test_any_byte_of_a_shard_header_changed_is_read_or_refused_with_one_line(tmp_path_factory, data):
    d = tmp_path_factory.mktemp("fz")
    b = build(d / "ck", "qwen3_moe", "fused", "BF16", shards=2)
    path = b.dir / "model-00001-of-00002.safetensors"
    blob = bytearray(path.read_bytes())
    (n,) = struct.unpack("<Q", blob[:8])
    for _ in range(data.draw(st.integers(1, 3))):
        pos = data.draw(st.integers(8, 8 + n - 1))  # the JSON (the length prefix has tests of its own)
        blob[pos] = data.draw(st.sampled_from(list(b'0123456789[]{},:"-. ') + [0, 0x80, 0xFF]))
    path.write_bytes(bytes(blob))
    try:
        with Checkpoint.open(b.dir) as ck:
            slot = np.zeros(ck.sizes().expert_slot, np.uint8)
            for row in ck.span_map:
                for sp in row or ():
                    ck.page_in(sp.layer, sp.expert, slot)  # whatever was accepted can be read
    except BadModelFile as e:
        assert "\n" not in str(e) and str(e)
