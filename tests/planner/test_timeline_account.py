"""moerun.planner.timeline with prefetch auto: the time model drives the live pool's account of each layer's guesses
(moerun.runtime.guesses.Account) on simulated time, and the search weighs prefetch auto beside the fixed settings."""

from __future__ import annotations

import numpy as np
import pytest
from _planning import US, _costs, _random_trace

from moerun.errors import BadOption
from moerun.files.trace import Trace
from moerun.planner import timeline
from moerun.planner.search import AUTO_CANDIDATE, PREFETCH_CANDIDATES, TIE, Space, choose, predict, prefetch_candidates
from moerun.runtime.guesses import AUTO_GUESSES

# "within a few %" of prefetch off, read as 5%: a resting layer still tries its guesses now and then (TRIAL_READS
# reads after each rest), and each wrong one costs a read and may evict an expert in use
FEW = 0.05


def _guessed(seed: int, right, tokens=2000, layers=3, experts=8, k=2, ahead=1, n=AUTO_GUESSES) -> Trace:
    """Random routing whose guesses for layer l + 1 are, where ``right(l)``, exactly what that layer chooses at that
    token, and elsewhere two of the experts it does not choose then (never one it chooses; it may at a later token)."""
    rng = np.random.default_rng(seed)
    ex = _random_trace(rng, tokens, layers, experts, k).experts
    g = np.full((tokens, layers, ahead, n), -1, np.int64)
    for t in range(tokens):
        for layer in range(layers - 1):
            nxt = ex[t, layer + 1]
            if right(layer):
                g[t, layer, 0, :k] = nxt
            else:
                g[t, layer, 0, :2] = rng.choice([e for e in range(experts) if e not in nxt], 2, replace=False)
    return Trace(ex, guesses=g, meta={"n_experts": experts, "prefill_tokens": 0})


def _link_costs(page: int, emulated: bool = True):
    c = _costs(L=3, page=page, attn=20)
    c.place, c.copy, c.guess, c.emulated = 3 * US, 2 * US, 1 * US, emulated
    return c


@pytest.mark.parametrize("seed", range(3))
def test_useless_guesses_rest_their_layers_and_auto_stays_near_prefetch_off(seed):
    # Over an emulated link a wrong guess whose transfer has begun is not dropped; it stays, and a later token may use
    # it, so the share of guesses used stays up and fixed prefetch keeps reading wrong guesses.  Each layer's account
    # sees its guesses lose (their reads and the misses on what they evicted, against the few later uses) and rests it.
    trace = _guessed(seed, right=lambda layer: False)
    costs = _link_costs(page=100)
    slots = [4, 4, 4]
    off = predict(trace, slots, "lru", 0, 1, costs)
    fixed = predict(trace, slots, "lru", AUTO_GUESSES, 1, costs)
    auto = predict(trace, slots, "lru", AUTO_GUESSES, 1, costs, auto=True)
    assert auto.auto and not fixed.auto and fixed.rests == fixed.skipped == 0
    assert auto.rests > 0 and auto.skipped > 0
    assert auto.prefetch_loads < fixed.prefetch_loads
    assert auto.tok_s >= fixed.tok_s
    assert auto.tok_s >= off.tok_s * (1 - FEW)


@pytest.mark.parametrize("emulated", [True, False], ids=["emulated link", "real reads"])
def test_perfect_guesses_on_a_slow_link_keep_every_layer_guessing(emulated):
    # Every guess is what its layer then chooses and a read takes 20 times a layer's attention: the guesses pay, no
    # layer rests, and auto is fixed prefetch of as many guesses but for the steps the gate's probes spend with
    # guessing off (and at the last layer, with no layer ahead, auto runs no prefetch point, as the engine, where the
    # fixed setting's model runs the guess rule).
    trace = _guessed(0, right=lambda layer: True)
    costs = _link_costs(page=400, emulated=emulated)
    slots = [4, 4, 4]
    off = predict(trace, slots, "lru", 0, 1, costs)
    fixed = predict(trace, slots, "lru", AUTO_GUESSES, 1, costs)
    auto = predict(trace, slots, "lru", AUTO_GUESSES, 1, costs, auto=True)
    assert auto.rests == 0 and auto.skipped == 0 and auto.prefetch_loads > 0
    assert fixed.tok_s > off.tok_s * (1 + TIE)  # the guesses did hide reads
    # auto gives most of that gain: all but what the gate's probes cost (their steps with guessing off)
    assert off.tok_s + 0.8 * (fixed.tok_s - off.tok_s) <= auto.tok_s <= fixed.tok_s * (1 + TIE)


class _Untouchable:
    """An account that fails whatever is asked of it."""

    def __init__(self, n_layers):
        pass

    def __getattr__(self, name):
        raise AssertionError(f"the account was asked {name!r} without prefetch auto")


def test_without_auto_the_account_is_never_consulted(monkeypatch):
    trace = _guessed(1, right=lambda layer: layer == 0, tokens=200)
    costs = _link_costs(page=100)
    before = [predict(trace, [4, 4, 4], "lru", pf, 1, costs).to_json() for pf in (0, 1, 2)]
    monkeypatch.setattr(timeline, "Account", _Untouchable)
    after = [predict(trace, [4, 4, 4], "lru", pf, 1, costs, auto=False).to_json() for pf in (0, 1, 2)]
    assert after == before
    assert all(d["prefetch"] == pf and d["skipped"] == d["rests"] == 0 for d, pf in zip(after, (0, 1, 2)))
    with pytest.raises(AssertionError, match="account was asked"):  # (the stand-in is in the path auto takes)
        predict(trace, [4, 4, 4], "lru", 2, 1, costs, auto=True)


def test_auto_writes_itself_as_the_engine_option():
    trace = _guessed(2, right=lambda layer: True, tokens=100)
    pr = predict(trace, [4, 4, 4], "lru", AUTO_GUESSES, 1, _link_costs(page=100), auto=True)
    doc = pr.to_json()
    assert pr.prefetch_setting == "auto" and doc["prefetch"] == "auto" and doc["lookahead"] == 1 and "auto" not in doc
    assert {"skipped", "rests"} <= doc.keys()


def test_auto_with_no_guesses_per_layer_is_refused_in_one_line():
    trace = _guessed(0, right=lambda layer: True, tokens=20)
    with pytest.raises(BadOption, match="prefetch auto") as e:
        predict(trace, [4, 4, 4], "lru", 0, 1, _link_costs(page=100), auto=True)
    assert "\n" not in str(e.value)


def test_a_pool_holding_every_expert_makes_no_guesses_with_auto():
    # as the engine, which starts no prefetch where the pool holds every expert: no guess rule, no reads; the
    # prediction is prefetch off's, step by step (the additive path's to the link's whole-nanosecond rounding)
    trace = _guessed(0, right=lambda layer: True, tokens=100)
    costs = _link_costs(page=100)
    off = timeline._simulate(trace, [8, 8, 8], "lru", 0, 1, costs, False, 10**9)
    auto = predict(trace, [8, 8, 8], "lru", AUTO_GUESSES, 1, costs, auto=True)
    assert auto.prefetch_loads == 0 and (auto.step_s, auto.stall_s, auto.misses) == (off.step_s, off.stall_s, off.misses)
    assert predict(trace, [8, 8, 8], "lru", AUTO_GUESSES, 1, costs).step_s > off.step_s  # fixed prefetch runs its rule


# ---------------------------------------------------------------------------- the search


def _search_trace(seed: int) -> Trace:
    """Layer 0 guesses layer 1 right, layer 1 guesses layer 2 wrong; guesses recorded for every candidate (two layers
    ahead and three guesses, the ones past the first layer ahead and the first two guesses left empty)."""
    return _guessed(seed, right=lambda layer: layer == 0, ahead=2, n=3)


@pytest.mark.parametrize("seed", range(2))
def test_the_search_recommends_auto_where_it_wins(seed):
    # Real reads: the right guesses for layer 1 hide reads, the wrong ones for layer 2 evict what it uses.  Auto keeps
    # the first and rests the second; each fixed setting reads both.
    trace = _search_trace(seed)
    costs = _link_costs(page=100, emulated=False)
    cands = prefetch_candidates(trace)
    assert AUTO_CANDIDATE in cands and all(pc in cands for pc in PREFETCH_CANDIDATES)
    space = Space(trace, costs, 3, 8, 2, 0, 1, ["lru"], cands)
    found = space.candidates(12)
    label, rec = choose(found)
    assert rec.auto and rec.prefetch == AUTO_GUESSES and rec.lookahead == 1 and rec.rests > 0
    others = [pr.tok_s for _, pr in found if not pr.auto]
    assert rec.tok_s > max(others) * (1 + TIE)
    # the curve keeps the recommended setting whole, and prefetch auto is written as the engine option
    curve = space.curve("lru", [AUTO_CANDIDATE])
    assert any(p["prefetch"] == "auto" for p in curve)


def test_auto_is_searched_only_where_it_can_guess():
    one_layer = Trace(np.zeros((10, 1, 1), np.int64), guesses=np.zeros((10, 1, 1, 2), np.int64),
                      meta={"n_experts": 4, "prefill_tokens": 0})
    assert AUTO_CANDIDATE not in prefetch_candidates(one_layer)
    no_guesses = _random_trace(np.random.default_rng(0), tokens=10)
    assert prefetch_candidates(no_guesses) == [pc for pc in PREFETCH_CANDIDATES if not pc[0]]
    # a trace holding fewer guesses than auto makes: auto is left out of the search, not refused
    short = Trace(no_guesses.experts, guesses=np.zeros((10, 3, 1, 1), np.int64), meta={"n_experts": 8, "prefill_tokens": 0})
    space = Space(short, _costs(L=3), 3, 8, 2, 0, 1, ["lru"], [(0, 1), (1, 1), AUTO_CANDIDATE])
    assert not any(pr.auto for _, pr in space.candidates(12))
    assert any(pr.prefetch == 1 for _, pr in space.candidates(12))


def test_auto_ranks_just_after_the_fixed_setting_of_as_many_guesses():
    # a tie between auto and fixed prefetch of as many guesses goes to the fixed one; auto before more guesses
    from moerun.planner.search import simplicity
    from moerun.planner.timeline import Prediction

    def pred(pf, la, auto=False):
        return Prediction([4, 4], "lru", pf, la, 100.0, 0.01, 0.0, 10, 1, 5, [0.9, 0.9], auto=auto)

    order = sorted([pred(3, 1), pred(2, 1, True), pred(0, 0), pred(2, 2), pred(2, 1), pred(1, 1)],
                   key=lambda pr: simplicity("even", pr))
    assert [(pr.prefetch_setting, pr.lookahead) for pr in order] == [(0, 0), (1, 1), (2, 1), ("auto", 1), (2, 2), (3, 1)]
    assert choose([("even", pred(2, 1, True)), ("even", pred(2, 1))])[1].auto is False


def test_plan_shows_a_recommendation_of_auto_as_the_engine_options(tmp_path, capsys):
    # the search's case above through the command: a model by its shape, page-ins from a probe (real reads)
    import json

    from _jobs import cli_json
    from test_plan import _probe_doc

    from moerun.cli.main import main
    from moerun.files.trace import write_trace

    write_trace(tmp_path / "t.npz", _search_trace(0))
    (tmp_path / "shape.json").write_text(json.dumps({"layers": 3, "experts": 8, "top_k": 2, "expert_bytes": 65536,
                                                     "dense_bytes": 1 << 20, "expert_us": 2, "dense_layer_us": 20,
                                                     "head_us": 3, "copy_us": 2, "place_us": 3, "guess_us": 1}))
    (tmp_path / "probe.json").write_text(json.dumps(_probe_doc()))
    argv = ["plan", "--shape", tmp_path / "shape.json", "--routing", tmp_path / "t.npz", "--probe", tmp_path / "probe.json",
            "--mem-cap", str((1 << 20) + 12 * 65536), "--evict", "lru"]
    code, doc = cli_json(capsys, *argv)
    assert code == 0
    rec = doc["recommended"]
    assert rec["prefetch"] == "auto" and rec["lookahead"] == 1 and "auto" not in rec and rec["rests"] > 0
    assert all(isinstance(c["prefetch"], int) or c["prefetch"] == "auto" for c in doc["candidates"])
    assert any(p["prefetch"] == "auto" and p["lookahead"] == 1 for p in doc["curve"]["points"])
    assert main([str(a) for a in argv]) == 0
    out = capsys.readouterr().out
    line = next(line for line in out.splitlines() if line.startswith("recommended:"))
    assert "--prefetch auto --lookahead 1" in line
    assert any(line.startswith("prefetch auto: layers rested") for line in out.splitlines())
