"""moerun.load and the engine's own checks: arguments of the wrong type or range are the project's errors."""

from __future__ import annotations

import numpy as np
import pytest
from conftest import edit_config

import moerun
from moerun.errors import BadModelFile, BadOption


@pytest.mark.parametrize(("kwargs", "phrase"), [
    ({"lookahead": 1.5, "prefetch": 2}, "lookahead"),
    ({"prefetch": "2"}, "prefetch"),
    ({"prefetch": True}, "prefetch"),
    ({"slots": "3,3,3"}, "slots"),
    ({"slots": [3, "3", 3]}, "slots"),
    ({"slots": [3, 3, 3], "split": "shared"}, "contradict"),
    ({"mechanism": "sendfile"}, "mechanism"),
    ({"split": "uneven"}, "split"),
    ({"evict": None}, "evict"),
    ({"mem_cap": 12.5e6}, "memory cap"),
    ({"mem_cap": True}, "memory cap"),
    ({"link_speed": float("nan")}, "link speed"),
    ({"cold": "yes"}, "cold"),
    ({"model_dir": 42}, "model_dir"),
])
def test_load_arguments_of_the_wrong_type_or_value_raise_bad_option(small_model, kwargs, phrase):
    kw = {"model_dir": small_model, **kwargs}
    with pytest.raises(BadOption, match=phrase):
        moerun.load(**kw).close()


@pytest.mark.parametrize("ids", [[2**70], [1, -1], [1.5, 2.0], ["a"], "hello", [[1, 2], [3]], [True], [float("inf")],
                                 np.array([2**64 - 1], np.uint64)])
def test_token_ids_that_are_not_whole_numbers_in_the_vocabulary_raise_bad_option(small_model, ids):
    with moerun.load(small_model, tokenizer=False) as eng:
        with pytest.raises(BadOption, match="token ids|at least one token"):
            eng.logits(ids)
        with pytest.raises(BadOption):
            eng.generate(prompt_ids=ids, max_new=1)


def test_whole_numbered_floats_are_accepted_as_token_ids(small_model):
    with moerun.load(small_model, tokenizer=False) as eng:
        a = eng.logits([1, 2, 3])
        b = eng.logits(np.array([1.0, 2.0, 3.0]))
    assert np.array_equal(a, b)


def test_a_norm_eps_that_overflows_float32_is_a_bad_model_file(fresh_model):
    edit_config(fresh_model, lambda c: c.__setitem__("norm_eps", 1e300))
    with pytest.raises(BadModelFile, match="norm_eps"):
        moerun.load(fresh_model)


def test_the_bundled_model_is_found_through_the_installed_package():
    from importlib.resources import files
    from pathlib import Path

    try:
        shipped = Path(str(files("moerun_models") / "pebble"))
    except ModuleNotFoundError:
        pytest.skip("moerun is not installed here (run from the source tree only)")
    assert moerun.runtime.engine.BUNDLED_MODEL == shipped
    assert (shipped / "model.safetensors").is_file()


def test_a_temperature_so_small_it_overflows_samples_the_largest_logit(small_model):
    from moerun.model.sampling import Sampler, Sampling

    logits = np.array([0.5, 3.0, -1.0, 3.0, 2.9], np.float32)
    s = Sampler(Sampling(temperature=5e-324, top_p=0.95, seed=0))
    picks = {s(logits) for _ in range(50)}
    assert picks <= {1, 3} and picks  # only the largest logits (ties shared)
