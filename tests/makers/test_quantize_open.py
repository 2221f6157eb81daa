"""quantize from an open checkpoint: the packed model of each architecture loads, runs, stays near its source,
runs offloaded exactly as resident, and is written without the model held in memory.

The fixtures are tests/fixtures/open (random weights written by the transformers library; README there).  A random
model's perplexity says nothing about quality: these tests check closeness to the source, not quality.
"""

from __future__ import annotations

import json
import shutil
import struct
import sys
from pathlib import Path

import numpy as np
import pytest
from _rss_watch import peak_of_child

import moerun
from moerun.checks.jobs import verify
from moerun.cli import main as cli
from moerun.files.config import ModelConfig
from moerun.files.packed import FORMAT, FORMAT_ARCH, QuantSpec, expert_layout
from moerun.files.store import ModelStore
from moerun.makers.jobs import quantize
from moerun.makers.quantize import dequantize_matrix
from moerun.makers.synth_open import OpenShape, synthesize_open

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures" / "open"
# one variant of each architecture, and each layout: F32, BF16 per expert in shards, BF16 fused (sharded or not)
VARIANTS = ["qwen3_moe-f32", "qwen3_moe-bf16-fused-sharded", "qwen2_moe-bf16-sharded-v4", "qwen2_moe-f32",
            "olmoe-bf16-fused", "olmoe-bf16-sharded-v4"]
TEXT = ("The fog nets on the ridge caught water before dawn. Stations along the coast report the yield each morning. "
        "A harvester checks the mesh for tears and the gutters for silt.\n")


@pytest.fixture(scope="module")
def quantized(tmp_path_factory):
    """{(variant, bits): quantized directory}, made on demand (rtn, no scoring)."""
    root = tmp_path_factory.mktemp("quantized")
    made: dict = {}

    def get(variant: str, bits: int, method: str = "rtn") -> Path:
        key = (variant, bits, method)
        if key not in made:
            out = root / f"{variant}-{bits}-{method}"
            quantize(out, FIXTURES / variant, expert_bits=bits, method=method, score=False)
            made[key] = out
        return made[key]

    return get


def _stored_tensor(directory: Path, name: str) -> np.ndarray:
    """A tensor of a checkpoint read with json and struct only (the safetensors format: an 8-byte little-endian
    header length, a JSON header of dtype/shape/data_offsets, then the data), BF16 widened by hand: the upper 16
    bits of a float32 (IEEE 754 binary32).  Independent of moerun's readers."""
    index = directory / "model.safetensors.index.json"
    fname = json.loads(index.read_text())["weight_map"][name] if index.exists() else "model.safetensors"
    raw = (directory / fname).read_bytes()
    (n,) = struct.unpack("<Q", raw[:8])
    info = json.loads(raw[8 : 8 + n])[name]
    a, b = info["data_offsets"]
    data = raw[8 + n + a : 8 + n + b]
    if info["dtype"] == "BF16":
        return (np.frombuffer(data, "<u2").astype(np.uint32) << 16).view(np.float32).reshape(info["shape"])
    assert info["dtype"] == "F32"
    return np.frombuffer(data, "<f4").reshape(info["shape"])


def _source_expert(directory: Path, block: int, e: int) -> list[np.ndarray]:
    """Expert e of layer ``block`` as float32 (in, out) matrices (w_gate, w_up, w_down), per-expert or fused layout."""
    index = directory / "model.safetensors.index.json"
    names = json.loads(index.read_text())["weight_map"] if index.exists() else None
    p = f"model.layers.{block}.mlp.experts"
    if names is not None and f"{p}.{e}.gate_proj.weight" in names or names is None and not _has_fused(directory, p):
        return [_stored_tensor(directory, f"{p}.{e}.{part}_proj.weight").T for part in ("gate", "up", "down")]
    gate_up = _stored_tensor(directory, f"{p}.gate_up_proj")[e]
    width = gate_up.shape[0] // 2
    return [gate_up[:width].T, gate_up[width:].T, _stored_tensor(directory, f"{p}.down_proj")[e].T]


def _has_fused(directory: Path, prefix: str) -> bool:
    raw = (directory / "model.safetensors").read_bytes()
    (n,) = struct.unpack("<Q", raw[:8])
    return f"{prefix}.gate_up_proj" in json.loads(raw[8 : 8 + n])


def _dequantized_expert(qdir: Path, block: int, e: int) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """An expert's blob of a quantized model, dequantized by the reference formula; and each matrix's step sizes."""
    store = ModelStore.open(qdir)
    try:
        spec = QuantSpec.from_config(store.config)
        layout = expert_layout(store.config, spec.expert_bits, spec.group)
        blob = store.read_tensor(f"layers.{block}.experts.{e}.packed")
    finally:
        store.close()
    mats, steps = [], []
    for codes, scale, zero in layout.unpack(blob):
        mats.append(dequantize_matrix(codes, scale, zero, spec.group))
        steps.append(np.repeat(scale.astype(np.float32), spec.group, axis=0)[: codes.shape[0]])
    return mats, steps


# ---------------------------------------------------------------------------- the format


@pytest.mark.parametrize("variant", VARIANTS)
def test_a_quantized_checkpoint_records_its_architecture_and_loads_and_generates(quantized, variant):
    q = quantized(variant, 4)
    raw = json.loads((q / "config.json").read_text())
    src = moerun.load(FIXTURES / variant)
    try:
        want = src.config
        want_ids = src.generate(prompt="fog nets", max_new=6).new_ids
    finally:
        src.close()
    assert raw["quant"]["format"] == FORMAT_ARCH and "model_type" not in raw
    c = ModelConfig.from_dict(raw)
    for field in ("arch", "dense_layers", "d_dense", "qk_norm", "qkv_bias", "clip_qkv", "shared_gate", "eos_token_ids",
                  "bos_token_id", "n_layers", "d_shared", "norm_topk", "tied_embeddings"):
        assert getattr(c, field) == getattr(want, field), field
    assert (q / "tokenizer.json").read_bytes() == (FIXTURES / variant / "tokenizer.json").read_bytes()
    with moerun.load(q) as eng:
        assert eng.config.max_seq_len == want.max_seq_len  # the checkpoint's own context, capped the same way
        got = eng.generate(prompt="fog nets", max_new=6)
        assert len(got.new_ids) == 6 == len(want_ids) and all(0 <= t < c.vocab_size for t in got.new_ids)


@pytest.mark.parametrize("variant", VARIANTS)
def test_logits_stay_near_the_source_and_nearer_at_8_bits_than_at_4(quantized, variant):
    # The bound: at 8 bits every expert weight is within half a step (range / 255 / 2) of the source's, a relative
    # RMS error of about 0.5 %; through these two- and three-layer models that moves no logit by more than 10 % of
    # the logits' spread (measured: at most 3 %), and no position's argmax changes.  At 4 bits the steps are 17 times
    # coarser, and so is the error (measured: 16-48 % of the spread).
    ref = np.load(FIXTURES / variant / "reference.npz")
    ids = ref["tokens_0"]
    with moerun.load(FIXTURES / variant) as src:
        want = src.logits(ids)
    err = {}
    for bits in (8, 4):
        with moerun.load(quantized(variant, bits)) as eng:
            got = eng.logits(ids)
        err[bits] = float(np.abs(got - want).max() / want.std())
        if bits == 8:
            assert np.array_equal(got.argmax(axis=1), want.argmax(axis=1))
    assert err[8] < 0.1
    assert err[8] < err[4] / 4


@pytest.mark.parametrize("variant", ["qwen2_moe-bf16-sharded-v4", "olmoe-f32", "qwen3_moe-bf16-fused-sharded"])
def test_8_bit_attention_of_a_checkpoint_is_packed_and_stays_near_the_source(tmp_path, variant):
    # attention's matrices come from the checkpoint's [out, in] tensors transposed, then quantized like an expert's;
    # the same half-step bound, now on attention too (relative RMS error about 0.5 %), moved the logits by at most
    # 6.3 % of their spread here (expert-only: 3 %): bounded at 15 %, and no argmax changes
    out = tmp_path / "q"
    rep = quantize(out, FIXTURES / variant, expert_bits=8, attn_bits=8, method="rtn", score=False)
    assert 0 < rep.attn_rel_rms < 0.01 and rep.to_json()["attn_dtype"] == "U8"
    ids = np.load(FIXTURES / variant / "reference.npz")["tokens_0"]
    with moerun.load(FIXTURES / variant) as a, moerun.load(out) as b:
        want, got = a.logits(ids), b.logits(ids)
    assert np.abs(got - want).max() < 0.15 * want.std()
    assert np.array_equal(got.argmax(axis=1), want.argmax(axis=1))


def test_clip_qkv_is_carried_and_computed(tmp_path):
    # the olmoe fixture has no clip; with one set small enough to bite, the quantized model must clip as the
    # checkpoint does (the logits differ from the unclipped ones by far more than 8-bit quantization moves them)
    src = tmp_path / "ck"
    shutil.copytree(FIXTURES / "olmoe-f32", src)
    raw = json.loads((src / "config.json").read_text())
    raw["clip_qkv"] = 0.05
    (src / "config.json").write_text(json.dumps(raw))
    out = tmp_path / "q"
    quantize(out, src, expert_bits=8, method="rtn", score=False)
    assert ModelConfig.load(out).clip_qkv == 0.05
    ids = np.load(FIXTURES / "olmoe-f32" / "reference.npz")["tokens_0"]
    with moerun.load(src) as a, moerun.load(out) as b, moerun.load(FIXTURES / "olmoe-f32") as plain:
        want, got, unclipped = a.logits(ids), b.logits(ids), plain.logits(ids)
    assert np.abs(got - want).max() < 0.1 * want.std() < np.abs(unclipped - want).max()


@pytest.mark.parametrize("variant", VARIANTS)
def test_at_8_bits_every_expert_weight_is_within_half_a_step_of_the_source(quantized, variant):
    # rtn's guarantee (round to nearest: a value inside the grid's range lands within half a step of its code's
    # value; common practice, no source).  Slack: float32 rounding in x/s + z and (q - z) * s.  The source weights
    # are read here with json/struct and widened by hand, not by moerun.
    q = quantized(variant, 8)
    c = ModelConfig.load(q)
    for layer, block in enumerate(c.routed_blocks()):
        for e in (0, c.n_experts - 1):
            src = _source_expert(FIXTURES / variant, block, e)
            deq, steps = _dequantized_expert(q, block, e)
            for w, d, step in zip(src, deq, steps):
                assert d.shape == w.shape
                assert np.all(np.abs(d - w) <= step / 2 + 1e-4 * step + 1e-6 * np.abs(w)), (layer, e)


@pytest.mark.parametrize("variant", ["qwen3_moe-bf16-sharded-v4", "qwen3_moe-bf16-fused-sharded", "olmoe-bf16-sharded-v4",
                                     "qwen2_moe-bf16-sharded-v4"])
def test_an_expert_straddling_two_shards_dequantizes_within_half_a_step_of_its_bf16_widening(quantized, variant):
    manifest = json.loads((FIXTURES / "manifest.json").read_text())["variants"][variant]
    straddling = manifest["straddling_experts"]
    assert straddling  # the fixture has such experts (manifest.json)
    block, e = straddling[0]
    index = json.loads((FIXTURES / variant / "model.safetensors.index.json").read_text())["weight_map"]
    p = f"model.layers.{block}.mlp.experts"
    files = {index[n] for n in index if n.startswith(f"{p}.{e}.") or n in (f"{p}.gate_up_proj", f"{p}.down_proj")}
    assert len(files) >= 2  # really in two shards
    q = quantized(variant, 8)
    deq, steps = _dequantized_expert(q, block, e)
    for w, d, step in zip(_source_expert(FIXTURES / variant, block, e), deq, steps):
        assert np.all(np.abs(d - w) <= step / 2 + 1e-4 * step + 1e-6 * np.abs(w))


def test_the_embedding_table_of_an_untied_model_is_read_a_row_at_a_time_exactly(quantized):
    variant = "qwen3_moe-bf16-fused-sharded"
    assert not json.loads((FIXTURES / variant / "config.json").read_text())["tie_word_embeddings"]
    want = _stored_tensor(FIXTURES / variant, "model.embed_tokens.weight")
    store = ModelStore.open(quantized(variant, 4))
    try:
        assert store.dense["embed"] is None and "embed" in store.header.tensors
        ids = [0, 5, 287, 5]
        assert np.array_equal(store.embed[ids], want[ids])
        assert store.dense_nbytes == sum(a.nbytes for a in store.dense.values() if a is not None)  # the table not counted
    finally:
        store.close()


def test_dense_weights_kept_as_stored_is_refused_for_a_quantized_checkpoint_in_one_line(quantized):
    # its dense matrices are held as float32 (ModelStore); the option would otherwise be silently ignored
    with pytest.raises(moerun.errors.BadOption, match="quantized checkpoint") as e:
        moerun.load(quantized("olmoe-bf16-fused", 4), dense_weights="stored")
    assert len(str(e.value).splitlines()) == 1


def test_inspect_names_the_architecture_of_a_quantized_checkpoint(quantized, capsys):
    q = quantized("qwen3_moe-bf16-fused-sharded", 4)
    assert cli.main(["inspect", "--model", str(q), "--check"]) == 0
    out = capsys.readouterr().out
    assert "3 layers (2 routed)" in out and "from a qwen3_moe checkpoint: 1 dense layer(s) (layers 1, width 64)" in out
    assert "q/k norm per_head" in out and "eos [1]" in out
    assert cli.main(["inspect", "--model", str(q), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["config"]["arch"] == "qwen3_moe" and doc["config"]["dense_layers"] == [1]


# ---------------------------------------------------------------------------- exactness


@pytest.mark.parametrize("variant", ["qwen3_moe-bf16-fused-sharded", "qwen2_moe-bf16-sharded-v4", "olmoe-bf16-fused"])
def test_the_quantized_checkpoint_offloaded_is_bit_identical_to_resident(quantized, variant):
    # verify's default settings: every online policy at the smallest cap, a middle cap, a shared pool (lru and orbit),
    # prefetch with lookahead 1 and 2 and an emulated link
    result = verify(quantized(variant, 4, "hqq"), "The fog nets on the ridge", max_new=10, temperature=0.9, seed=3)
    doc = result.to_json()
    runs = doc["results"]
    assert doc["ok"] and len(runs) >= 8 and all(r["tokens_equal"] and r["logits_equal"] for r in runs)
    assert all(r["max_abs_diff"] == 0.0 for r in runs)
    options = [r["options"] for r in runs]
    assert any(o.get("split") == "shared" for o in options) and any(o.get("prefetch") for o in options)
    assert any(o.get("link_speed") for o in options) and any(r["hit_rate"] < 1 for r in runs)


# ---------------------------------------------------------------------------- the command


def test_the_command_scores_source_and_result_on_the_text_given(tmp_path, capsys):
    text = tmp_path / "held.txt"
    text.write_text(TEXT)
    out = tmp_path / "q"
    code = cli.main(["quantize", "--model", str(FIXTURES / "qwen2_moe-bf16-fused"), str(out), "--expert-bits", "8",
                     "--method", "rtn", "--text", str(text), "--json"])
    doc = json.loads(capsys.readouterr().out)
    assert code == 0
    h = doc["heldout"]
    assert h["text"] == "held.txt" and h["predicted_tokens"] > 50
    assert abs(h["relative_change"]) < 0.01  # 8 bits: within 1 % of the source's perplexity (measured +0.01 %)
    # the source is scored by the engine as `moerun score` would, and gives the same number
    with moerun.load(FIXTURES / "qwen2_moe-bf16-fused") as eng:
        from moerun.checks.score import score_text
        assert score_text(eng, TEXT).perplexity == h["source"]["perplexity"]
    card = (out / "CARD.md").read_text()
    assert "held.txt" in card and f"{h['quantized']['perplexity']:.4f}" in card


@pytest.mark.parametrize("case", ["no text", "bad text", "bits", "exists", "inside", "truncated shard", "corrupt header"])
def test_bad_input_is_one_line_exit_2_and_nothing_is_left(tmp_path, capsys, case):
    src = tmp_path / "ck"
    shutil.copytree(FIXTURES / "olmoe-bf16-sharded-v4", src)
    out = tmp_path / "q"
    args = ["quantize", "--model", str(src), str(out), "--no-score", "--method", "rtn"]
    want = {"no text": "--text", "bad text": "UTF-8", "bits": "--expert-bits", "exists": "--force", "inside": "inside",
            "truncated shard": "model-00003-of-00009", "corrupt header": "model-00005-of-00009"}[case]
    if case == "no text":
        args.remove("--no-score")
    elif case == "bad text":  # refused before anything is quantized
        args.remove("--no-score")
        (tmp_path / "t.txt").write_bytes(b"fog \xff\xfe nets")
        args += ["--text", str(tmp_path / "t.txt")]
    elif case == "bits":
        args += ["--expert-bits", "5"]
    elif case == "exists":  # a model directory (it has a config.json): replaced only with --force
        out.mkdir()
        (out / "config.json").write_text("{}")
    elif case == "inside":
        args[3] = str(src / "q")
    elif case == "truncated shard":
        shard = src / "model-00003-of-00009.safetensors"
        shard.write_bytes(shard.read_bytes()[:-100])
    else:
        shard = src / "model-00005-of-00009.safetensors"
        data = bytearray(shard.read_bytes())
        data[8:16] = b"\x00" * 8
        shard.write_bytes(bytes(data))
    before = sorted(p.name for p in tmp_path.iterdir())
    try:
        code = cli.main(args)
    except SystemExit as e:  # the parser's refusals (a choice out of range) exit from inside it
        code = e.code
    _, err = capsys.readouterr()
    assert code == 2 and len(err.strip().splitlines()) == 1 and want in err, err
    assert sorted(p.name for p in tmp_path.iterdir()) == before  # no output, no temporary
    assert not (src / "q").exists()
    if case == "exists":
        assert [p.name for p in out.iterdir()] == ["config.json"] and (out / "config.json").read_text() == "{}"


def test_a_moerun_model_is_still_written_in_todays_format(tmp_path):
    q = tmp_path / "q"
    quantize(q, "pebble", expert_bits=4, method="rtn", score=False)
    assert json.loads((q / "config.json").read_text())["quant"]["format"] == FORMAT


PACKED_V1 = Path(__file__).resolve().parents[1] / "fixtures" / "packed-v1"


def test_a_packed_model_written_before_this_change_still_loads_and_runs_as_then():
    # tests/fixtures/packed-v1: a synth model quantized by the moerun of commit 298cf9b (its README says how), with
    # the logits that moerun computed for a fixed prompt
    ref = np.load(PACKED_V1 / "expected.npz")
    with moerun.load(PACKED_V1 / "model") as eng:
        assert QuantSpec.from_config(eng.config).format == FORMAT
        assert np.array_equal(eng.logits(ref["ids"]), ref["logits"])


def test_format_1_cannot_claim_an_architecture(tmp_path):
    d = tmp_path / "m"
    shutil.copytree(PACKED_V1 / "model", d)
    raw = json.loads((d / "config.json").read_text())
    raw["qk_norm"] = "per_head"
    (d / "config.json").write_text(json.dumps(raw))
    with pytest.raises(moerun.errors.BadModelFile, match="moerun-packed/2"):
        ModelStore.open(d)


# ---------------------------------------------------------------------------- memory

CHILD = r"""
import sys
import numpy, moerun, moerun.makers.jobs  # imported before the baseline is read
print("ready", flush=True)
sys.stdin.readline()
moerun.makers.jobs.quantize(sys.argv[1], sys.argv[2], expert_bits=4, method="rtn", score=False)
print("done", flush=True)
"""


def test_quantizing_a_checkpoint_of_300_mb_keeps_the_resident_set_far_below_it(tmp_path):
    # The resident set is read by psutil (the general-purpose library; on Linux memory_info().rss is the kernel's
    # VmRSS) from this process every few milliseconds while a child quantizes; the child's baseline is its resident
    # set once numpy and moerun are imported.  Measured: about 43 MiB of growth for 336 MiB of checkpoint.
    ck = tmp_path / "ck"
    shape = OpenShape("qwen2_moe", layers=4, experts=24, hidden=1024, expert_width=512, top_k=2, heads=8, kv_heads=2,
                      shared_width=512, context=1024, vocab=4096)
    size = synthesize_open(ck, shape, seed=3, shard_bytes=100 << 20)["file_bytes"]
    assert size > 300_000_000
    code, out, baseline, peak = peak_of_child([sys.executable, "-c", CHILD, str(tmp_path / "q"), str(ck)])
    assert code == 0 and "done" in out
    assert peak - baseline < size / 4, (peak - baseline, size)
