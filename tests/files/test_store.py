"""moerun.files.store: the opened model file agrees with the reference reader, and rejects files that disagree with config.json.

Reference reader: the safetensors library, version 0.8.0 (``safetensors.numpy.load_file``).
"""

from __future__ import annotations

import os
import random
import shutil

import numpy as np
import pytest
from conftest import edit_config, edit_header
from safetensors.numpy import load_file, save_file

import moerun
from moerun.errors import BadModelFile
from moerun.files.store import MECHANISMS, ModelStore
from moerun.makers.synthetic import random_tensors, synth_config, write_model


def _bits(a: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float32).view(np.uint32)


def test_every_tensor_read_by_the_store_equals_the_safetensors_library(small_model):
    lib = load_file(str(small_model / "model.safetensors"))  # reference: safetensors 0.8.0
    store = ModelStore.open(small_model)
    try:
        assert set(store.header.tensors) == set(lib)
        for name, ref in lib.items():
            got = store.read_tensor(name)
            assert got.dtype == ref.dtype and got.shape == ref.shape
            assert np.array_equal(got, ref)
        for name, arr in store.dense.items():
            assert np.array_equal(arr, lib[name])
    finally:
        store.close()


@pytest.mark.parametrize("mechanism", MECHANISMS)
def test_paged_in_expert_equals_the_safetensors_library(small_model, mechanism):
    lib = load_file(str(small_model / "model.safetensors"))  # reference: safetensors 0.8.0
    store = ModelStore.open(small_model)
    try:
        store.set_mechanism(mechanism)
        slot = np.zeros(store.expert_nbytes + 4096, np.uint8)
        bound = store.codec.bind(slot)
        c = store.config
        for layer in range(c.n_layers):
            for e in range(c.n_experts):
                ns = store.page_in(layer, e, slot)
                assert ns >= 0
                for part, got in zip(("w_gate", "w_up", "w_down"), store.codec.weights(bound)):
                    assert np.array_equal(got, lib[f"layers.{layer}.experts.{e}.{part}"])
    finally:
        store.close()


def test_file_written_by_the_safetensors_library_gives_identical_logits(tmp_path):
    # 12 experts: the library orders tensors by dtype, then by name as text
    # (safetensors 0.8.0), so experts.10 lands before experts.2 and w_down before w_gate.
    config = synth_config(layers=2, experts=12, top_k=2)
    ours = write_model(tmp_path / "ours", config, seed=5)
    theirs = tmp_path / "theirs"
    theirs.mkdir()
    for name in ("config.json", "tokenizer.json"):
        shutil.copy(ours / name, theirs / name)
    save_file(random_tensors(config, seed=5), str(theirs / "model.safetensors"))
    store = ModelStore.open(theirs)
    try:
        starts = [store.expert_range(0, e).start for e in range(12)]
        assert starts != sorted(starts)  # really the library's order, not ours
        assert all(r.nbytes == store.expert_nbytes for row in store.ranges for r in row)
    finally:
        store.close()
    ids = [0, 3, 250, 7, 7, 100, 42, 1]
    with moerun.load(ours) as a, moerun.load(theirs) as b:
        assert np.array_equal(_bits(a.logits(ids)), _bits(b.logits(ids)))
    with moerun.load(ours, mem_cap="1GiB", slots=[2, 3]) as a, moerun.load(theirs, mem_cap="1GiB", slots=[2, 3]) as b:
        ga = a.generate(prompt_ids=ids, max_new=6, keep_logits=True)
        gb = b.generate(prompt_ids=ids, max_new=6, keep_logits=True)
        assert ga.new_ids == gb.new_ids
        assert np.array_equal(_bits(np.stack(ga.logits)), _bits(np.stack(gb.logits)))


def test_open_rejects_a_missing_directory(tmp_path):
    with pytest.raises(BadModelFile, match="no such model directory"):
        ModelStore.open(tmp_path / "nowhere")


def test_open_rejects_a_missing_dense_tensor(fresh_model):
    edit_header(fresh_model / "model.safetensors", lambda doc: doc.pop("final_norm"))
    with pytest.raises(BadModelFile, match="missing tensor 'final_norm'"):
        ModelStore.open(fresh_model)


def test_open_rejects_a_missing_expert_tensor(fresh_model):
    edit_header(fresh_model / "model.safetensors", lambda doc: doc.pop("layers.1.experts.3.w_up"))
    with pytest.raises(BadModelFile, match="missing tensor 'layers.1.experts.3.w_up'"):
        ModelStore.open(fresh_model)


def test_open_rejects_dense_shapes_that_disagree_with_config(fresh_model):
    edit_config(fresh_model, lambda c: c.__setitem__("vocab_size", c["vocab_size"] + 1))
    with pytest.raises(BadModelFile, match="config.json implies"):
        ModelStore.open(fresh_model)


def test_open_rejects_expert_shapes_that_disagree_with_config(fresh_model):
    edit_config(fresh_model, lambda c: c.__setitem__("d_expert", c["d_expert"] * 2))
    with pytest.raises(BadModelFile, match="expected F32"):
        ModelStore.open(fresh_model)


def test_shared_expert_is_dense_resident_and_equals_the_safetensors_library(synth_models):
    d = synth_models(seed=2, layers=2, experts=8, top_k=2, d_shared=48)
    plain = synth_models(seed=2, layers=2, experts=8, top_k=2)
    lib = load_file(str(d / "model.safetensors"))  # reference: safetensors 0.8.0
    store, other = ModelStore.open(d), ModelStore.open(plain)
    try:
        c = store.config
        for layer in range(c.n_layers):
            for part in ("w_gate", "w_up", "w_down"):
                name = f"layers.{layer}.shared.{part}"
                assert np.array_equal(store.dense[name], lib[name])
        # counted in the fixed part: exactly its three float32 matrices per layer more than without it
        assert store.dense_nbytes - other.dense_nbytes == c.n_layers * 3 * c.d_model * 48 * 4
        assert store.expert_nbytes == other.expert_nbytes
    finally:
        store.close()
        other.close()


@pytest.mark.parametrize(
    ("edit", "phrase"),
    [
        (lambda doc: doc.pop("layers.1.shared.w_up"), "missing tensor 'layers.1.shared.w_up'"),
        (lambda doc: doc["layers.0.shared.w_down"].__setitem__("shape", [16, 48]), "layers.0.shared.w_down"),
    ],
)
def test_open_rejects_a_shared_expert_that_disagrees_with_config(tmp_path, edit, phrase):
    d = write_model(tmp_path / "m", synth_config(layers=2, experts=4, top_k=2, d_shared=16))
    edit_header(d / "model.safetensors", edit)
    with pytest.raises(BadModelFile, match=phrase):
        ModelStore.open(d)


def test_open_rejects_shared_expert_tensors_when_config_has_no_d_shared(tmp_path):
    d = write_model(tmp_path / "m", synth_config(layers=2, experts=4, top_k=2, d_shared=16))
    edit_config(d, lambda c: c.pop("d_shared"))
    with pytest.raises(BadModelFile, match="shared expert's, but config.json has no d_shared"):
        ModelStore.open(d)


def test_open_rejects_an_expert_split_across_the_file(tmp_path):
    config = synth_config(layers=1, experts=2, top_k=1)
    tensors = random_tensors(config)
    # put expert 0's w_up after expert 1 by renaming: swap the two experts' w_up byte ranges
    d = write_model(tmp_path / "m", config, tensors=tensors)

    def swap(doc):
        a, b = doc["layers.0.experts.0.w_up"], doc["layers.0.experts.1.w_up"]
        a["data_offsets"], b["data_offsets"] = b["data_offsets"], a["data_offsets"]

    edit_header(d / "model.safetensors", swap)
    with pytest.raises(BadModelFile, match="contiguous"):
        ModelStore.open(d)


def test_open_rejects_dense_weights_holding_nan(tmp_path):
    config = synth_config(layers=1, experts=2, top_k=1)
    tensors = random_tensors(config)
    tensors["final_norm"][3] = np.nan
    d = write_model(tmp_path / "m", config, tensors=tensors)
    with pytest.raises(BadModelFile, match="NaN"):
        ModelStore.open(d)


def test_float16_file_gives_the_logits_of_its_float32_widening(tmp_path):
    config = synth_config(layers=2, experts=4, top_k=2)
    t32 = random_tensors(config, seed=2)
    t16 = {k: v.astype(np.float16) for k, v in t32.items()}
    widened = {k: v.astype(np.float32) for k, v in t16.items()}
    d16 = write_model(tmp_path / "f16", config, tensors=t16)
    d32 = write_model(tmp_path / "f32", config, tensors=widened)
    ids = [0, 5, 9, 200, 31]
    with moerun.load(d16, mem_cap="1GiB", slots=[2, 2]) as a, moerun.load(d32) as b:
        assert a.store.codec.name == "F16"
        assert np.array_equal(_bits(a.logits(ids)), _bits(b.logits(ids)))



def _mapped_rss_bytes(path) -> int:
    """Resident bytes of this process's mappings of ``path`` (Linux /proc/self/smaps)."""
    total, inside = 0, False
    with open("/proc/self/smaps") as f:
        for line in f:
            if not line[:1].isupper():  # a mapping's header line: address range, perms, ..., path
                inside = line.rstrip().endswith(str(path))
            elif inside and line.startswith("Rss:"):
                total += int(line.split()[1]) * 1024
    return total


def test_mmap_page_in_leaves_no_mapped_file_pages_resident(synth_models):
    if not os.path.exists("/proc/self/smaps"):
        pytest.skip("needs Linux /proc/self/smaps")
    d = synth_models(layers=4, experts=12, top_k=2, d_model=128, d_expert=512, n_heads=4, n_kv_heads=2, head_dim=32, max_seq_len=128)
    store = ModelStore.open(d)
    try:
        store.set_mechanism("mmap")
        slot = np.empty(store.expert_nbytes, np.uint8)
        order = [(layer, e) for layer in range(4) for e in range(12)]
        random.Random(0).shuffle(order)
        for layer, e in order:
            store.page_in(layer, e, slot)
        # Before the fix each read left the kernel's fault-around window (64 KiB) of neighbouring
        # file pages mapped: about 1.4 MiB for these 48 experts, more than one expert (768 KiB).
        assert _mapped_rss_bytes(store.path.resolve()) < store.expert_nbytes
    finally:
        store.close()


# the file shrinks after the size check, while the copy runs: simulated by letting the store's own size
# check see the size the file had when the copy began (os.fstat patched), then truncating it
_SHRINK_DURING_COPY = """
import os, sys
import numpy as np
import moerun.files.store as store_mod
from moerun.errors import PageInError
store = store_mod.ModelStore.open(sys.argv[1])
store.set_mechanism("mmap")
size = os.fstat(store._fd).st_size
real_fstat = os.fstat
store_mod.os.fstat = lambda fd: os.stat_result((*real_fstat(fd)[:6], size, *real_fstat(fd)[7:]))
last = store.ranges[-1][-1]
os.truncate(store.path, last.start + 8)  # the expert's first page stays, the rest of it is gone
slot = np.zeros(store.expert_nbytes, np.uint8)
try:
    store.page_in(last.layer, last.expert, slot)
except PageInError as e:
    print("PageInError:", e)
    sys.exit(2)
sys.exit(0)
"""


def test_mmap_copy_of_a_file_that_shrinks_during_the_copy_is_page_in_error_not_sigbus(synth_models, tmp_path):
    import subprocess
    import sys

    from conftest import ROOT

    d = tmp_path / "m"
    shutil.copytree(synth_models(layers=2, experts=4, top_k=2, d_model=64, d_expert=256), d)
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    proc = subprocess.run([sys.executable, "-c", _SHRINK_DURING_COPY, str(d)], capture_output=True, text=True, env=env, timeout=120)
    assert proc.returncode == 2, f"exit {proc.returncode} (negative: killed by signal {-proc.returncode}) {proc.stderr[-300:]}"
    assert "PageInError" in proc.stdout and "file ended" in proc.stdout


def test_mmap_pages_in_the_same_bytes_as_pread(small_model):
    store = ModelStore.open(small_model)
    try:
        a = np.zeros(store.expert_nbytes, np.uint8)
        b = np.zeros(store.expert_nbytes, np.uint8)
        for layer in range(store.config.n_layers):
            for e in range(store.config.n_experts):
                store.set_mechanism("pread")
                store.page_in(layer, e, a)
                store.set_mechanism("mmap")
                store.page_in(layer, e, b)
                assert np.array_equal(a, b)
    finally:
        store.close()
