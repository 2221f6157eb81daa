"""moerun verify: it refuses settings that offload nothing, and its default set covers every online policy."""

from __future__ import annotations

import pytest

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
