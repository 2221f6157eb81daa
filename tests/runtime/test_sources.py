"""moerun.runtime.sources: expert sources without a pool (all resident, whole-layer, no-reuse).

Each must hand the model the very bytes of the file (the store's ``read_tensor`` is the reference: a plain
read of the tensor), and the two naive baselines must move exactly the bytes their rule says: a
whole-layer source reads every expert of a layer each time the layer runs, a no-reuse source reads each
expert each time it is used.  The engine's outputs with either are bit-identical to the resident run's.
"""

from __future__ import annotations

import numpy as np
import pytest

import moerun
from moerun.files.config import expert_tensor_name
from moerun.files.store import ModelStore
from moerun.model.sampling import Sampling
from moerun.runtime.sources import BareExperts, NoReuseExperts, WholeLayerExperts, aligned_block


def test_an_aligned_block_starts_on_a_4_kib_boundary_and_is_zeroed():
    for n in (1, 4095, 4096, 10_000):
        block, raw = aligned_block(n)
        assert block.size == n and block.ctypes.data % 4096 == 0 and not block.any()
        assert np.shares_memory(block, raw)


@pytest.mark.parametrize("cls", [BareExperts, WholeLayerExperts, NoReuseExperts])
def test_every_source_gives_the_files_bytes(small_model, cls):
    store = ModelStore.open(small_model)
    try:
        src = cls(store)
        for layer in range(store.config.n_layers):
            src.begin_layer(layer)
            for e in range(store.config.n_experts):
                got = src.weights(layer, e)
                for part, w in zip(("w_gate", "w_up", "w_down"), got):
                    ref = store.read_tensor(expert_tensor_name(layer, e, part)).astype(np.float32)
                    assert np.array_equal(w, ref), (cls.__name__, layer, e, part)
            src.end_layer(layer)
    finally:
        store.close()


def test_the_baselines_move_the_bytes_their_rule_says(small_model):
    store = ModelStore.open(small_model)
    try:
        c, nbytes = store.config, store.expert_nbytes
        whole, none = WholeLayerExperts(store), NoReuseExperts(store)
        for src in (whole, none):
            for layer in range(c.n_layers):
                src.begin_layer(layer)
                for e in (0, 1, 0):  # expert 0 used twice in the layer
                    src.weights(layer, e)
        assert whole.bytes_in == c.n_layers * c.n_experts * nbytes
        assert none.bytes_in == c.n_layers * 3 * nbytes
        assert BareExperts(store).bytes_in == 0  # read at construction, never again
    finally:
        store.close()


@pytest.mark.parametrize("baseline", ["whole-layer", "no-reuse"])
def test_generating_through_a_baseline_gives_the_resident_bits(small_model, baseline):
    prompt, s = [1, 5, 9, 2], Sampling(0.9, 0.95, 4)
    with moerun.load(small_model, tokenizer=False) as eng:
        ref = eng.generate(prompt_ids=prompt, max_new=5, sampling=s, keep_logits=True)
    with moerun.load(small_model, tokenizer=False, baseline=baseline) as eng:
        got = eng.generate(prompt_ids=prompt, max_new=5, sampling=s, keep_logits=True)
    assert got.new_ids == ref.new_ids
    assert np.array_equal(np.stack(got.logits).view(np.uint32), np.stack(ref.logits).view(np.uint32))
