"""Perplexity scoring (moerun/checks/score.py, moerun score)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import moerun
from moerun.checks.score import score_text, score_windows, text_windows, window_nll
from moerun.cli.main import main
from moerun.runtime.budget import minimum_cap

TEXT = "Fog came in over the ridge at dawn; the nets dripped and the cistern rose by a finger.\n" * 6


@settings(max_examples=100, deadline=None)
@given(n=st.integers(0, 700), context=st.integers(2, 64), bos=st.sampled_from([None, 0, 5]))
def test_windows_fit_the_context_and_predict_every_token_once(n, context, bos):
    ids = np.arange(1000, 1000 + n)
    wins = text_windows(ids, context, bos)
    assert all(2 <= w.size <= context for w in wins)
    if bos is not None:
        assert all(w[0] == bos for w in wins)
        targets = np.concatenate([w[1:] for w in wins]) if wins else np.array([], int)
        assert np.array_equal(targets, ids)  # every token of the text predicted exactly once, in order
    else:
        runs = np.concatenate([w for w in wins]) if wins else np.array([], int)
        assert np.array_equal(runs, ids[: runs.size])


def test_uniform_logits_give_log_vocab_per_token():
    # Cross-entropy of a uniform distribution over V outcomes is ln V (common practice, no source).
    v = 37
    nll, n = window_nll(np.zeros((10, v), np.float32), np.arange(10) % v)
    assert n == 9
    assert nll / n == pytest.approx(math.log(v), rel=1e-12)


def test_window_nll_is_minus_log_softmax_of_the_next_token():
    rng = np.random.default_rng(0)
    logits = rng.standard_normal((6, 11)).astype(np.float32) * 40  # large: needs the max shift
    ids = rng.integers(0, 11, 6)
    nll, n = window_nll(logits, ids)
    z = logits.astype(np.float64)
    want = sum(np.log(np.sum(np.exp(z[i] - z[i].max()))) + z[i].max() - z[i, ids[i + 1]] for i in range(5))
    assert n == 5 and nll == pytest.approx(want, rel=1e-12)


def test_perplexity_matches_torch_reference_logits(bundled):
    # Outside reference: the model's reference.npz, logits of the PyTorch
    # implementation (moerun/checks/torch_twin.py, float32; torch version recorded in the file).
    ref = np.load(bundled / "reference.npz")
    windows, logits = ref["token_ids"], ref["logits"]
    nll, n = 0.0, 0
    for ids, z in zip(windows, logits):
        z = z.astype(np.float64)[:-1]
        lse = np.log(np.exp(z - z.max(-1, keepdims=True)).sum(-1)) + z.max(-1)
        nll += float(np.sum(lse - z[np.arange(len(ids) - 1), ids[1:]]))
        n += len(ids) - 1
    want = math.exp(nll / n)
    with moerun.load(bundled, tokenizer=False) as eng:
        got = score_windows(eng, windows)
    assert got.predicted == n and got.windows == len(windows)
    assert got.perplexity == pytest.approx(want, rel=1e-4)


def test_plain_windows_reproduce_the_bundled_card(bundled):
    # The bundled model's CARD.md (written by scripts/train_tiny.py from the PyTorch model) gives the
    # held-out cross-entropy of its heldout.txt under the plain-window rule to 3 decimals,
    # and the number of predicted tokens.
    import re

    card = (bundled / "CARD.md").read_text(encoding="utf-8")
    m = re.search(r"bundled heldout\.txt \(\d+ KB, ([\d,]+) predicted tokens\) \| \*\*([\d.]+) nats/token", card)
    if m is None:
        pytest.skip("the bundled card does not state its held-out cross-entropy in the expected form")
    n_card, ce_card = int(m.group(1).replace(",", "")), float(m.group(2))
    with moerun.load(bundled) as eng:
        got = score_text(eng, (bundled / "heldout.txt").read_text(encoding="utf-8"), plain=True)
    assert got.predicted == n_card
    assert abs(got.cross_entropy - ce_card) <= 0.0005 + 1e-9


def test_capped_score_equals_resident_score_exactly(small_model):
    with moerun.load(small_model) as eng:
        s = eng.store
        cap = minimum_cap(s.config, s.dense_nbytes, s.expert_nbytes, "even", s.codec.scratch_bytes())
        full = score_text(eng, TEXT)
    with moerun.load(small_model, mem_cap=cap, evict="fifo") as eng:
        capped = score_text(eng, TEXT)
        assert eng.pool.stats.prefill_loads > eng.budget.n_slots  # experts really came and went
    assert capped.nll_sum == full.nll_sum and capped.predicted == full.predicted


def test_score_command_json(small_model, tmp_path, capsys):
    text = tmp_path / "t.txt"
    text.write_text(TEXT, encoding="utf-8")
    code = main(["score", "--model", str(small_model), "--text", str(text), "--max-tokens", "100", "--json"])
    doc = json.loads(capsys.readouterr().out)
    assert code == 0
    with moerun.load(small_model) as eng:
        want = score_text(eng, TEXT, 100)
    assert doc["predicted_tokens"] == 100 == want.predicted
    assert doc["perplexity"] == pytest.approx(want.perplexity, rel=1e-12)
    assert doc["tok_s"] > 0


def test_score_command_rejects_text_that_is_not_utf8(small_model, tmp_path, capsys):
    bad = tmp_path / "latin1.txt"
    bad.write_bytes("caf\u00e9 cr\u00e8me".encode("latin-1"))
    code = main(["score", "--model", str(small_model), "--text", str(bad)])
    err = capsys.readouterr().err
    assert code == 2 and "UTF-8" in err and len(err.strip().splitlines()) == 1


def test_score_command_needs_a_text_when_the_model_has_no_heldout(small_model, capsys):
    code = main(["score", "--model", str(small_model)])
    err = capsys.readouterr().err
    assert code == 2 and "heldout.txt" in err


def test_score_command_default_text_is_the_bundled_heldout(pebble, capsys):
    code = main(["score", "--model", str(pebble), "--max-tokens", "300", "--mem-cap", "13MiB", "--json"])
    doc = json.loads(capsys.readouterr().out)
    assert code == 0
    assert doc["text"].endswith("heldout.txt") and doc["predicted_tokens"] == 300
    assert doc["budget"]["cap_bytes"] == 13 * 2**20


# ---------------------------------------------------------------------------- non-finite numbers: one check, one line


def _weights_with_inf_in_every_expert(src, dst):
    """A copy of ``src`` whose experts of layer 0 hold an infinity (dense weights stay finite, so it loads)."""
    import shutil
    import struct

    from moerun.files.modelfile import read_header

    shutil.copytree(src, dst)
    path = dst / "model.safetensors"
    header = read_header(path)
    blob = bytearray(path.read_bytes())
    for name, t in header.tensors.items():
        if name.startswith("layers.0.experts.") and name.endswith("w_down"):
            blob[t.start : t.start + 4] = struct.pack("<f", float("inf"))
    path.write_bytes(bytes(blob))
    return dst


def _moerun(*argv):
    import os
    import subprocess
    import sys

    from conftest import ROOT

    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    return subprocess.run([sys.executable, "-m", "moerun", *argv], capture_output=True, text=True, env=env, timeout=120)


@pytest.mark.parametrize("command", ["score", "record", "generate"])
def test_weights_holding_inf_give_one_line_and_no_numpy_warning_in_every_command(small_model, tmp_path, command):
    d = _weights_with_inf_in_every_expert(small_model, tmp_path / "inf")
    text = tmp_path / "t.txt"
    text.write_text(TEXT)
    argv = {
        "score": ["score", "--model", str(d), "--text", str(text), "--json"],
        "record": ["record", "--model", str(d), "--text", str(text), "--trace", str(tmp_path / "t.npz"), "--json"],
        "generate": ["generate", "--model", str(d), "--prompt", "fog", "--max-new", "3"],
    }[command]
    proc = _moerun(*argv)
    assert proc.returncode == 2, proc.stdout[:300]
    assert proc.stderr.strip().splitlines() == [proc.stderr.strip()] and "non-finite" in proc.stderr
    assert "RuntimeWarning" not in proc.stderr and "NaN" not in proc.stdout
    assert proc.stdout == ""
    assert not (tmp_path / "t.npz").exists()


def test_engine_logits_refuse_non_finite_numbers_through_the_api(small_model, tmp_path):
    d = _weights_with_inf_in_every_expert(small_model, tmp_path / "inf")
    with moerun.load(d) as eng:
        with np.errstate(all="ignore"), pytest.raises(moerun.BadModelFile, match="non-finite"):
            score_text(eng, TEXT)


def test_scoring_a_model_whose_context_holds_one_token_is_one_clear_error(synth_models, tmp_path, capsys):
    model = synth_models(layers=1, experts=2, top_k=1, max_seq_len=1)
    (tmp_path / "t.txt").write_text(TEXT)
    code = main(["score", "--model", str(model), "--text", str(tmp_path / "t.txt")])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and "context of 1" in err


def test_scoring_a_text_of_one_token_in_plain_windows_is_one_clear_error(small_model, tmp_path, capsys):
    text = tmp_path / "one.txt"
    text.write_text("a")
    code = main(["score", "--model", str(small_model), "--text", str(text), "--plain-windows"])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and "too few tokens" in err


# ---------------------------------------------------------------------------- the cap bounds scoring, for every storage format


@pytest.fixture(scope="module")
def storage_formats(pebble, tmp_path_factory):
    """The bundled model as F32 (as shipped), F16 and 4-bit experts."""
    import shutil

    from moerun.files.modelfile import save_model_file
    from moerun.files.packed import QuantSpec
    from moerun.files.store import ModelStore
    from moerun.makers.quantize import quantize_model

    root = tmp_path_factory.mktemp("formats")
    f16 = root / "f16"
    f16.mkdir()
    st = ModelStore.open(pebble)
    try:
        tensors = {n: st.read_tensor(n).astype(np.float16) for n in st.header.tensors}
    finally:
        st.close()
    save_model_file(f16 / "model.safetensors", tensors)
    for name in ("tokenizer.json", "heldout.txt"):
        shutil.copyfile(pebble / name, f16 / name)
    cfg = json.loads((pebble / "config.json").read_text())
    (f16 / "config.json").write_text(json.dumps({**cfg, "dtype": "F16"}))
    q4 = root / "q4"
    quantize_model(pebble, q4, QuantSpec.checked(4, 16, 64, "rtn"), score=False)
    return {"F32": pebble, "F16": f16, "4-bit": q4}


@pytest.mark.parametrize("fmt", ["F32", "F16", "4-bit"])
def test_score_at_the_smallest_cap_stays_within_the_cap_for_every_storage_format(storage_formats, capsys, fmt):
    from moerun.cli.summary import CAP_ALLOWANCE_BYTES

    model = storage_formats[fmt]
    with moerun.load(model, tokenizer=False) as eng:
        s = eng.store
        cap = minimum_cap(s.config, s.dense_nbytes, s.expert_nbytes, "even", s.codec.scratch_bytes())
    code = main(["score", "--model", str(model), "--mem-cap", str(cap), "--max-tokens", "1500", "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    doc = json.loads(out)
    assert doc["peak_rss_growth_bytes"] <= cap + CAP_ALLOWANCE_BYTES, (doc["peak_rss_growth_bytes"] - cap) / 2**20
    assert doc["cap_exceeded"] is False and "warning" not in err


def test_window_loss_keeps_its_float64_temporaries_small():
    import tracemalloc

    logits = np.random.default_rng(0).standard_normal((256, 2048)).astype(np.float32)
    ids = np.random.default_rng(1).integers(0, 2048, 256)
    tracemalloc.start()
    s, n = window_nll(logits, ids)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert n == 255 and peak < 2 * 2**20  # a whole window in float64 would be 4 MiB, and its exp another 4
    z = logits[:255].astype(np.float64)
    m = z.max(axis=-1, keepdims=True)
    want = float(np.sum(m[:, 0] + np.log(np.exp(z - m).sum(axis=-1)) - z[np.arange(255), ids[1:]]))
    assert s == pytest.approx(want, rel=1e-12)


def test_a_measured_peak_above_the_cap_is_warned_on_stderr_and_marked_in_json(small_model, tmp_path, capsys, monkeypatch):
    from moerun.runtime.memwatch import MemWatch

    text = tmp_path / "t.txt"
    text.write_text(TEXT)
    with moerun.load(small_model, tokenizer=False) as eng:
        s = eng.store
        cap = minimum_cap(s.config, s.dense_nbytes, s.expert_nbytes, "even", s.codec.scratch_bytes())
    monkeypatch.setattr(MemWatch, "peak_growth", lambda self: cap + (64 << 20))  # as if the run had grown past it
    for command in ("score", "generate"):
        argv = [command, "--model", str(small_model), "--mem-cap", str(cap), "--json"]
        argv += ["--text", str(text)] if command == "score" else ["--prompt", "hi", "--max-new", "2"]
        assert main(argv) == 0
        out, err = capsys.readouterr()
        assert json.loads(out)["cap_exceeded"] is True
        assert err.strip().startswith(f"moerun {command}: warning: peak resident-set growth") and "exceeded the memory cap" in err


def test_a_long_window_is_scored_one_pass_of_logits_at_a_time_with_the_same_loss(tmp_path):
    """A window longer than one pass (an open checkpoint's context of thousands of tokens) never holds all its
    logits at once; the loss is the one of the whole window's logits."""
    import numpy as np

    from moerun.checks.score import passes_nll, window_nll
    from moerun.makers.synth_open import OpenShape, synthesize_open
    from moerun.model.transformer import PREFILL_CHUNK

    d = tmp_path / "ck"
    synthesize_open(d, OpenShape("olmoe", layers=2, experts=4, hidden=64, expert_width=32, context=1024), seed=1)
    ids = np.random.default_rng(3).integers(2, 258, 2 * PREFILL_CHUNK + 77)
    with moerun.load(d) as eng:
        passes = list(eng.logits_in_passes(ids))
        whole = eng.logits(ids)
    assert [p.shape[0] for p in passes] == [PREFILL_CHUNK, PREFILL_CHUNK, 77]
    got, n = passes_nll(iter(passes), ids)
    want, m = window_nll(whole, ids)
    assert n == m == ids.size - 1 and abs(got - want) <= 1e-6 * abs(want)
