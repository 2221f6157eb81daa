"""moerun.files.ckpt_config: an open checkpoint's config.json as a validated record, both spellings, each refusal one line.

Facts from /work/shared/OPEN-CHECKPOINTS.md; the library defaults are those of transformers' config classes.
"""

from __future__ import annotations

import json

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from test_checkpoint import TYPES, raw_config

from moerun.errors import BadModelFile
from moerun.files.ckpt_config import SUPPORTED_TYPES, load_checkpoint_config, parse_checkpoint_config


def refused(raw: dict, *fragments: str) -> str:
    with pytest.raises(BadModelFile) as ei:
        parse_checkpoint_config(raw, where="ck/config.json")
    msg = str(ei.value)
    assert "\n" not in msg and msg.startswith("ck/config.json: ")
    for f in fragments:
        assert f in msg, msg
    return msg


def without(raw: dict, *keys: str) -> dict:
    return {k: v for k, v in raw.items() if k not in keys}


@pytest.mark.parametrize("mt", TYPES)
def test_the_4x_and_5x_spellings_give_the_same_record(mt):
    a = parse_checkpoint_config(raw_config(mt, "4x", "bfloat16"))
    b = parse_checkpoint_config(raw_config(mt, "5x", "bfloat16"))
    assert a == b
    assert a.rope_theta == 1e6 and a.dtype == "BF16" and a.num_experts == 4


def test_a_qwen3_moe_record_reads_every_field():
    c = parse_checkpoint_config(raw_config("qwen3_moe", "5x", "float16"))
    assert (c.model_type, c.hidden_size, c.num_layers, c.num_heads, c.num_kv_heads, c.head_dim) == ("qwen3_moe", 16, 3, 4, 2, 6)
    assert (c.num_experts, c.top_k, c.expert_width, c.dense_width) == (4, 2, 8, 24)
    assert c.mlp_only_layers == (1,) and c.decoder_sparse_step == 1 and c.moe_layers == (0, 2)
    assert c.shared_expert_width == 0 and c.norm_topk_prob is True and c.rms_norm_eps == 1e-6
    assert (c.dtype, c.tie_word_embeddings, c.vocab_size, c.max_position_embeddings) == ("F16", False, 32, 128)
    assert c.qkv_bias is False and c.clip_qkv is None and c.qk_norm == "per_head"
    assert (c.q_dim, c.kv_dim) == (24, 12)  # head_dim 6 differs from hidden / heads = 4


def test_a_qwen2_moe_record_has_biases_and_a_shared_expert():
    c = parse_checkpoint_config(raw_config("qwen2_moe"))
    assert c.qkv_bias and c.shared_expert_width == 12 and c.qk_norm == "none" and c.head_dim == 4
    assert c.moe_layers == (1, 2) and c.dense_width == 24
    assert parse_checkpoint_config(raw_config("qwen2_moe", "5x", qkv_bias=False)).qkv_bias is False
    assert parse_checkpoint_config(without(raw_config("qwen2_moe"), "qkv_bias")).qkv_bias is True  # 4.x: always


def test_an_olmoe_record_takes_its_expert_width_from_intermediate_size_and_every_layer_is_moe():
    c = parse_checkpoint_config(raw_config("olmoe", clip_qkv=8.0))
    assert c.expert_width == 8 and c.dense_width == 0 and c.moe_layers == (0, 1)
    assert c.qk_norm == "full" and c.clip_qkv == 8.0 and c.shared_expert_width == 0
    assert c.is_moe_layer(5) and c.is_moe_layer(0)  # every layer, whatever the number


@pytest.mark.parametrize("mt", TYPES)
def test_absent_fields_take_each_types_library_default(mt):
    raw = without(raw_config(mt), "norm_topk_prob", "rms_norm_eps", "rope_theta", "rope_scaling", "torch_dtype",
                  "tie_word_embeddings", "max_position_embeddings", "head_dim", "mlp_only_layers", "decoder_sparse_step",
                  "hidden_act", "use_sliding_window", "sliding_window", "clip_qkv", "attention_bias")
    if mt != "olmoe":
        raw["intermediate_size"] = 24
    c = parse_checkpoint_config(raw)
    assert c.norm_topk_prob is False  # the config classes default to false (the real 30B model sets true)
    assert c.rms_norm_eps == {"qwen3_moe": 1e-6, "qwen2_moe": 1e-6, "olmoe": 1e-5}[mt]
    assert c.max_position_embeddings == {"qwen3_moe": 32768, "qwen2_moe": 32768, "olmoe": 4096}[mt]
    assert c.rope_theta == 10000.0 and c.dtype is None and c.tie_word_embeddings is False
    assert c.head_dim == 4 and c.mlp_only_layers == () and c.decoder_sparse_step == 1
    assert c.moe_layers == tuple(range(c.num_layers))


def test_null_kv_heads_means_one_per_query_head():
    assert parse_checkpoint_config(raw_config("olmoe", num_key_value_heads=None)).num_kv_heads == 4
    assert parse_checkpoint_config(without(raw_config("olmoe"), "num_key_value_heads")).num_kv_heads == 4


def test_decoder_sparse_step_and_mlp_only_layers_choose_the_dense_layers():
    c = parse_checkpoint_config(raw_config("qwen2_moe", num_hidden_layers=6, decoder_sparse_step=2, mlp_only_layers=[3]))
    assert c.moe_layers == (1, 5)  # (l + 1) % 2 == 0, and not 3
    assert [c.is_moe_layer(layer) for layer in range(6)] == [False, True, False, False, False, True]


def test_a_config_whose_layers_are_all_moe_needs_no_dense_intermediate_size():
    raw = without(raw_config("qwen3_moe", mlp_only_layers=[]), "intermediate_size")
    assert parse_checkpoint_config(raw).dense_width == 0
    refused(without(raw_config("qwen3_moe"), "intermediate_size"), "intermediate_size")


@pytest.mark.parametrize("value,tag", [("bfloat16", "BF16"), ("float16", "F16"), ("float32", "F32"), ("torch.bfloat16", "BF16"),
                                       (None, None), ("auto", None)])
def test_the_declared_dtype_is_read_in_either_spelling(value, tag):
    assert parse_checkpoint_config(raw_config("olmoe", "4x", value)).dtype == tag
    assert parse_checkpoint_config(raw_config("olmoe", "5x", value)).dtype == tag


def test_rope_theta_is_read_from_the_top_level_or_rope_parameters():
    assert parse_checkpoint_config(raw_config("qwen3_moe", "4x", rope_theta=5e5)).rope_theta == 5e5
    assert parse_checkpoint_config(raw_config("qwen3_moe", "5x", rope_parameters={"rope_theta": 2e5, "rope_type": "default"})).rope_theta == 2e5
    both = raw_config("qwen3_moe", "5x", rope_theta=2e5, rope_parameters={"rope_theta": 2e5, "rope_type": "default"})
    assert parse_checkpoint_config(both).rope_theta == 2e5
    assert parse_checkpoint_config(raw_config("qwen3_moe", rope_scaling={"rope_type": "default"})).rope_theta == 1e6


# Configs shaped like the published ones (4.x files: every field the library writes, most of them ignored here)
PUBLISHED = {
    "qwen3_moe": {
        "architectures": ["Qwen3MoeForCausalLM"], "attention_bias": False, "attention_dropout": 0.0, "bos_token_id": 151643,
        "decoder_sparse_step": 1, "eos_token_id": 151645, "head_dim": 128, "hidden_act": "silu", "hidden_size": 2048,
        "initializer_range": 0.02, "intermediate_size": 6144, "max_position_embeddings": 40960, "max_window_layers": 48,
        "mlp_only_layers": [], "model_type": "qwen3_moe", "moe_intermediate_size": 768, "norm_topk_prob": True,
        "num_attention_heads": 32, "num_experts": 128, "num_experts_per_tok": 8, "num_hidden_layers": 48,
        "num_key_value_heads": 4, "output_router_logits": False, "rms_norm_eps": 1e-06, "rope_scaling": None,
        "rope_theta": 1000000.0, "router_aux_loss_coef": 0.001, "sliding_window": None, "tie_word_embeddings": False,
        "torch_dtype": "bfloat16", "transformers_version": "4.51.0", "use_cache": True, "use_sliding_window": False,
        "vocab_size": 151936,
    },
    "qwen2_moe": {
        "architectures": ["Qwen2MoeForCausalLM"], "attention_dropout": 0.0, "bos_token_id": 151643, "decoder_sparse_step": 1,
        "eos_token_id": 151643, "hidden_act": "silu", "hidden_size": 2048, "initializer_range": 0.02, "intermediate_size": 5632,
        "max_position_embeddings": 8192, "max_window_layers": 21, "model_type": "qwen2_moe", "moe_intermediate_size": 1408,
        "norm_topk_prob": False, "num_attention_heads": 16, "num_experts": 60, "num_experts_per_tok": 4,
        "num_hidden_layers": 24, "num_key_value_heads": 16, "output_router_logits": False, "rms_norm_eps": 1e-06,
        "rope_theta": 1000000.0, "router_aux_loss_coef": 0.001, "shared_expert_intermediate_size": 5632,
        "sliding_window": 32768, "tie_word_embeddings": False, "torch_dtype": "bfloat16", "use_cache": True,
        "use_sliding_window": False, "vocab_size": 151936,
    },
    "olmoe": {
        "architectures": ["OlmoeForCausalLM"], "attention_bias": False, "attention_dropout": 0.0, "bos_token_id": None,
        "clip_qkv": None, "eos_token_id": 50279, "hidden_act": "silu", "hidden_size": 2048, "initializer_range": 0.02,
        "intermediate_size": 1024, "max_position_embeddings": 4096, "model_type": "olmoe", "norm_topk_prob": False,
        "num_attention_heads": 16, "num_experts": 64, "num_experts_per_tok": 8, "num_hidden_layers": 16,
        "num_key_value_heads": 16, "output_router_logits": False, "pad_token_id": 1, "rms_norm_eps": 1e-05,
        "rope_scaling": None, "rope_theta": 10000.0, "router_aux_loss_coef": 0.01, "tie_word_embeddings": False,
        "torch_dtype": "bfloat16", "use_cache": True, "vocab_size": 50304,
    },
}


def test_configs_shaped_like_the_published_ones_are_read_with_the_pages_figures():
    q3 = parse_checkpoint_config(PUBLISHED["qwen3_moe"])
    assert (q3.num_layers, q3.hidden_size, q3.num_experts, q3.expert_width, q3.top_k) == (48, 2048, 128, 768, 8)
    assert (q3.num_heads, q3.num_kv_heads, q3.head_dim, q3.norm_topk_prob, q3.qk_norm) == (32, 4, 128, True, "per_head")
    q2 = parse_checkpoint_config(PUBLISHED["qwen2_moe"])
    assert (q2.num_layers, q2.num_experts, q2.expert_width, q2.top_k, q2.shared_expert_width) == (24, 60, 1408, 4, 5632)
    assert q2.qkv_bias and q2.head_dim == 128 and q2.moe_layers == tuple(range(24))
    ol = parse_checkpoint_config(PUBLISHED["olmoe"])
    assert (ol.num_layers, ol.num_experts, ol.expert_width, ol.top_k, ol.rms_norm_eps) == (16, 64, 1024, 8, 1e-5)
    assert ol.qk_norm == "full" and ol.clip_qkv is None and ol.dense_width == 0
    assert {c.dtype for c in (q3, q2, ol)} == {"BF16"}


# ---------------------------------------------------------------------------- refusals, one line each


@pytest.mark.parametrize("mt", ["lichen_dense", "fogline_moe", "tarn_moe", "", 7])
def test_another_model_type_is_refused_by_name_listing_the_three(mt):
    msg = refused({**raw_config("qwen3_moe"), "model_type": mt}, "model_type", repr(str(mt)))
    for t in SUPPORTED_TYPES:
        assert t in msg


def test_a_config_without_model_type_is_refused():
    refused(without(raw_config("olmoe"), "model_type"), "missing field model_type")


@pytest.mark.parametrize("spelling,key,block", [
    ("4x", "rope_scaling", {"rope_type": "yarn", "factor": 4.0}),
    ("4x", "rope_scaling", {"type": "linear", "factor": 2.0}),
    ("5x", "rope_parameters", {"rope_theta": 1e6, "rope_type": "yarn", "factor": 4.0}),
    ("5x", "rope_parameters", {"rope_theta": 1e6, "rope_type": "dynamic"}),
])
def test_a_rope_type_other_than_default_is_refused_naming_the_field(spelling, key, block):
    refused(raw_config("qwen3_moe", spelling, **{key: block}), key, "rope type", "not supported")


def test_disagreeing_rope_thetas_are_refused():
    raw = raw_config("olmoe", "5x", rope_theta=5e5)
    refused(raw, "rope_theta", "rope_parameters.rope_theta", "disagree")


@pytest.mark.parametrize("mt", ["qwen3_moe", "qwen2_moe"])
def test_a_sliding_window_in_use_is_refused_and_one_not_in_use_is_read(mt):
    refused(raw_config(mt, use_sliding_window=True, sliding_window=64, max_position_embeddings=128),
            "use_sliding_window", "sliding_window 64", "max_position_embeddings 128")
    for over in ({"use_sliding_window": True, "sliding_window": 128}, {"use_sliding_window": True, "sliding_window": None},
                 {"use_sliding_window": False, "sliding_window": 4}):
        parse_checkpoint_config(raw_config(mt, max_position_embeddings=128, **over))


def test_layer_types_naming_anything_but_full_attention_are_refused():
    parse_checkpoint_config(raw_config("qwen3_moe", "5x", layer_types=["full_attention"] * 3))
    refused(raw_config("qwen3_moe", "5x", layer_types=["full_attention", "sliding_attention", "full_attention"]),
            "layer_types", "'sliding_attention'")
    refused(raw_config("qwen2_moe", "5x", layer_types=["full_attention"]), "layer_types", "list of 3")


def test_a_quantized_checkpoint_is_refused_naming_quantization_config():
    refused(raw_config("qwen3_moe", quantization_config={"quant_method": "fp8", "weight_block_size": [128, 128]}),
            "quantization_config", "fp8", "quantized")
    refused(raw_config("olmoe", quantization_config={"bits": 4}), "quantization_config")


def test_num_experts_and_num_local_experts_must_agree_when_both_are_given():
    refused(raw_config("qwen3_moe", "5x", num_experts=8), "num_experts (8)", "num_local_experts (4)")
    assert parse_checkpoint_config(raw_config("qwen3_moe", "5x", num_experts=4)).num_experts == 4
    refused(without(raw_config("olmoe"), "num_experts"), "num_experts")


@pytest.mark.parametrize("field", ["hidden_size", "num_hidden_layers", "num_attention_heads", "vocab_size",
                                   "num_experts_per_tok", "moe_intermediate_size"])
def test_a_missing_shape_field_is_refused_naming_it(field):
    refused(without(raw_config("qwen3_moe"), field), f"missing field {field}")


@pytest.mark.parametrize("field,value", [("hidden_size", 0), ("num_hidden_layers", -1), ("head_dim", 6.0),
                                         ("num_experts_per_tok", True), ("vocab_size", "32"), ("moe_intermediate_size", None)])
def test_a_shape_field_that_is_not_a_positive_integer_is_refused_naming_it(field, value):
    refused(raw_config("qwen3_moe", **{field: value}), field)


@pytest.mark.parametrize("over,fragments", [
    ({"num_key_value_heads": 3}, ("num_attention_heads (4)", "num_key_value_heads (3)")),
    ({"num_experts_per_tok": 5}, ("num_experts_per_tok (5)",)),
    ({"head_dim": 5}, ("head_dim", "even")),
    ({"mlp_only_layers": [3]}, ("mlp_only_layers", "layer 3")),
    ({"mlp_only_layers": "1"}, ("mlp_only_layers",)),
    ({"norm_topk_prob": 1}, ("norm_topk_prob", "true or false")),
    ({"tie_word_embeddings": "no"}, ("tie_word_embeddings",)),
    ({"rms_norm_eps": -1e-6}, ("rms_norm_eps", "positive")),
    ({"rms_norm_eps": float("nan")}, ("rms_norm_eps",)),
    ({"rope_theta": 0}, ("rope_theta",)),
    ({"torch_dtype": "float64"}, ("torch_dtype", "float64")),
    ({"hidden_act": "gelu"}, ("hidden_act", "gelu")),
    ({"attention_bias": True}, ("attention_bias",)),
    ({"rope_scaling": "yarn"}, ("rope_scaling",)),
    ({"num_hidden_layers": 100_000, "num_experts": 100}, ("tensors",)),
])
def test_an_inconsistent_or_unsupported_field_is_refused_naming_it(over, fragments):
    refused(raw_config("qwen3_moe", **over), *fragments)


def test_olmoe_needs_head_dim_times_heads_equal_to_hidden_size():
    refused(raw_config("olmoe", head_dim=6), "head_dim 6", "hidden_size 16", "q_norm")
    assert parse_checkpoint_config(raw_config("olmoe", head_dim=4)).head_dim == 4


def test_qwen2_moe_needs_its_shared_expert_width():
    refused(without(raw_config("qwen2_moe"), "shared_expert_intermediate_size"), "shared_expert_intermediate_size")


def test_an_olmoe_clip_qkv_must_be_positive():
    refused(raw_config("olmoe", clip_qkv=-1), "clip_qkv")


def test_a_config_that_is_not_an_object_is_refused():
    with pytest.raises(BadModelFile, match="expected a JSON object"):
        parse_checkpoint_config([1, 2])


def test_loading_names_the_file_for_bad_json_and_for_a_bad_field(tmp_path):
    (tmp_path / "config.json").write_text("{nope")
    with pytest.raises(BadModelFile) as ei:
        load_checkpoint_config(tmp_path)
    assert str(tmp_path / "config.json") in str(ei.value) and "\n" not in str(ei.value)
    (tmp_path / "config.json").write_text(json.dumps(raw_config("qwen3_moe", hidden_size=0)))
    with pytest.raises(BadModelFile, match=r"config\.json: hidden_size must be a positive integer"):
        load_checkpoint_config(tmp_path)
    with pytest.raises(BadModelFile, match="missing"):
        load_checkpoint_config(tmp_path / "absent")


# ---------------------------------------------------------------------------- fuzzing

_json = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**70), 2**70) | st.floats(allow_nan=True) | st.text(max_size=8)
    | st.sampled_from(["default", "yarn", "bfloat16", "full_attention", "silu"]),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.sampled_from(["rope_type", "type", "rope_theta", "quant_method", "x"]), inner, max_size=3),
    max_leaves=6,
)
_fields = sorted({k for mt in TYPES for k in raw_config(mt, "4x")} | {k for mt in TYPES for k in raw_config(mt, "5x")}
                 | {"layer_types", "quantization_config", "num_local_experts", "qkv_bias", "clip_qkv"})


@settings(max_examples=300, deadline=None)
@given(mt=st.sampled_from(TYPES), spelling=st.sampled_from(["4x", "5x"]),
       edits=st.dictionaries(st.sampled_from(_fields), _json, max_size=3), drop=st.sets(st.sampled_from(_fields), max_size=2))
def test_any_edit_of_a_config_is_read_or_refused_with_one_line(mt, spelling, edits, drop):
    raw = {k: v for k, v in raw_config(mt, spelling).items() if k not in drop}
    raw.update(edits)
    try:
        c = parse_checkpoint_config(raw, where="ck/config.json")
    except BadModelFile as e:
        assert "\n" not in str(e) and str(e).startswith("ck/config.json: ")
    else:
        assert c.model_type in SUPPORTED_TYPES and c.top_k <= c.num_experts and c.num_heads % c.num_kv_heads == 0
