"""Prefetch auto: each layer's account of what its guesses saved against what they cost (moerun.runtime.guesses.Account).

The account is our own rule (issue 24: "where the balance turns negative, it stops guessing for that layer and
retries rarely"); it is checked here on what its docstring promises, and in the live engine on guesses made useless
on purpose (a rule that always guesses experts the layers never choose) and on guesses made perfect (a rule that
reads the routing the layers will follow).  Exactness under auto is checked against the resident run, bit for bit.
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

import moerun
from moerun.errors import BadOption
from moerun.files.trace import Trace
from moerun.model.sampling import Sampling
from moerun.runtime import pool as pool_module
from moerun.runtime.guesses import (
    AUTO_GUESSES,
    EVICT_HORIZON,
    GATE_ROUNDS,
    GATE_STEPS,
    HOLD_FIRST,
    HOLD_MAX,
    REST_FIRST,
    REST_MAX,
    TRIAL_POINTS,
    TRIAL_READS,
    Account,
    Gate,
)

SAMPLING = Sampling(temperature=0.8, top_p=0.95, seed=3)


def _bits(a) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float32).view(np.uint32)


# ---------------------------------------------------------------------------- the rule


def _trial(acct: Account, layer: int, saved_per_read: float, cost: float = 100.0) -> None:
    for _ in range(TRIAL_READS):
        assert acct.open(layer, 2)
        acct.read(layer, cost)
        acct.used(layer, saved_per_read)


def test_a_losing_trial_rests_its_layer_and_each_losing_trial_in_a_row_rests_it_twice_as_long():
    acct = Account(3)
    lengths = []
    for _ in range(7):
        _trial(acct, 1, saved_per_read=10.0)  # saves less than each read costs
        n = 0
        while not acct.open(1, 2):
            n += 1
        lengths.append(n)
    assert lengths[:3] == [REST_FIRST, 2 * REST_FIRST, 4 * REST_FIRST]
    assert max(lengths) == REST_MAX and lengths[-1] == REST_MAX
    assert acct.rests == 7 and acct.skipped == 2 * sum(lengths)
    assert acct.balance[0] == acct.balance[2] == 0.0 and acct.open(0) and acct.open(2)  # other layers untouched


def test_a_winning_trial_keeps_its_layer_guessing_and_resets_the_rest_length():
    acct = Account(2)
    _trial(acct, 0, saved_per_read=10.0)
    while not acct.open(0):
        pass
    for _ in range(5):
        _trial(acct, 0, saved_per_read=1000.0)
    assert acct.open(0) and acct.rests == 1
    _trial(acct, 0, saved_per_read=10.0)
    n = 0
    while not acct.open(0):
        n += 1
    assert n == REST_FIRST  # after a win, the next rest is a first rest again


def test_a_miss_on_what_an_unused_guess_evicted_is_charged_within_the_horizon_and_a_used_guess_is_not_charged():
    acct = Account(2)
    acct.read(1, 0.0, victim=17, step=10, key=9)
    acct.read(1, 0.0, victim=18, step=10, key=10)
    acct.used(1, 0.0, key=10)  # the layer used guess 10: what it evicted would have been evicted anyway
    acct.missed(17, 10 + EVICT_HORIZON, read_ns=500.0)
    acct.missed(18, 11, read_ns=500.0)
    assert acct.balance[1] == -500.0
    acct.read(0, 0.0, victim=3, step=0, key=2)
    acct.missed(3, EVICT_HORIZON + 1, read_ns=500.0)  # past the horizon: not charged
    assert acct.balance[0] == 0.0


def test_a_layer_whose_guesses_are_all_declined_is_judged_on_its_prefetch_points_alone():
    acct = Account(2)
    for _ in range(TRIAL_POINTS):
        assert acct.open(1, 2)
        acct.charge(1, 30.0)  # the guess rule ran; nothing was read
    assert not acct.open(1, 2) and acct.rests == 1


def _drive(gate: Gate, steps: int, on_ns: float, off_ns: float) -> list[bool]:
    """Tick the gate over ``steps`` decode steps that take ``on_ns`` when guessing, ``off_ns`` when not."""
    now, out = 1.0, []
    for _ in range(steps):
        on = gate.tick(now)
        out.append(on)
        now += on_ns if on else off_ns
    return out


def test_the_gate_probes_on_and_off_in_turn_and_holds_the_faster():
    probe = 2 * GATE_ROUNDS * GATE_STEPS
    gate = Gate()
    seen = _drive(gate, probe + HOLD_FIRST, on_ns=900.0, off_ns=1000.0)
    assert seen[:GATE_STEPS] == [True] * GATE_STEPS and seen[GATE_STEPS] is False
    assert seen[2 * GATE_STEPS] is True and seen[3 * GATE_STEPS] is False  # the rounds alternate
    assert gate.verdicts == [True] and all(seen[probe:])  # guessing made steps faster: it holds on
    gate = Gate()
    seen = _drive(gate, probe + HOLD_FIRST, on_ns=1100.0, off_ns=1000.0)
    assert gate.verdicts == [False] and not any(seen[probe:])  # slower with guesses: off for the hold


def _holds(seen: list[bool]) -> list[int]:
    """The lengths of the holds in a run of ticks whose verdicts were all off: the runs of off steps longer than a
    probe phase."""
    out, n = [], 0
    for on in seen + [True]:
        if on:
            if n > GATE_STEPS:
                out.append(n - GATE_STEPS)  # a probe's last phase (off) runs straight into its hold
            n = 0
        else:
            n += 1
    return out


def test_the_same_verdict_again_doubles_the_hold_up_to_its_longest_and_a_new_verdict_starts_short():
    gate = Gate()
    seen = _drive(gate, 8 * HOLD_MAX, on_ns=1100.0, off_ns=1000.0)
    assert set(gate.verdicts) == {False}
    holds = _holds(seen)
    assert holds[:3] == [HOLD_FIRST, 2 * HOLD_FIRST, 4 * HOLD_FIRST] and HOLD_MAX in holds
    assert max(holds) == HOLD_MAX
    _drive(gate, 4 * HOLD_MAX, on_ns=900.0, off_ns=1000.0)  # now guessing pays
    assert gate.verdicts[-1] is True and gate.hold_len[False] == HOLD_FIRST


# ---------------------------------------------------------------------------- in the live engine

L, E, K = 3, 8, 2  # the small synthetic model of tests/conftest.py


def _trace(rows: int = 64, seed: int = 0) -> Trace:
    """Routing that only ever chooses among experts 0-3."""
    rng = np.random.default_rng(seed)
    ex = np.sort(np.stack([[rng.choice(4, K, replace=False) for _ in range(L)] for _ in range(rows)]), axis=-1)
    return Trace(ex, meta={"n_experts": E})


class _FixedRule:
    """A guess rule that names, for each layer ahead, what ``pick(layer)`` says."""

    def __init__(self, rule, pick):
        self.rule, self.pick = rule, pick

    def targets(self, layer):
        return self.rule.targets(layer)

    def top(self, layer, h, n):
        return [self.pick(layer + j)[:n] for j in range(1, self.targets(layer) + 1)]


@pytest.fixture
def every_guess_considered(monkeypatch):
    """The per-guess judgement (moerun.runtime.guesses.guess_pays) lets every guess through, so that only the account
    decides: on the tiny test model and an emulated link the judgement alone would decline most of them."""
    monkeypatch.setattr(pool_module, "guess_pays", lambda *a: True)
    monkeypatch.setattr(pool_module, "worth_guessing", lambda *a: True)


def _run(model, trace, prefetch, pick, max_new=60):
    with moerun.load(model, tokenizer=False, routing=trace, slots=[3, 3, 3], prefetch=prefetch,
                     link_speed="50MB/s") as eng:
        if pick is not None:
            eng.prefetcher.rule = _FixedRule(eng.prefetcher.rule, pick(eng))
        out = eng.generate(prompt_ids=[1, 2, 3], max_new=max_new, sampling=SAMPLING, keep_logits=True)
        return out, eng.stats


def test_the_account_stops_guessing_for_layers_whose_guesses_are_never_used(small_model, every_guess_considered):
    trace = _trace()
    wrong = lambda eng: (lambda layer: [7, 6])  # noqa: E731  never chosen: the routing keeps to experts 0-3
    _, fixed = _run(small_model, trace, 2, wrong)
    got, auto = _run(small_model, trace, "auto", wrong)
    pf, pf_fixed = auto["pool"]["prefetch"], fixed["pool"]["prefetch"]
    assert pf["auto"] and pf["used"] == 0 and pf_fixed["used"] == 0
    assert pf["rests"] >= 2 and pf["skipped"] > 0
    assert pf["loads"] <= pf_fixed["loads"] / 3  # most of what fixed prefetch reads for nothing is never read
    assert auto["pool"]["misses"] < fixed["pool"]["misses"]  # and it evicts fewer experts the layers then miss


def test_the_account_keeps_guessing_where_every_guess_is_used_in_time(small_model, every_guess_considered):
    trace = _trace()
    rows = trace.experts.tolist()

    def right(eng):  # the routing the next layer will follow: the row the engine is on
        return lambda target: list(rows[eng.routing.cursor % len(rows)][target])

    got, auto = _run(small_model, trace, "auto", right)
    pf = auto["pool"]["prefetch"]
    assert pf["rests"] == 0 and pf["skipped"] == 0
    assert pf["used"] > 0 and pf["used"] >= 0.9 * pf["loads"]


def test_prefetch_auto_computes_what_the_resident_model_computes_bit_for_bit(pebble):
    prompt = list(range(5, 40))
    with moerun.load(pebble, tokenizer=False) as eng:
        ref = eng.generate(prompt_ids=prompt, max_new=48, sampling=SAMPLING, keep_logits=True)
    for kw in ({"link_speed": "1GB/s"}, {"split": "shared", "link_speed": "300MB/s"}, {}):
        with moerun.load(pebble, tokenizer=False, mem_cap="13MiB", prefetch="auto", **kw) as eng:
            got = eng.generate(prompt_ids=prompt, max_new=48, sampling=SAMPLING, keep_logits=True)
            st = eng.stats
        assert st["options"]["prefetch_auto"] and st["options"]["prefetch"] == AUTO_GUESSES
        assert st["pool"]["misses"] > 0
        assert got.new_ids == ref.new_ids
        assert np.array_equal(_bits(np.stack(got.logits)), _bits(np.stack(ref.logits)))


def test_prefetch_auto_guesses_nothing_and_starts_no_reader_where_every_expert_is_resident(small_model):
    with moerun.load(small_model, tokenizer=False, prefetch="auto") as eng:
        assert eng.prefetcher is None and eng.options["prefetch"] == 0 and eng.options["prefetch_auto"]
    with moerun.load(small_model, tokenizer=False, slots=[E] * L, prefetch="auto") as eng:  # slots for every expert
        assert eng.prefetcher is None


@pytest.mark.parametrize("bad", ["sometimes", 1.5, True, -1])
def test_a_prefetch_setting_that_is_neither_auto_nor_a_count_is_refused(bad):
    with pytest.raises(BadOption, match="prefetch"):
        moerun.EngineOptions(prefetch=bad)


def test_generate_defaults_to_prefetch_auto_and_shows_its_counters(pebble):
    run = subprocess.run([sys.executable, "-m", "moerun", "generate", "--model", str(pebble), "--mem-cap", "13MiB",
                          "--link-speed", "1GB/s", "--max-new", "30", "--prompt", "The ferry", "--json"],
                         capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    doc = json.loads(run.stdout)
    assert doc["options"]["prefetch_auto"] is True
    pf = doc["pool"]["prefetch"]
    assert {"loads", "used", "wasted", "skipped", "rests"} <= set(pf) and pf["auto"] is True
    text = subprocess.run([sys.executable, "-m", "moerun", "generate", "--model", str(pebble), "--mem-cap", "13MiB",
                           "--link-speed", "1GB/s", "--max-new", "20", "--prompt", "The ferry"],
                          capture_output=True, text=True, timeout=300)
    assert text.returncode == 0 and "--prefetch auto" in text.stderr and "skipped" in text.stderr
    bad = subprocess.run([sys.executable, "-m", "moerun", "generate", "--model", str(pebble), "--prefetch", "often"],
                         capture_output=True, text=True, timeout=60)
    assert bad.returncode == 2 and bad.stdout == "" and "Traceback" not in bad.stderr
