"""moerun.files.config: the optional fields d_shared and norm_topk (docs/design/architecture.md, model spec), their defaults and their checks."""

from __future__ import annotations

import pytest

from moerun.errors import BadModelFile
from moerun.files.config import ModelConfig
from moerun.makers.synthetic import synth_config

BASE = synth_config(layers=2, experts=32, top_k=4).to_json()


def _config(**fields) -> ModelConfig:
    return ModelConfig.from_dict({**BASE, **fields})


def test_absent_fields_mean_no_shared_expert_and_renormalised_weights():
    c = ModelConfig.from_dict(BASE)
    assert c.d_shared == 0 and c.norm_topk is True
    assert c.shared_shapes() == {}
    assert not any(".shared." in name for name in c.dense_shapes())
    # a config without the fields round-trips without them (files made before them stay as they are)
    assert "d_shared" not in c.to_json() and "norm_topk" not in c.to_json()
    assert _config(d_shared=0, norm_topk=True) == c


def test_a_shared_expert_adds_three_dense_matrices_per_layer():
    c = _config(d_shared=96, norm_topk=False)
    d = c.d_model
    for layer in range(c.n_layers):
        p = f"layers.{layer}.shared."
        assert c.dense_shapes()[p + "w_gate"] == (d, 96)
        assert c.dense_shapes()[p + "w_up"] == (d, 96)
        assert c.dense_shapes()[p + "w_down"] == (96, d)
    assert len(c.dense_shapes()) == len(ModelConfig.from_dict(BASE).dense_shapes()) + 3 * c.n_layers
    assert c.to_json()["d_shared"] == 96 and c.to_json()["norm_topk"] is False
    assert ModelConfig.from_dict(c.to_json()) == c


@pytest.mark.parametrize(
    ("fields", "phrase"),
    [
        ({"d_shared": -1}, "d_shared must be a whole number"),
        ({"d_shared": 1.5}, "d_shared must be a whole number"),
        ({"d_shared": True}, "d_shared must be a whole number"),
        ({"d_shared": "256"}, "d_shared must be a whole number"),
        ({"norm_topk": 1}, "norm_topk must be true"),
        ({"norm_topk": "false"}, "norm_topk must be true"),
        ({"norm_topk": None}, "norm_topk must be true"),
    ],
)
def test_bad_d_shared_or_norm_topk_is_one_clear_error(fields, phrase):
    with pytest.raises(BadModelFile, match=phrase):
        _config(**fields)
