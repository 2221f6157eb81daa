"""moerun.model.sampling: greedy, temperature and top-p choices, seeded.

References: the softmax with temperature, p_i = exp(z_i / T) / sum_j exp(z_j / T) (Goodfellow, Bengio and
Courville, Deep Learning, 2016, section 6.2.2.3); nucleus (top-p) sampling keeps the smallest set of most
probable tokens whose probability reaches p and renormalises (Holtzman et al., "The Curious Case of Neural
Text Degeneration", ICLR 2020, section 3.1).  Frequencies are compared with the binomial standard error
(common practice, no source).
"""

from __future__ import annotations

import numpy as np
import pytest

from moerun.errors import BadOption
from moerun.model.sampling import Sampler, Sampling

LOGITS = np.array([2.0, 1.0, 0.5, -1.0], np.float32)


def _draws(sampling: Sampling, logits: np.ndarray, n: int) -> np.ndarray:
    s = Sampler(sampling)
    return np.array([s(logits) for _ in range(n)])


def test_temperature_zero_is_the_first_largest_logit():
    assert Sampler(Sampling(0.0, 1.0, 0))(LOGITS) == 0
    tie = np.array([0.0, 3.0, 3.0, 1.0], np.float32)
    assert Sampler(Sampling(0.0, 1.0, 7))(tie) == int(np.argmax(tie)) == 1


def test_frequencies_follow_the_softmax_with_temperature():
    t, n = 0.7, 20_000
    z = LOGITS.astype(np.float64) / t
    p = np.exp(z - z.max())
    p /= p.sum()
    counts = np.bincount(_draws(Sampling(t, 1.0, 3), LOGITS, n), minlength=len(p))
    se = np.sqrt(p * (1 - p) / n)
    assert np.all(np.abs(counts / n - p) <= 5 * se), (counts / n, p)


def test_top_p_keeps_the_smallest_set_that_reaches_p():
    probs = np.array([0.5, 0.3, 0.15, 0.05])
    logits = np.log(probs).astype(np.float32)  # temperature 1 gives these probabilities back
    got = _draws(Sampling(1.0, 0.75, 11), logits, 4000)
    assert set(got.tolist()) == {0, 1}  # 0.5 < 0.75 <= 0.5 + 0.3
    share = np.mean(got == 0)
    want = 0.5 / 0.8  # renormalised over the nucleus
    assert abs(share - want) <= 5 * np.sqrt(want * (1 - want) / len(got))
    assert set(_draws(Sampling(1.0, 0.4, 11), logits, 200).tolist()) == {0}  # the top token alone reaches 0.4


def test_the_same_seed_draws_the_same_tokens_and_another_seed_others():
    a = _draws(Sampling(1.0, 0.95, 5), LOGITS, 200)
    b = _draws(Sampling(1.0, 0.95, 5), LOGITS, 200)
    c = _draws(Sampling(1.0, 0.95, 6), LOGITS, 200)
    assert np.array_equal(a, b) and not np.array_equal(a, c)


def test_a_temperature_too_small_for_floats_chooses_among_the_largest_logits():
    tie = np.array([4.0, 1.0, 4.0], np.float32)
    got = set(_draws(Sampling(5e-324, 1.0, 2), tie, 200).tolist())
    assert got == {0, 2}


@pytest.mark.parametrize("kw, word", [
    ({"temperature": -0.1}, "temperature"),
    ({"temperature": float("inf")}, "temperature"),
    ({"top_p": 0.0}, "top-p"),
    ({"top_p": 1.5}, "top-p"),
    ({"seed": -1}, "seed"),
    ({"seed": 1.5}, "seed"),
    ({"temperature": "hot"}, "temperature"),
])
def test_bad_settings_are_one_bad_option(kw, word):
    with pytest.raises(BadOption, match=word):
        Sampling(**kw)
