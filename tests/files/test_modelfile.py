"""moerun.files.modelfile: header validation (docs/design/architecture.md, invariants: files are trusted only after validation) and the writer's layout.

Corrupt files are made by editing the header of a freshly written synthetic model.
"""

from __future__ import annotations

import json
import struct

import numpy as np
import pytest
from conftest import edit_header, read_raw, write_raw
from safetensors.numpy import load_file

from moerun.errors import BadModelFile
from moerun.files.modelfile import (
    MAX_HEADER_BYTES,
    digest,
    read_header,
    recorded_digests,
    save_model_file,
    storage_order,
)


def _weights(model_dir):
    return model_dir / "model.safetensors"


def test_written_file_header_is_accepted_and_lists_every_tensor(fresh_model):
    h = read_header(_weights(fresh_model))
    lib = load_file(str(_weights(fresh_model)))  # reference reader: safetensors 0.8.0
    assert set(h.tensors) == set(lib)
    for name, t in h.tensors.items():
        assert t.shape == lib[name].shape
        assert t.nbytes == lib[name].nbytes


def test_writer_stores_each_expert_as_one_contiguous_range_in_layer_expert_order(tmp_path):
    rng = np.random.default_rng(0)
    tensors = {"embed": rng.standard_normal((3, 2)).astype(np.float32)}
    for e in (0, 1, 2, 10, 11):  # experts.10 sorts before experts.2 as text; the writer must not care
        for part, shape in (("w_gate", (2, 3)), ("w_up", (2, 3)), ("w_down", (3, 2))):
            tensors[f"layers.0.experts.{e}.{part}"] = rng.standard_normal(shape).astype(np.float32)
    path = tmp_path / "m.safetensors"
    save_model_file(path, tensors)
    h = read_header(path)
    by_start = [t.name for t in sorted(h.tensors.values(), key=lambda t: t.start)]
    assert by_start == storage_order(tensors)
    expert_order = [n.split(".")[3] for n in by_start if ".experts." in n][::3]
    assert expert_order == ["0", "1", "2", "10", "11"]
    for e in (0, 1, 2, 10, 11):
        parts = [h.tensors[f"layers.0.experts.{e}.{p}"] for p in ("w_gate", "w_up", "w_down")]
        assert parts[0].end == parts[1].start and parts[1].end == parts[2].start


def test_writer_output_loads_identically_in_the_safetensors_library(tmp_path):
    rng = np.random.default_rng(1)
    tensors = {
        "a": rng.standard_normal((4, 5)).astype(np.float32),
        "b": rng.standard_normal(7).astype(np.float16),
        "c": np.arange(6, dtype=np.int64).reshape(2, 3),
    }
    path = tmp_path / "x.safetensors"
    save_model_file(path, tensors, {"k": "v"})
    lib = load_file(str(path))  # reference reader: safetensors 0.8.0
    assert set(lib) == set(tensors)
    for name, a in tensors.items():
        assert lib[name].dtype == a.dtype
        assert np.array_equal(lib[name], a)
    assert read_header(path).metadata["k"] == "v"


def test_writer_stores_big_endian_arrays_as_little_endian_values(tmp_path):
    path = tmp_path / "be.safetensors"
    values = np.arange(6, dtype=np.float32).reshape(2, 3)
    save_model_file(path, {"a": values.astype(">f4"), "b": np.array([1, -2], dtype=">i8")})
    lib = load_file(str(path))  # reference reader: safetensors 0.8.0 (the format is little-endian)
    assert np.array_equal(lib["a"], values)
    assert lib["b"].tolist() == [1, -2]


def test_writer_records_digests_that_match_the_stored_bytes(fresh_model):
    h = read_header(_weights(fresh_model))
    digests = recorded_digests(h)
    assert digests is not None and set(digests) == set(h.tensors)
    raw = _weights(fresh_model).read_bytes()
    for name, t in h.tensors.items():
        assert digests[name] == digest(raw[t.start : t.end])


def test_writer_leaves_no_temporary_file_behind(tmp_path):
    save_model_file(tmp_path / "m.safetensors", {"x": np.zeros(3, np.float32)})
    assert [p.name for p in tmp_path.iterdir()] == ["m.safetensors"]


# ---------------------------------------------------------------------------- corrupt headers


def _truncate_to(n):
    def corrupt(path):
        path.write_bytes(path.read_bytes()[:n])

    return corrupt


def _truncate_data(path):
    blob = path.read_bytes()
    path.write_bytes(blob[: len(blob) - 1000])


def _length_past_end(path):
    blob = path.read_bytes()
    path.write_bytes(struct.pack("<Q", len(blob)) + blob[8:])


def _length_implausible(path):
    blob = path.read_bytes()
    path.write_bytes(struct.pack("<Q", MAX_HEADER_BYTES + 1) + blob[8:])
    with open(path, "r+b") as f:
        f.truncate(MAX_HEADER_BYTES + 16)  # sparse: long enough that only the size limit is broken


def _not_json(path):
    doc, data = read_raw(path)
    head = json.dumps(doc).encode()
    write_raw(path, b"{" + b"x" * (len(head) - 1), data)


def _not_utf8(path):
    doc, data = read_raw(path)
    write_raw(path, b"\xff\xfe" + json.dumps(doc).encode(), data)


def _not_object(path):
    _, data = read_raw(path)
    write_raw(path, b"[1, 2, 3]", data)


def _set(name, key, value):
    def corrupt(path):
        edit_header(path, lambda doc: doc[name].__setitem__(key, value))

    return corrupt


def _offsets_outside(path):
    doc, data = read_raw(path)
    size = doc["final_norm"]["data_offsets"][1] - doc["final_norm"]["data_offsets"][0]
    doc["final_norm"]["data_offsets"] = [len(data), len(data) + size]
    write_raw(path, doc, data)


def _overlap(path):
    def edit(doc):
        doc["layers.0.moe_norm"]["data_offsets"] = list(doc["layers.0.attn_norm"]["data_offsets"])

    edit_header(path, edit)


def _size_mismatch(path):
    edit_header(path, lambda doc: doc["final_norm"].__setitem__("shape", [doc["final_norm"]["shape"][0] + 1]))


def _bad_metadata(path):
    edit_header(path, lambda doc: doc.__setitem__("__metadata__", {"format": 1}))


CORRUPTIONS = {
    "truncated to 5 bytes": (_truncate_to(5), "truncated"),
    "truncated inside the data": (_truncate_data, "outside the data"),
    "header length past the end": (_length_past_end, "past the end"),
    "header length implausible": (_length_implausible, "implausibly large"),
    "header not JSON": (_not_json, "not valid JSON"),
    "header not UTF-8": (_not_utf8, "not valid JSON"),
    "header not an object": (_not_object, "not a JSON object"),
    "unknown dtype": (_set("embed", "dtype", "F33"), "unknown dtype"),
    "negative shape": (_set("embed", "shape", [-1, 32]), "invalid shape"),
    "offsets not a pair": (_set("embed", "data_offsets", [0]), "invalid data_offsets"),
    "offsets outside the file": (_offsets_outside, "outside the data"),
    "overlapping offsets": (_overlap, "overlap"),
    "size disagrees with shape": (_size_mismatch, "needs"),
    "metadata not strings": (_bad_metadata, "__metadata__"),
}


@pytest.mark.parametrize("case", sorted(CORRUPTIONS))
def test_corrupt_header_raises_bad_model_file_naming_the_problem(fresh_model, case):
    corrupt, phrase = CORRUPTIONS[case]
    path = _weights(fresh_model)
    corrupt(path)
    with pytest.raises(BadModelFile) as err:
        read_header(path)
    message = str(err.value)
    assert phrase in message
    assert "\n" not in message


def test_missing_weight_file_raises_bad_model_file(tmp_path):
    with pytest.raises(BadModelFile, match="missing"):
        read_header(tmp_path / "model.safetensors")


def test_zero_sized_tensors_may_share_an_offset(tmp_path):
    path = tmp_path / "z.safetensors"
    save_model_file(path, {"a": np.zeros(0, np.float32), "b": np.zeros(0, np.float32), "c": np.ones(2, np.float32)})
    h = read_header(path)
    assert h.tensors["a"].nbytes == 0 and h.tensors["c"].nbytes == 8


def test_the_one_header_writer_serves_both_writers_and_the_safetensors_library_reads_it(tmp_path):
    from safetensors import safe_open

    from moerun.files.modelfile import header_bytes
    from moerun.makers.synthetic import write_tensors_streaming

    rng = np.random.default_rng(5)
    arrays = {"embed": rng.standard_normal((4, 3)).astype("<f4"), "norm": rng.standard_normal(5).astype("<f2")}
    whole, streamed = tmp_path / "whole.safetensors", tmp_path / "streamed.safetensors"
    save_model_file(whole, arrays, {"note": "n"})
    layout = [(name, "F32" if a.dtype == np.float32 else "F16", a.shape) for name, a in arrays.items()]
    write_tensors_streaming(streamed, layout, lambda name: [arrays[name]], {"note": "n"})
    assert whole.read_bytes() == streamed.read_bytes()
    # reference reader: the safetensors library (0.8.0): the values and the metadata come back as written
    with safe_open(str(whole), "numpy") as f:
        assert f.metadata()["note"] == "n" and f.metadata()["format"] == "moerun/1"
        for name, a in arrays.items():
            assert np.array_equal(f.get_tensor(name), a)
    blob = header_bytes([(n, t, s, int(np.prod(s)) * (4 if t == "F32" else 2)) for n, t, s in layout], {}, None)
    assert len(blob) % 8 == 0 and blob.rstrip(b" ").endswith(b"}")  # padded with spaces so the data starts aligned
