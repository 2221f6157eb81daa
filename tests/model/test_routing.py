"""moerun.model.routing: routing replayed from a trace; with a model's own trace it changes no number."""

from __future__ import annotations

import numpy as np
import pytest

import moerun
from moerun.errors import BadTrace
from moerun.files.trace import Trace
from moerun.model.routing import ReplayedRouting
from moerun.model.sampling import Sampling

SAMPLING = Sampling(temperature=0.8, top_p=0.95, seed=11)


def _bits(a) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float32).view(np.uint32)


def test_a_run_with_its_own_recorded_routing_gives_the_same_logits_and_tokens_bit_for_bit(pebble):
    prompt = list(range(5, 25))
    with moerun.load(pebble, tokenizer=False) as eng:
        eng.start_trace()
        ref = eng.generate(prompt_ids=prompt, max_new=40, sampling=SAMPLING, keep_logits=True)
        trace = eng.finish_trace()
    with moerun.load(pebble, tokenizer=False, routing=trace, mem_cap="13MiB") as eng:
        got = eng.generate(prompt_ids=prompt, max_new=40, sampling=SAMPLING, keep_logits=True)
        assert eng.options["routing"] == "routing trace"
    assert got.new_ids == ref.new_ids
    assert np.array_equal(_bits(np.stack(got.logits)), _bits(np.stack(ref.logits)))


def test_replayed_routing_is_what_the_layers_choose(small_model):
    # another model's routing: the layers choose exactly the trace's experts, row by row, wrapping round
    rng = np.random.default_rng(0)
    T = 7
    ex = np.sort(np.stack([[rng.choice(8, 2, replace=False) for _ in range(3)] for _ in range(T)]), axis=-1)
    trace = Trace(ex, meta={"n_experts": 8})
    with moerun.load(small_model, tokenizer=False, routing=trace) as eng:
        eng.start_trace()
        eng.generate(prompt_ids=[1, 2, 3], max_new=10, sampling=SAMPLING)
        seen = eng.finish_trace().experts
    assert seen.shape[0] == 3 + 9  # the prompt, then one row per decode step
    assert np.array_equal(seen, ex[np.arange(12) % T])


def test_replayed_routing_moves_past_a_passs_rows_once_its_last_layer_has_taken_them(small_model):
    rng = np.random.default_rng(1)
    T, L = 5, 3
    ex = np.sort(np.stack([[rng.choice(8, 2, replace=False) for _ in range(L)] for _ in range(T)]), axis=-1)
    with moerun.load(small_model, tokenizer=False) as eng:
        routing = ReplayedRouting(Trace(ex, meta={"n_experts": 8}), eng.config)
        d = eng.config.d_model
    taken = []
    for count in (3, 1, 1, 2):  # a prefill of three tokens, then single tokens, wrapping round at the end
        u = np.zeros((count, d), np.float32)
        for layer in range(L):
            before = routing.cursor
            chosen, weights, probs = routing(layer, u)
            assert chosen.shape == (count, 2) and weights.shape == (count, 2) and probs.shape == (count, 8)
            assert np.array_equal(chosen, ex[(before + np.arange(count)) % T, layer])
            assert routing.cursor == (before if layer < L - 1 else (before + count) % T)
        taken.append(chosen)
    assert np.array_equal(np.concatenate(taken), ex[np.arange(7) % T, L - 1])


@pytest.mark.parametrize(
    "experts, phrase",
    [(np.zeros((4, 2, 2), np.int64), "layers"), (np.full((4, 3, 2), 9), "outside"), (np.ones((4, 3, 2), np.int64), "twice")],
)
def test_routing_that_does_not_fit_the_model_is_refused(small_model, experts, phrase):
    with pytest.raises(BadTrace, match=phrase):
        moerun.load(small_model, tokenizer=False, routing=Trace(experts, meta={"n_experts": 10}))


@pytest.mark.parametrize("bad", [1e30, -0.25, 0.0, float("nan")], ids=["huge", "negative", "zero", "nan"])
def test_generate_refuses_a_routing_file_whose_weights_no_router_could_give(pebble, tmp_path, capsys, bad):
    # issue 23, item 15: the weights of a --routing trace are softmax probabilities of the chosen experts
    # (docs/design/architecture.md section 3), so each lies in (0, 1] and a row sums to at most 1
    from moerun.cli.main import main
    from moerun.files.trace import write_trace

    with moerun.load(pebble, tokenizer=False) as eng:
        eng.start_trace()
        eng.generate(prompt_ids=[5, 6, 7], max_new=4, sampling=SAMPLING)
        trace = eng.finish_trace()
    path = tmp_path / "routing.npz"
    write_trace(path, trace)
    assert main(["generate", "--model", str(pebble), "--routing", str(path), "--max-new", "2", "--quiet"]) == 0
    capsys.readouterr()
    trace.weights[1, 0, 0] = bad
    write_trace(path, trace)
    assert main(["generate", "--model", str(pebble), "--routing", str(path), "--max-new", "2", "--quiet"]) == 2
    captured = capsys.readouterr()
    assert captured.out == "" and len(captured.err.strip().splitlines()) == 1
    assert "'weights'" in captured.err


def test_routing_weights_of_rows_that_sum_past_one_are_refused(small_model):
    ex = np.tile(np.array([[0, 1]]), (4, 3, 1))
    weights = np.full(ex.shape, 0.75, np.float32)
    with pytest.raises(BadTrace, match="sum to"):
        moerun.load(small_model, tokenizer=False, routing=Trace(ex, weights=weights, meta={"n_experts": 8}))
