"""EngineOptions: load()'s settings as one frozen dataclass; the keyword form and the options form are one call."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

import moerun
from moerun.cli import main as cli
from moerun.errors import BadOption
from moerun.runtime.options import EngineOptions


def test_keywords_and_options_build_the_same_engine(small_model):
    kw = {"mem_cap": "1GiB", "slots": [2, 3, 2], "evict": "lfu", "prefetch": 1, "link_speed": "2GB/s"}
    with moerun.load(small_model, **kw) as a, moerun.load(small_model, options=moerun.EngineOptions(**kw)) as b:
        assert a.options == b.options
        assert a.budget.to_json() == b.budget.to_json()
        ids = [1, 2, 3, 4]
        assert np.array_equal(a.logits(ids), b.logits(ids))


def test_options_are_checked_parsed_and_frozen():
    o = EngineOptions(mem_cap="14MiB", link_speed="2GB/s", slots=[3, 4, 3])
    assert o.mem_cap == 14 * 2**20 and o.link_speed == 2e9 and o.slots == (3, 4, 3)
    assert EngineOptions(**{f.name: getattr(o, f.name) for f in dataclasses.fields(o)}) == o  # parsing is idempotent
    with pytest.raises(dataclasses.FrozenInstanceError):
        o.evict = "fifo"
    with pytest.raises(BadOption, match="lookahead"):
        EngineOptions(prefetch=1, lookahead=0)
    with pytest.raises(BadOption, match="unknown eviction policy|evict"):
        EngineOptions(evict="no-such-policy")


def test_keywords_replace_fields_of_the_options_given(small_model):
    with moerun.load(small_model, options=EngineOptions(evict="fifo", mem_cap="1GiB"), evict="lru", tokenizer=False) as eng:
        assert eng.options["evict"] == "lru" and eng.options["mem_cap"] == 2**30


def test_a_setting_load_does_not_know_is_a_type_error_and_options_must_be_engine_options(small_model):
    with pytest.raises(TypeError, match="memcap"):
        moerun.load(small_model, memcap="14MiB")
    with pytest.raises(BadOption, match="EngineOptions"):
        moerun.load(small_model, "14MiB")


def test_prefetch_on_a_one_layer_model_is_refused_for_what_it_is_not_for_a_lookahead_never_given(synth_models, capsys):
    # issue 23, item 14
    from moerun.cli.main import main

    one = synth_models(seed=9, layers=1, experts=4, top_k=2)
    assert main(["generate", "--model", str(one), "--prefetch", "1", "--max-new", "1", "--prompt", "a"]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "one layer" in err and "--lookahead" not in err


# ---------------------------------------------------------------------------- max_context (issue 22: the KV cache
# holds the context the user asks for, not the model's maximum)


def test_max_context_sizes_the_kv_cache_and_leaves_the_numbers_alone():
    import numpy as np

    full = moerun.load("pebble")
    short = moerun.load("pebble", max_context=64)
    try:
        assert short.config.max_seq_len == 64 and short.budget.kv_cache * 4 == full.budget.kv_cache  # pebble's is 256
        ids = full.tokenizer.encode("The keepers check the mesh")
        assert np.array_equal(full.logits(ids), short.logits(ids))  # the rotary angles of a position do not depend on it
    finally:
        full.close()
        short.close()


def test_max_context_cannot_exceed_the_models_and_an_open_checkpoint_defaults_to_4096(tmp_path):
    from moerun.files.ckpt_store import DEFAULT_CONTEXT
    from moerun.makers.synth_open import OpenShape, synthesize_open

    d = tmp_path / "ck"
    synthesize_open(d, OpenShape("olmoe", layers=1, experts=4, hidden=64, expert_width=32, context=32768))
    with moerun.load(d) as eng:
        assert eng.config.max_seq_len == DEFAULT_CONTEXT == 4096
    with moerun.load(d, max_context=100_000) as eng:
        assert eng.config.max_seq_len == 32768
    with moerun.load("pebble", max_context=10_000) as eng:
        assert eng.config.max_seq_len == 256


@pytest.mark.parametrize("bad", [0, -1, 2.5, "64", True])
def test_a_bad_max_context_is_refused_before_anything_is_opened(bad):
    with pytest.raises(BadOption, match="max-context"):
        EngineOptions(max_context=bad)


def test_a_prompt_longer_than_max_context_is_refused_in_one_line(capsys):
    code = cli.main(["generate", "--model", "pebble", "--prompt", "word " * 200, "--max-context", "32", "--max-new", "2"])
    out, err = capsys.readouterr()
    assert code == 2 and out == "" and len(err.strip().splitlines()) == 1 and "32" in err
