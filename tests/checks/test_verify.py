"""moerun verify: it refuses settings that offload nothing, and its default set covers every online policy."""

from __future__ import annotations

import pytest

import moerun
from moerun import policies
from moerun.checks.verify import default_settings
from moerun.cli import main as cli


@pytest.mark.parametrize("extra", [["--evict", "lfu"], ["--prefetch", "2"], ["--link-speed", "1GB/s"], ["--shared-pool"]])
def test_verify_refuses_settings_that_offload_nothing_instead_of_comparing_the_engine_with_itself(small_model, capsys, extra):
    code = cli.main(["verify", "--model", str(small_model), "--prompts", "1", "--max-new", "2", *extra])
    out, err = capsys.readouterr()
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and "--mem-cap" in err and "itself" in err


def test_verify_with_a_policy_and_a_cap_runs(small_model, capsys):
    code = cli.main(["verify", "--model", str(small_model), "--prompts", "1", "--max-new", "2", "--evict", "lfu", "--mem-cap", "1GiB"])
    assert code == 0, capsys.readouterr().err


def test_the_default_set_covers_every_online_policy_at_the_smallest_cap():
    settings = default_settings(1000, 5000, 100)
    at_smallest = {s.kwargs.get("evict", "lru") for s in settings if s.kwargs.get("mem_cap") == 1000}
    assert at_smallest >= set(policies.names(online_only=True))
    assert {"lrfu", "markov"} <= at_smallest  # the two that plan often recommends


def test_the_default_set_has_a_shared_pool_with_its_own_rule_and_with_lru():
    settings = default_settings(1000, 5000, 100)
    shared = {s.kwargs.get("evict", "lru") for s in settings if s.kwargs.get("split") == "shared"}
    assert {"lru", "orbit"} <= shared


def test_verify_refuses_a_prompt_longer_than_the_context_as_generate_does(small_model, capsys):
    # issue 23, item 13: the prompt was cut silently and tokens it never compared were reported

    from moerun.files.store import ModelStore

    st = ModelStore.open(small_model)
    context = st.config.max_seq_len
    st.close()
    long_prompt = "stone river " * context  # more tokens than the context under any tokenizer of this model
    for command in ("generate", "verify"):
        assert cli.main([command, "--model", str(small_model), "--prompt", long_prompt, "--max-new", "2"]) == 2
        err = capsys.readouterr().err
        assert len(err.strip().splitlines()) == 1 and f"exceed the model's context of {context}" in err


def test_verify_reports_only_the_tokens_it_compared_when_the_context_fills(small_model, capsys):
    import json

    from moerun.files.store import ModelStore
    from moerun.model.tokenizer import Tokenizer

    st = ModelStore.open(small_model)
    c = st.config
    st.close()
    tok = Tokenizer.load(small_model, c.vocab_size, c.bos_token_id)
    prompt = "stone river " * 4
    n = len(tok.encode(prompt))
    room = c.max_seq_len - n
    assert cli.main(["verify", "--model", str(small_model), "--prompt", prompt, "--max-new", str(room + 50), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["max_new"] == room


def test_a_model_larger_than_free_memory_is_verified_against_one_layer_at_a_time(monkeypatch):
    """The reference of a model that cannot be held whole reads each layer's experts when the layer runs
    (the whole-layer source): the same bits as every expert resident, in one layer's memory."""
    from moerun.checks import verify as verify_mod

    with moerun.load("pebble") as eng:
        ids = eng.tokenizer.encode("The keepers check the mesh")
    resident = verify_mod.run_once("pebble", {}, [ids], 6, verify_mod.Sampling(seed=2))[0]
    layered = verify_mod.run_once("pebble", {"baseline": "whole-layer"}, [ids], 6, verify_mod.Sampling(seed=2))[0]
    assert verify_mod.compare(resident, layered)[:2] == (True, True)
    monkeypatch.setattr(verify_mod, "available_memory", lambda: 1 << 20)  # 1 MiB free: pebble does not fit
    result = moerun.verify("pebble", "The keepers check the mesh", max_new=6, mem_cap="12MiB")
    assert result.reference == "whole-layer" and result.ok and result.to_json()["reference"] == "whole-layer"
    # verify's own settings stay at caps the memory holds: here, all at the smallest
    own = moerun.verify("pebble", "The keepers check the mesh", max_new=4)
    assert own.ok and {o.setting.kwargs["mem_cap"] for o in own.outcomes} == {own.min_cap}
