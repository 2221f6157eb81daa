"""A warm start in the live engine (generate --warm-from, load(warm_from=)): the output stays bit-identical, the pool
holds what the decision core decided, and the first token reads fewer experts."""

from __future__ import annotations

import numpy as np
import pytest

import moerun
from moerun.files.profile import Profile, read_profile, write_profile
from moerun.model.sampling import Sampling
from moerun.policies import LRU
from moerun.runtime.budget import minimum_cap
from moerun.runtime.decisions import hottest, make_decisions
from moerun.runtime.slots import READY

pytestmark = pytest.mark.usefixtures("every_guess_read")  # the prefetch machinery runs whatever guesses cost

PROMPT = list(range(5, 37))
SAMPLING = Sampling(temperature=0.8, top_p=0.95, seed=0)


def _bits(a) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float32).view(np.uint32)


def _run(model_dir, **kw):
    with moerun.load(model_dir, tokenizer=False, **kw) as eng:
        full = eng.logits(PROMPT)
        gen = eng.generate(prompt_ids=PROMPT, max_new=12, sampling=SAMPLING, keep_logits=True)
        return _bits(full), gen.new_ids, _bits(np.stack(gen.logits)), eng.stats


def _same(a, b) -> bool:
    return np.array_equal(a[0], b[0]) and a[1] == b[1] and np.array_equal(a[2], b[2])


def _caps(model_dir, split):
    with moerun.load(model_dir, tokenizer=False) as eng:
        st = eng.store
        return minimum_cap(st.config, st.dense_nbytes, st.expert_nbytes, split), eng.budget.total


@pytest.fixture(scope="module")
def profiles(tmp_path_factory):
    """A profile of each bundled model's held-out text (its first 400 tokens)."""
    from conftest import BUNDLED

    d = tmp_path_factory.mktemp("profiles")
    out = {}
    for name, path in BUNDLED.items():
        if (path / "model.safetensors").exists():
            moerun.profile(d / f"{name}.json", path, max_tokens=400)
            out[path.name] = d / f"{name}.json"
    return out


def test_warm_output_equals_cold_and_resident_bit_for_bit(bundled, profiles):
    ref = _run(bundled)
    for split in ("even", "shared"):
        lo, hi = _caps(bundled, split)
        cap = lo + (hi - lo) // 3
        for kw in ({}, {"prefetch": 2}):
            cold = _run(bundled, mem_cap=cap, split=split, **kw)
            warm = _run(bundled, mem_cap=cap, split=split, warm_from=profiles[bundled.name], **kw)
            assert warm[3]["pool"]["warm_loads"] > 0 and cold[3]["pool"]["warm_loads"] == 0
            assert warm[3]["pool"]["misses"] > 0  # the cap still forces page-ins after the fill
            assert _same(ref, cold) and _same(ref, warm), (split, kw)


def test_after_the_fill_the_pool_holds_what_the_decision_core_decides(bundled, profiles):
    prof = read_profile(profiles[bundled.name])
    for split in ("even", "shared"):
        lo, hi = _caps(bundled, split)
        with moerun.load(bundled, tokenizer=False, mem_cap=lo + (hi - lo) // 3, split=split, warm_from=prof) as eng:
            pool = eng.pool
            n = eng.warm_start()
            c = eng.config
            core = make_decisions(lambda _: LRU(), list(eng.budget.slots), c.n_layers, c.n_experts, split == "shared")
            expected = core.warm(hottest(prof.counts))
            assert n == len(expected) == pool.stats.warm_loads
            if split == "shared":  # one pool: keys are layer * n_experts + expert
                held = {divmod(k, c.n_experts) for k in pool.res_of[0].slot_of}
            else:
                held = {(layer, k) for layer in range(c.n_layers) for k in pool.res_of[layer].slot_of}
            assert held == {(layer, e) for layer, e, _ in expected}
            # the hottest by count, worked out here with numpy: per layer its quota's worth, or of all layers at once
            order = np.lexsort((np.tile(np.arange(c.n_experts), c.n_layers), np.repeat(np.arange(c.n_layers), c.n_experts),
                                -prof.counts.reshape(-1)))
            order = [i for i in order.tolist() if prof.counts.reshape(-1)[i] > 0]
            if split == "shared":
                top = order[: eng.budget.slots[0]]
            else:
                top = [i for layer in range(c.n_layers) for i in [j for j in order if j // c.n_experts == layer][: eng.budget.slots[layer]]]
            assert held == {divmod(i, c.n_experts) for i in top}
            for layer, e, slot in expected:  # each slot holds that expert's bytes, ready
                s = pool.slots[slot]
                assert (s.layer, s.expert, s.state) == (layer, e, READY)
                ref = np.zeros_like(s.buf)
                eng.store.copy_in(layer, e, ref)
                assert np.array_equal(ref, s.buf)


def test_the_first_token_reads_fewer_experts_by_the_warmed_ones_it_uses(pebble, tmp_path):
    """A one-token prompt: its prefill reads each layer's chosen experts.  Warm two per layer, one the token
    chooses and one it does not, into quotas with room for both and the token's misses: nothing is evicted, so
    the first token's reads drop by exactly one per layer."""
    slots = [4, 4, 4, 4]
    with moerun.load(pebble, tokenizer=False, mem_cap="1GiB", slots=slots) as eng:
        eng.start_trace()
        eng.generate(prompt_ids=[7], max_new=1)
        cold = eng.stats["pool"]
        chosen = eng.finish_trace().experts[0]  # [layers, top_k]
    L, E = chosen.shape[0], 8
    counts = np.zeros((L, E), np.int64)
    for layer in range(L):
        used = int(chosen[layer][0])
        unused = next(e for e in range(E) if e not in chosen[layer].tolist())
        counts[layer, used] = 5
        counts[layer, unused] = 9
    with moerun.load(pebble, tokenizer=False) as eng:
        c = eng.config
    prof = Profile(counts, {"name": c.name, "layers": L, "experts": E, "top_k": c.top_k, "d_model": c.d_model},
                   {"kind": "text", "file": "made here", "blake2b": "", "tokens": 0})
    write_profile(tmp_path / "p.json", prof)
    with moerun.load(pebble, tokenizer=False, mem_cap="1GiB", slots=slots, warm_from=tmp_path / "p.json") as eng:
        eng.generate(prompt_ids=[7], max_new=1)
        warm = eng.stats["pool"]
    assert warm["warm_loads"] == 2 * L
    assert cold["prefill_loads"] == L * c.top_k
    assert warm["prefill_loads"] == cold["prefill_loads"] - L
    assert warm["bytes_paged_in"] == cold["bytes_paged_in"] - L * eng.store.expert_nbytes


def test_the_fill_is_charged_to_the_first_prefill_and_shown(pebble, tmp_path, capsys):
    from moerun.cli import main as cli

    moerun.profile(tmp_path / "p.json", pebble, max_tokens=200)
    capsys.readouterr()
    assert cli.main(["generate", "--model", str(pebble), "--mem-cap", "14MiB", "--max-new", "3", "--prompt", "a",
                     "--warm-from", str(tmp_path / "p.json")]) == 0
    err = capsys.readouterr().err
    assert "warm start from" in err and "experts read before the first token" in err
    with moerun.load(pebble, mem_cap="14MiB", warm_from=tmp_path / "p.json") as eng:
        gen = eng.generate("a", max_new=2)
        st = eng.stats["pool"]
        assert st["warm_loads"] > 0 and 0 < st["warm_s"] * 1e9 <= gen.prefill_ns
        assert eng.options["warm_from"] == str(tmp_path / "p.json")
        eng.generate("b", max_new=2)
        assert eng.stats["pool"]["warm_loads"] == st["warm_loads"]  # once per engine
