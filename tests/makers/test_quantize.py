"""Quantization (moerun/files/bitpack.py, packed.py, quant.py, quant_card.py; moerun quantize): error bounds, packing,
the blob layout, loading, exactness.

Outside sources named where a check rests on one; invented matrices are only
ever inputs to properties, never expected values.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import moerun
from moerun.cli.main import main
from moerun.files.bitpack import pack_codes, packed_nbytes, unpack_codes
from moerun.files.packed import EXPERT_PARTS, HQQ_P, BlobLayout, Dequantizer, QuantSpec, expert_blob_name, expert_layout
from moerun.files.store import ModelStore
from moerun.makers.quantize import dequantize_matrix, quantize_blob, quantize_matrix, quantize_model
from moerun.model.sampling import Sampling
from moerun.runtime.budget import minimum_cap, scratch_bytes
from tests.conftest import edit_config, edit_header

BITS = (8, 4, 3, 2)


def _bits(a) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float32).view(np.uint32)


@st.composite
def matrices(draw, max_rows: int = 70, max_cols: int = 9):
    """A random (in, out) float32 matrix: gaussian, uniform or heavy-tailed, any scale, sometimes constant columns."""
    rows = draw(st.integers(1, max_rows))
    cols = draw(st.integers(1, max_cols))
    seed = draw(st.integers(0, 2**32 - 1))
    kind = draw(st.sampled_from(["normal", "uniform", "student", "offset", "constant"]))
    scale = draw(st.sampled_from([1e-3, 0.05, 1.0, 30.0]))
    rng = np.random.default_rng(seed)
    if kind == "normal":
        w = rng.standard_normal((rows, cols))
    elif kind == "uniform":
        w = rng.uniform(-1, 1, (rows, cols))
    elif kind == "student":
        w = rng.standard_t(2, (rows, cols))  # heavy tails: a few large outliers per group
    elif kind == "offset":
        w = 3.0 + rng.uniform(0, 0.1, (rows, cols))  # groups that do not straddle zero
    else:
        w = np.full((rows, cols), rng.standard_normal())
    return (w * scale).astype(np.float32)


def _step_per_row(scale: np.ndarray, group: int, rows: int) -> np.ndarray:
    return np.repeat(scale.astype(np.float32), group, axis=0)[:rows]


def _lp_per_group(w: np.ndarray, d: np.ndarray, group: int, p: float) -> np.ndarray:
    """sum over each group's rows of |w - d|**p, per (group, column), float64 (computed here, not by moerun)."""
    e = np.abs(w.astype(np.float64) - d.astype(np.float64)) ** p
    return np.stack([e[i : i + group].sum(axis=0) for i in range(0, w.shape[0], group)])


# ---------------------------------------------------------------------------- error bounds


@settings(max_examples=150, deadline=None)
@given(w=matrices(), bits=st.sampled_from(BITS), group=st.sampled_from([1, 3, 8, 64]))
def test_rtn_dequantized_weights_within_half_a_step(w, bits, group):
    # The uniform quantizer's granular-error bound: a value inside the quantizer's
    # range is reproduced to within half a step (Gersho and Gray, Vector
    # Quantization and Signal Compression, 1992, ch. 5; cited from memory).
    # Slack: float32 rounding in x/s + z and in (q - z) * s.
    codes, scale, zero = quantize_matrix(w, bits, group, "rtn")
    d = dequantize_matrix(codes, scale, zero, group)
    step = _step_per_row(scale, group, w.shape[0])
    slack = 1e-4 * step + 1e-6 * np.abs(w)
    assert codes.max() < 2**bits
    assert np.all(np.abs(d - w) <= step / 2 + slack)


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(w=matrices(), bits=st.sampled_from(BITS), group=st.sampled_from([4, 16, 64]))
def test_hqq_lp_error_never_exceeds_rtn_on_any_group(w, bits, group):
    # Guaranteed by construction (hqq keeps, per group, the best zero point among the
    # rtn start and its iterates); the lp error is recomputed here from the dequantized weights.
    rtn = dequantize_matrix(*quantize_matrix(w, bits, group, "rtn"), group)
    hqq = dequantize_matrix(*quantize_matrix(w, bits, group, "hqq"), group)
    e_rtn = _lp_per_group(w, rtn, group, HQQ_P)
    e_hqq = _lp_per_group(w, hqq, group, HQQ_P)
    assert np.all(e_hqq <= e_rtn * (1 + 1e-12))


def test_hqq_lowers_the_lp_error_of_gaussian_weights():
    # The point of the method: on weights like trained ones (bell-shaped groups),
    # refining the zero point lowers the total lp error below rtn's at low bit widths.
    w = (np.random.default_rng(7).standard_normal((256, 128)) * 0.05).astype(np.float32)
    for bits in (4, 3, 2):
        rtn = dequantize_matrix(*quantize_matrix(w, bits, 64, "rtn"), 64)
        hqq = dequantize_matrix(*quantize_matrix(w, bits, 64, "hqq"), 64)
        assert _lp_per_group(w, hqq, 64, HQQ_P).sum() < _lp_per_group(w, rtn, 64, HQQ_P).sum()


def test_eight_bit_weights_are_far_closer_than_two_bit():
    w = (np.random.default_rng(8).standard_normal((128, 64)) * 0.05).astype(np.float32)
    err = {b: np.abs(dequantize_matrix(*quantize_matrix(w, b, 64, "rtn"), 64) - w).max() for b in BITS}
    assert err[8] < err[4] < err[3] < err[2]


# ---------------------------------------------------------------------------- packing


@pytest.mark.parametrize("bits", BITS)
@pytest.mark.parametrize("n", [1, 2, 3, 5, 7, 8, 9, 13, 31, 33, 1000, 1001])
def test_pack_then_unpack_is_exact(bits, n):
    codes = np.random.default_rng(n * 10 + bits).integers(0, 2**bits, n, dtype=np.uint8)
    packed = pack_codes(codes, bits)
    assert packed.size == packed_nbytes(n, bits)
    assert np.array_equal(unpack_codes(packed, bits, n), codes)


@settings(max_examples=200, deadline=None)
@given(bits=st.sampled_from(BITS), data=st.data())
def test_pack_then_unpack_is_exact_for_any_codes(bits, data):
    codes = np.array(data.draw(st.lists(st.integers(0, 2**bits - 1), min_size=1, max_size=300)), np.uint8)
    assert np.array_equal(unpack_codes(pack_codes(codes, bits), bits, codes.size), codes)


@pytest.mark.parametrize("bits", BITS)
def test_packing_is_dense(bits):
    # n codes of b bits need ceil(n*b/8) bytes; planar packing may add at most a byte per plane.
    for n in (1, 7, 64, 1001, 98304):
        assert math.ceil(n * bits / 8) <= packed_nbytes(n, bits) <= math.ceil(n * bits / 8) + 2


def test_pack_refuses_codes_that_do_not_fit():
    with pytest.raises(ValueError):
        pack_codes(np.array([4], np.uint8), 2)


# ---------------------------------------------------------------------------- blob layout and decoding


@pytest.mark.parametrize("bits", BITS)
@pytest.mark.parametrize("shapes,group", [([(32, 64), (32, 64), (64, 32)], 16), ([(37, 5), (37, 5), (5, 37)], 8), ([(10, 3)], 64)])
def test_decoder_reproduces_the_reference_dequantization_bit_for_bit(bits, shapes, group):
    rng = np.random.default_rng(bits)
    mats = [rng.standard_normal(s).astype(np.float32) for s in shapes]
    layout, blob, q = quantize_blob(mats, bits, group, "hqq")
    assert blob.size == layout.nbytes
    slot = np.zeros(layout.nbytes + 4096, np.uint8)  # a pool slot is larger than the blob
    slot[: layout.nbytes] = blob
    deq = Dequantizer(layout)
    got = deq.decode(deq.bind(slot))
    for g, qq in zip(got, q):
        assert g.dtype == np.float32
        assert np.array_equal(_bits(g), _bits(dequantize_matrix(*qq, group)))
    for (c, s, z), (c2, s2, z2) in zip(q, layout.unpack(blob)):
        assert np.array_equal(c, c2) and np.array_equal(s.view(np.uint16), s2.view(np.uint16))
        assert np.array_equal(z.view(np.uint16), z2.view(np.uint16))


def test_layout_puts_parameters_after_the_codes_on_a_16_byte_boundary():
    lay = BlobLayout(((128, 256), (128, 256), (256, 128)), 3, 64)
    n = 3 * 128 * 256
    assert lay.codes_nbytes == n // 4 + n // 8
    assert lay.params_offset % 16 == 0 and lay.params_offset >= lay.codes_nbytes
    assert lay.nbytes == lay.params_offset + 4 * (2 * 256 + 2 * 256 + 4 * 128)


# ---------------------------------------------------------------------------- quantized model directories


@pytest.fixture(scope="module")
def quantized(synth_models, tmp_path_factory):
    """Factory: quantized copies of the 3-layer synthetic model, cached per setting."""
    src = synth_models(layers=3, experts=8, top_k=2)
    cache = {}

    def make(bits=4, attn=16, method="rtn", group=16):
        key = (bits, attn, method, group)
        if key not in cache:
            out = tmp_path_factory.mktemp("q") / f"e{bits}a{attn}{method}"
            quantize_model(src, out, QuantSpec.checked(bits, attn, group, method), score=False)
            cache[key] = out
        return cache[key]

    return src, make


def test_quantized_directory_has_config_entry_card_and_one_blob_per_expert(quantized):
    src, make = quantized
    d = make(3, 8, "hqq")
    cfg = json.loads((d / "config.json").read_text())
    assert cfg["quant"]["expert_bits"] == 3 and cfg["quant"]["attn_bits"] == 8 and cfg["quant"]["method"] == "hqq"
    assert (d / "tokenizer.json").read_bytes() == (src / "tokenizer.json").read_bytes()
    card = (d / "CARD.md").read_text()
    assert "3-bit" in card and "hqq" in card.lower()
    with _open(d) as store:
        layout = expert_layout(store.config, 3, 16)
        assert store.expert_nbytes == layout.nbytes
        for layer in range(store.config.n_layers):
            for e in range(store.config.n_experts):
                t = store.header.tensors[expert_blob_name(layer, e)]
                assert t.dtype == "U8" and t.shape == (layout.nbytes,)
        assert not any(n.endswith(EXPERT_PARTS) for n in store.header.tensors)
    assert not list(d.parent.glob(".moerun-tmp-*"))


class _open:
    """ModelStore.open as a context manager."""

    def __init__(self, d):
        self.store = ModelStore.open(d)

    def __enter__(self):
        return self.store

    def __exit__(self, *exc):
        self.store.close()


def test_quantized_experts_are_what_quantize_matrix_gives(quantized):
    src, make = quantized
    d = make(4, 4, "rtn")
    with _open(src) as s, _open(d) as q:
        for name in ("layers.1.attn.wq", "layers.2.attn.wo"):
            want = dequantize_matrix(*quantize_matrix(s.read_tensor(name), 4, 16, "rtn"), 16)
            assert np.array_equal(_bits(q.dense[name]), _bits(want))
        mats = [s.read_tensor(f"layers.2.experts.5.{p}") for p in EXPERT_PARTS]
        slot = np.zeros(q.expert_nbytes, np.uint8)
        q.page_in(2, 5, slot)
        got = q.codec.weights(q.codec.bind(slot))
        for m, g in zip(mats, got):
            assert np.array_equal(_bits(g), _bits(dequantize_matrix(*quantize_matrix(m, 4, 16, "rtn"), 16)))


def test_float16_attention_is_stored_as_f16(quantized):
    src, make = quantized
    d = make(8, 16, "rtn")
    with _open(src) as s, _open(d) as q:
        assert q.header.tensors["layers.0.attn.wk"].dtype == "F16"
        w = s.read_tensor("layers.0.attn.wk")
        assert np.array_equal(q.dense["layers.0.attn.wk"], w.astype(np.float16).astype(np.float32))
        assert q.header.tensors["embed"].dtype == s.header.tensors["embed"].dtype


def test_codec_scratch_is_counted_in_the_budget(quantized):
    _, make = quantized
    with moerun.load(make(3, 16, "rtn"), tokenizer=False) as eng:
        c = eng.config
        codec_scratch = eng.store.codec.scratch_bytes()
        n_weights = sum(math.prod(s) for s in c.expert_shapes().values())
        assert codec_scratch >= 4 * n_weights + n_weights  # float32 matrices + unpacked codes
        assert eng.budget.scratch == scratch_bytes(c, codec_scratch)


@pytest.mark.parametrize("bits", [8, 3])
@pytest.mark.parametrize(
    "setting",
    [
        {"evict": "lru"},
        {"evict": "lfu"},
        {"evict": "fifo"},
        {"evict": "lru", "prefetch": 2, "lookahead": 2},
        {"evict": "lru", "split": "shared", "prefetch": 1},
    ],
    ids=["lru", "lfu", "fifo", "prefetch2x2", "shared-prefetch1"],
)
def test_capped_quantized_logits_equal_resident_bit_for_bit(quantized, bits, setting):
    # docs/design/architecture.md, invariants (offloading never changes numbers), for packed experts: decoding is deterministic and the
    # compute schedule depends only on routing.
    _, make = quantized
    d = make(bits, 8 if bits == 3 else 16, "hqq")
    prompt = [0, 5, 9, 200, 31, 7, 7, 64, 101, 3]
    greedy = Sampling(temperature=0.0)

    def run(**kw):
        with moerun.load(d, tokenizer=False, **kw) as eng:
            full = eng.logits(prompt)
            gen = eng.generate(prompt_ids=prompt, max_new=12, sampling=greedy, keep_logits=True)
            return full, gen.new_ids, np.stack(gen.logits), eng

    ref = run()
    with moerun.load(d, tokenizer=False) as eng:
        s = eng.store
        split = setting.get("split", "even")
        cap = minimum_cap(s.config, s.dense_nbytes, s.expert_nbytes, split, s.codec.scratch_bytes())
    got = run(mem_cap=cap, **setting)
    assert got[3].budget.n_slots < s.config.n_layers * s.config.n_experts  # really offloaded
    assert np.array_equal(_bits(ref[0]), _bits(got[0]))
    assert ref[1] == got[1]
    assert np.array_equal(_bits(ref[2]), _bits(got[2]))


def test_packed_experts_let_a_cap_hold_more_of_them(quantized):
    src, make = quantized
    with moerun.load(src, tokenizer=False) as e32:
        s = e32.store
        cap = minimum_cap(s.config, s.dense_nbytes, s.expert_nbytes, "even") + 2 * s.expert_nbytes
        n32 = moerun.load(src, tokenizer=False, mem_cap=cap).budget.n_slots
    with moerun.load(make(4, 16, "rtn"), tokenizer=False, mem_cap=cap) as e4:
        assert e4.budget.n_slots > n32


# ---------------------------------------------------------------------------- bad files and options


def _one_line_exit_2(capsys, argv) -> str:
    try:
        code = main(argv)
    except SystemExit as e:  # argparse usage errors leave through SystemExit
        code = e.code
    err = capsys.readouterr().err
    assert code == 2
    assert len(err.strip().splitlines()) == 1
    return err


def test_blob_of_the_wrong_size_is_one_clear_error(quantized, tmp_path, capsys):
    import shutil

    _, make = quantized
    d = tmp_path / "bad"
    shutil.copytree(make(4, 16, "rtn"), d)

    def shrink(doc):
        t = doc["layers.1.experts.3.packed"]
        t["shape"] = [t["shape"][0] - 16]
        t["data_offsets"][1] -= 16

    edit_header(d / "model.safetensors", shrink)
    err = _one_line_exit_2(capsys, ["score", "--model", str(d), "--max-tokens", "4"])
    assert "layers.1.experts.3.packed" in err


@pytest.mark.parametrize(
    "edit,word",
    [
        (lambda q: q.update(expert_bits=5), "expert bits"),
        (lambda q: q.update(group=0), "group"),
        (lambda q: q.update(attn_bits=12), "attention bits"),
        (lambda q: q.update(format="other/9"), "format"),
    ],
    ids=["bits5", "group0", "attn12", "format"],
)
def test_insane_quant_entry_is_one_clear_error(quantized, tmp_path, capsys, edit, word):
    import shutil

    _, make = quantized
    d = tmp_path / "bad"
    shutil.copytree(make(4, 8, "rtn"), d)
    edit_config(d, lambda doc: edit(doc["quant"]))
    err = _one_line_exit_2(capsys, ["score", "--model", str(d), "--max-tokens", "4"])
    assert word in err and "quant" in err


def test_packed_attention_of_the_wrong_size_is_one_clear_error(quantized, tmp_path, capsys):
    import shutil

    _, make = quantized
    d = tmp_path / "bad"
    shutil.copytree(make(4, 8, "rtn"), d)
    edit_config(d, lambda doc: doc["quant"].update(attn_bits=4))  # blobs hold 8-bit codes
    # the weights file's own record edited alike, so the two agree and only the blobs' size gives the edit away
    # (an edit of config.json alone is refused sooner: test_the_store_refuses_a_config_edited_apart_from_its_file)
    edit_header(d / "model.safetensors", lambda doc: doc["__metadata__"].update(
        quant=json.dumps({**json.loads(doc["__metadata__"]["quant"]), "attn_bits": 4}, separators=(",", ":"))))
    err = _one_line_exit_2(capsys, ["score", "--model", str(d), "--max-tokens", "4"])
    assert "attn" in err and "U8" in err


def test_the_store_refuses_a_config_edited_apart_from_its_file(quantized, tmp_path):
    import shutil

    from moerun.errors import BadModelFile

    # ModelStore.open compares config.json's quant entry with the one recorded in the weights file
    # (moerun.files.packed.recorded_quant_problem): group 16 -> 17 keeps every blob's size here (rows 32 and 64 make
    # 2 and 4 groups either way), so without that check the engine would decode with the wrong layout
    _, make = quantized
    d = tmp_path / "edited"
    shutil.copytree(make(4, 16, "rtn", 16), d)
    ModelStore.open(d).close()  # as written, it opens
    edit_config(d, lambda c: c["quant"].__setitem__("group", 17))
    with pytest.raises(BadModelFile, match=r"group 17 .*group 16"):
        ModelStore.open(d)
    with pytest.raises(BadModelFile, match="group"):
        moerun.load(d, tokenizer=False)


@pytest.mark.parametrize(
    "extra",
    [["--expert-bits", "5"], ["--group", "0"], ["--attn-bits", "2"], ["--method", "gptq"], ["--group", "x"]],
)
def test_quantize_rejects_bad_options_with_exit_2(small_model, tmp_path, capsys, extra):
    _one_line_exit_2(capsys, ["quantize", "--model", str(small_model), str(tmp_path / "out"), *extra])
    assert not (tmp_path / "out").exists()


def test_quantize_refuses_to_overwrite_and_to_requantize(quantized, tmp_path, capsys):
    src, make = quantized
    (tmp_path / "taken").mkdir()
    err = _one_line_exit_2(capsys, ["quantize", "--model", str(src), str(tmp_path / "taken")])
    assert "--force" in err
    err = _one_line_exit_2(capsys, ["quantize", "--model", str(make(4, 16, "rtn")), str(tmp_path / "q2")])
    assert "already quantized" in err


def test_quantize_command_writes_a_loadable_model(small_model, tmp_path, capsys):
    out = tmp_path / "q"
    code = main(["quantize", "--model", str(small_model), str(out), "--expert-bits", "2", "--method", "rtn", "--group", "7", "--json"])
    doc = json.loads(capsys.readouterr().out)
    assert code == 0
    assert doc["expert_bytes"] == expert_layout(moerun.load(out, tokenizer=False).config, 2, 7).nbytes
    assert doc["file_bytes"] == (out / "model.safetensors").stat().st_size
    with moerun.load(out, tokenizer=False) as eng:
        assert eng.logits([0, 1, 2]).dtype == np.float32
    code = main(["quantize", "--model", str(small_model), str(out), "--expert-bits", "8", "--force", "--json"])
    capsys.readouterr()
    assert code == 0 and json.loads((out / "config.json").read_text())["quant"]["expert_bits"] == 8


def test_shared_expert_stays_float_and_capped_quantized_logits_equal_resident(synth_models, tmp_path):
    src = synth_models(seed=3, layers=2, experts=12, top_k=4, d_shared=40, norm_topk=False)
    d = tmp_path / "q"
    quantize_model(src, d, QuantSpec.checked(4, 8, 16, "rtn"), score=False)
    with _open(src) as s, _open(d) as q:
        for layer in range(2):
            for part in EXPERT_PARTS:
                name = f"layers.{layer}.shared.{part}"
                assert q.header.tensors[name].dtype == s.header.tensors[name].dtype == "F32"
                assert np.array_equal(_bits(q.dense[name]), _bits(s.read_tensor(name)))
        assert q.header.tensors["layers.0.attn.wq.packed"].dtype == "U8"  # attention really was packed
        cap = minimum_cap(q.config, q.dense_nbytes, q.expert_nbytes, "shared", q.codec.scratch_bytes())
    assert "shared expert" in (d / "CARD.md").read_text()
    prompt = list(range(1, 12))
    runs = []
    for kw in ({}, {"mem_cap": cap, "split": "shared", "evict": "lfu"}):
        with moerun.load(d, tokenizer=False, **kw) as eng:
            gen = eng.generate(prompt_ids=prompt, max_new=8, sampling=Sampling(temperature=0.8, seed=1), keep_logits=True)
            runs.append((_bits(eng.logits(prompt)), _bits(np.stack(gen.logits)), gen.new_ids))
    assert np.array_equal(runs[0][0], runs[1][0]) and np.array_equal(runs[0][1], runs[1][1]) and runs[0][2] == runs[1][2]


# ---------------------------------------------------------------------------- the bundled model


@pytest.fixture(scope="module")
def pebble_rtn(pebble, tmp_path_factory):
    """rtn copies of the bundled model at every expert bit width (float16 attention)."""
    base = tmp_path_factory.mktemp("pebble_q")
    out = {}
    for bits in BITS:
        out[bits] = base / f"e{bits}"
        quantize_model(pebble, out[bits], QuantSpec.checked(bits, 16, 64, "rtn"), score=False)
    return out


def _heldout_ppl(model_dir, n_tokens=3000) -> float:
    from moerun.checks.score import score_text
    from moerun.model.tokenizer import read_text_file

    text = read_text_file(model_dir / "heldout.txt")
    with moerun.load(model_dir) as eng:
        return score_text(eng, text, n_tokens).perplexity


def test_eight_bit_experts_keep_heldout_perplexity_within_one_percent(bundled, pebble, pebble_rtn, tmp_path):
    if bundled == pebble:
        q = pebble_rtn[8]
    else:
        q = tmp_path / "e8"
        quantize_model(bundled, q, QuantSpec.checked(8, 16, 64, "rtn"), score=False)
    ref = _heldout_ppl(bundled)
    got = _heldout_ppl(q)
    assert abs(got / ref - 1) < 0.01


def test_fewer_bits_raise_heldout_perplexity_monotonically(pebble, pebble_rtn):
    ppl = {b: _heldout_ppl(pebble_rtn[b]) for b in BITS}
    assert ppl[8] < ppl[4] < ppl[3] < ppl[2]


# ---------------------------------------------------------------------------- quantize never destroys what it does not own


def _tree(d) -> dict:
    from pathlib import Path

    d = Path(d)
    return {str(p.relative_to(d)): p.read_bytes() for p in sorted(d.rglob("*")) if p.is_file()}


SPEC8 = QuantSpec.checked(8, 16, 16, "rtn")


@pytest.fixture
def source_in_a_tree(synth_models, tmp_path):
    """tmp/models/src (a float model) next to tmp/models/notes.txt: a parent that holds more than the model."""
    import shutil

    parent = tmp_path / "models"
    parent.mkdir()
    src = parent / "src"
    shutil.copytree(synth_models(layers=2, experts=4, top_k=2), src)
    (parent / "notes.txt").write_text("the user's")
    return src


@pytest.mark.parametrize("where", ["the source itself", "the source's parent", "inside the source"])
def test_quantize_force_refuses_an_out_that_is_contains_or_lies_inside_the_source(source_in_a_tree, capsys, where):
    src = source_in_a_tree
    out = {"the source itself": src, "the source's parent": src.parent, "inside the source": src / "q"}[where]
    before = _tree(src.parent)
    err = _one_line_exit_2(capsys, ["quantize", "--model", str(src), str(out), "--force", "--no-score"])
    assert "source model" in err
    assert _tree(src.parent) == before


def test_quantize_force_refuses_a_directory_holding_files_that_are_not_a_models(source_in_a_tree, tmp_path, capsys):
    busy = tmp_path / "busy"
    busy.mkdir()
    (busy / "config.json").write_text("{}")
    (busy / "thesis.tex").write_text("the user's")
    err = _one_line_exit_2(capsys, ["quantize", "--model", str(source_in_a_tree), str(busy), "--force", "--no-score"])
    assert "thesis.tex" in err
    assert (busy / "thesis.tex").read_text() == "the user's"


def test_quantize_without_force_keeps_a_directory_that_appears_at_out_while_it_runs(source_in_a_tree, tmp_path):
    from moerun.errors import OutputError

    out = tmp_path / "q"

    def someone_else_writes_out(done, total):
        if done == 1:
            out.mkdir()
            (out / "theirs.txt").write_text("theirs")

    with pytest.raises(OutputError, match="appeared"):
        quantize_model(source_in_a_tree, out, SPEC8, score=False, on_progress=someone_else_writes_out)
    assert _tree(out) == {"theirs.txt": b"theirs"}
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".moerun-tmp-")]


def test_two_quantize_runs_to_one_new_out_leave_the_first_to_finish_and_fail_the_other(source_in_a_tree, tmp_path):
    from moerun.errors import OutputError

    out = tmp_path / "q"
    done_inner = {}

    def a_second_run_finishes_first(done, total):
        if done == 1 and not done_inner:
            done_inner["report"] = quantize_model(source_in_a_tree, out, QuantSpec.checked(4, 16, 16, "rtn"), score=False)

    with pytest.raises(OutputError, match="appeared"):
        quantize_model(source_in_a_tree, out, SPEC8, score=False, on_progress=a_second_run_finishes_first)
    assert json.loads((out / "config.json").read_text())["quant"]["expert_bits"] == 4  # the finished one, untouched


def test_quantize_force_never_leaves_out_missing_even_if_killed_after_installing(source_in_a_tree, tmp_path, monkeypatch):
    import moerun.files.fileio as fileio

    out = tmp_path / "q"
    quantize_model(source_in_a_tree, out, QuantSpec.checked(4, 16, 16, "rtn"), score=False)
    real_exchange = fileio.rename_exchange
    seen = []

    def exchange_then_die(src, dst):
        assert real_exchange(src, dst), "this file system cannot exchange two names in one step"
        seen.append(sorted(p.name for p in dst.iterdir()))  # right after the swap: OUT is a whole model
        raise SystemExit(137)  # killed before the old model is removed

    monkeypatch.setattr(fileio, "rename_exchange", exchange_then_die)
    with pytest.raises(SystemExit):
        quantize_model(source_in_a_tree, out, SPEC8, score=False, force=True)
    assert seen and "model.safetensors" in seen[0]
    assert json.loads((out / "config.json").read_text())["quant"]["expert_bits"] == 8
    monkeypatch.setattr(fileio, "rename_exchange", real_exchange)
    with moerun.load(out, tokenizer=False) as eng:
        assert np.isfinite(eng.logits([1, 2, 3])).all()


def test_quantize_reads_the_benchmark_rows_from_the_package_not_from_docs():
    from pathlib import Path

    from moerun.makers import _card as quant_card

    path = Path(str(quant_card.bench_rows_path()))
    assert Path(moerun.__file__).resolve().parent in path.resolve().parents
    assert "docs" not in path.parts and path.is_file()


def test_a_quantized_model_whose_config_disagrees_with_its_file_is_refused_by_inspect(quantized, tmp_path, capsys):
    import shutil

    # group 16 -> 17 keeps every blob's size for these shapes (rows 32 and 64 make 2 and 4 groups either way),
    # so the file still loads: only the recorded quantization tells the edit apart
    _, make = quantized
    d = tmp_path / "edited"
    shutil.copytree(make(4, 16, "rtn", 16), d)
    edit_config(d, lambda c: c["quant"].__setitem__("group", 17))
    for extra in ([], ["--check"]):
        err = _one_line_exit_2(capsys, ["inspect", "--model", str(d), *extra])
        assert "group" in err and "17" in err and "16" in err


def test_inspect_check_catches_a_quantization_record_edited_alike_in_config_and_file(quantized, tmp_path, capsys):
    import shutil

    # issue 23, item 11: group 16 -> 17 in config.json and in the weights file's record alike (the blobs keep their
    # size for these shapes), so the model loads and computes other numbers; the recorded digests cover the record
    _, make = quantized
    d = tmp_path / "edited"
    shutil.copytree(make(4, 16, "rtn", 16), d)
    assert main(["inspect", "--model", str(d), "--check"]) == 0
    capsys.readouterr()
    edit_config(d, lambda c: c["quant"].__setitem__("group", 17))
    edit_header(d / "model.safetensors", lambda doc: doc["__metadata__"].update(
        quant=json.dumps({**json.loads(doc["__metadata__"]["quant"]), "group": 17}, separators=(",", ":"))))
    assert main(["inspect", "--model", str(d)]) == 0  # consistent: it opens
    capsys.readouterr()
    assert main(["inspect", "--model", str(d), "--check"]) == 1
    out = capsys.readouterr().out
    assert "metadata 'quant'" in out
