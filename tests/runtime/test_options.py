"""EngineOptions: load()'s settings as one frozen dataclass; the keyword form and the options form are one call."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

import moerun
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
