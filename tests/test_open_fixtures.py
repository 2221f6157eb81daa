"""The open-checkpoint fixtures (tests/fixtures/open, issue 22): what they hold, checked without torch; and, where
torch and transformers import, that they are what the library computes.

Sources of the facts checked:
- the safetensors format (the safetensors project's README, "Format"): an 8-byte little-endian header size N, then N
  bytes of JSON mapping tensor names to {"dtype", "shape", "data_offsets": [begin, end]} (offsets into the byte
  buffer after the header) and an optional "__metadata__" of strings; the byte buffer is entirely indexed, without
  holes; BF16 is the top 16 bits of an IEEE float32;
- the transformers library (5.x, `PreTrainedModel.save_pretrained` and the model types' modeling files): the index
  `model.safetensors.index.json` = {"metadata": {"total_size", ...}, "weight_map": {tensor: file}}; the per-expert
  names `model.layers.{l}.mlp.experts.{e}.{gate,up,down}_proj.weight`, the fused `experts.gate_up_proj [E, 2I, H]`
  (gate rows first) and `experts.down_proj [E, H, I]`; a layer is dense when it is in `mlp_only_layers` or
  `(l + 1) % decoder_sparse_step != 0` (qwen3_moe, qwen2_moe), and every olmoe layer is MoE;
- numpy's .npz format (a zip of .npy files) for reference.npz.
"""

from __future__ import annotations

import hashlib
import importlib.util
import json
import math
import re
from pathlib import Path

import numpy as np
import pytest
from safetensors.numpy import load_file
from tokenizers import Tokenizer

ROOT = Path(__file__).resolve().parent.parent
FIXTURES = ROOT / "tests" / "fixtures" / "open"
SCRIPT = ROOT / "scripts" / "make_open_fixtures.py"
MANIFEST = json.loads((FIXTURES / "manifest.json").read_text())
VARIANTS = MANIFEST["variants"]
MODEL_TYPES = {"qwen3_moe", "qwen2_moe", "olmoe"}

PER_EXPERT_RE = re.compile(r"^model\.layers\.(\d+)\.mlp\.experts\.(\d+)\.(gate|up|down)_proj\.weight$")
FUSED_RE = re.compile(r"^model\.layers\.(\d+)\.mlp\.experts\.(gate_up_proj|down_proj)$")
ITEMSIZE = {"F32": 4, "BF16": 2, "F16": 2}


# ------------------------------------------------------------------------------------------ reading, no torch


def header(path: Path) -> dict:
    with open(path, "rb") as f:
        n = int.from_bytes(f.read(8), "little")
        return json.loads(f.read(n))


def weight_map(d: Path) -> dict[str, str]:
    """tensor name -> file name, from the index or from the single file's header."""
    index = d / "model.safetensors.index.json"
    if index.exists():
        return json.loads(index.read_text())["weight_map"]
    return {k: "model.safetensors" for k in header(d / "model.safetensors") if k != "__metadata__"}


def read_tensor(path: Path, name: str) -> np.ndarray:
    """One tensor as float32 from the raw bytes (BF16 widened exactly: its 16 bits on top of a 32-bit word)."""
    with open(path, "rb") as f:
        n = int.from_bytes(f.read(8), "little")
        meta = json.loads(f.read(n))[name]
        begin, end = meta["data_offsets"]
        f.seek(8 + n + begin)
        raw = f.read(end - begin)
    if meta["dtype"] == "F32":
        arr = np.frombuffer(raw, dtype="<f4")
    elif meta["dtype"] == "BF16":
        arr = (np.frombuffer(raw, dtype="<u2").astype(np.uint32) << 16).view(np.float32)
    else:
        raise AssertionError(f"unexpected dtype {meta['dtype']}")
    return arr.reshape(meta["shape"])


def tensor(d: Path, name: str, wmap=None) -> np.ndarray:
    wmap = wmap or weight_map(d)
    return read_tensor(d / wmap[name], name)


def config(name: str) -> dict:
    return json.loads((FIXTURES / name / "config.json").read_text())


def n_experts(cfg: dict) -> int:
    return cfg.get("num_local_experts", cfg.get("num_experts"))


def moe_layers(cfg: dict) -> list[int]:
    if cfg["model_type"] == "olmoe":
        return list(range(cfg["num_hidden_layers"]))
    step = cfg.get("decoder_sparse_step", 1)
    return [i for i in range(cfg["num_hidden_layers"])
            if i not in cfg.get("mlp_only_layers", []) and (i + 1) % step == 0]


def references(name: str) -> dict[str, np.ndarray]:
    with np.load(FIXTURES / name / "reference.npz", allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


def variants_where(**want) -> list[str]:
    return [n for n, v in VARIANTS.items() if all(v[k] == w for k, w in want.items())]


# ---------------------------------------------------------------------------------------- always (no torch)


def test_manifest_covers_three_model_types_in_every_form_the_issue_names():
    assert {v["model_type"] for v in VARIANTS.values()} == MODEL_TYPES
    for arch in MODEL_TYPES:
        assert variants_where(model_type=arch), arch
    assert variants_where(dtype="float32") and variants_where(dtype="bfloat16")
    assert variants_where(layout="per_expert") and variants_where(layout="fused")
    assert variants_where(sharded=True) and variants_where(sharded=False)
    assert variants_where(config_spelling="5.x") and variants_where(config_spelling="4.x")


def test_the_directory_holds_exactly_the_variants_of_the_manifest():
    dirs = {p.name for p in FIXTURES.iterdir() if p.is_dir()}
    assert dirs == set(VARIANTS)
    assert {p.name for p in FIXTURES.iterdir() if p.is_file()} == {"manifest.json", "README.md"}


@pytest.mark.parametrize("name", sorted(VARIANTS))
def test_every_file_of_a_variant_is_listed_with_its_size_and_digest(name):
    d = FIXTURES / name
    listed = VARIANTS[name]["files"]
    assert {p.name for p in d.iterdir()} == set(listed)
    for fname, rec in listed.items():
        data = (d / fname).read_bytes()
        assert len(data) == rec["bytes"], fname
        assert hashlib.sha256(data).hexdigest() == rec["sha256"], fname


@pytest.mark.parametrize("name", sorted(VARIANTS))
def test_a_variant_has_config_with_its_model_type_weights_and_tokenizer(name):
    d, v = FIXTURES / name, VARIANTS[name]
    cfg = config(name)
    assert cfg["model_type"] == v["model_type"] in MODEL_TYPES
    assert (d / "tokenizer.json").is_file()
    if v["sharded"]:
        assert (d / "model.safetensors.index.json").is_file() and not (d / "model.safetensors").exists()
        assert len(v["weight_files"]) > 1
    else:
        assert (d / "model.safetensors").is_file() and not (d / "model.safetensors.index.json").exists()
        assert v["weight_files"] == ["model.safetensors"]
    assert sorted(set(weight_map(d).values())) == v["weight_files"]


@pytest.mark.parametrize("name", sorted(VARIANTS))
def test_config_keys_are_spelled_as_recorded(name):
    cfg, v = config(name), VARIANTS[name]
    if v["config_spelling"] == "5.x":
        assert "rope_parameters" in cfg and "rope_theta" not in cfg
        assert cfg["rope_parameters"]["rope_type"] == "default"
        assert cfg["dtype"] == v["dtype"] and "torch_dtype" not in cfg
        if cfg["model_type"] == "qwen3_moe":
            assert "num_local_experts" in cfg and "num_experts" not in cfg
    else:
        assert "rope_theta" in cfg and "rope_parameters" not in cfg and cfg["rope_scaling"] is None
        assert cfg["torch_dtype"] == v["dtype"] and "dtype" not in cfg
        assert "num_experts" in cfg and "num_local_experts" not in cfg


def test_both_spellings_of_one_model_type_carry_the_same_values():
    for arch in MODEL_TYPES:
        seen = set()
        for name in variants_where(model_type=arch):
            cfg = config(name)
            theta = cfg["rope_theta"] if "rope_theta" in cfg else cfg["rope_parameters"]["rope_theta"]
            seen.add((theta, n_experts(cfg), cfg["hidden_size"], cfg["num_hidden_layers"], cfg["vocab_size"]))
        assert len(seen) == 1, (arch, seen)


@pytest.mark.parametrize("name", sorted(VARIANTS))
def test_safetensors_headers_index_their_buffer_without_holes_or_overlaps(name):
    d = FIXTURES / name
    for fname in VARIANTS[name]["weight_files"]:
        path = d / fname
        n = int.from_bytes(path.read_bytes()[:8], "little")
        meta = header(path)
        spans = []
        for key, rec in meta.items():
            if key == "__metadata__":
                assert all(isinstance(x, str) for x in rec.values())
                continue
            begin, end = rec["data_offsets"]
            assert end - begin == math.prod(rec["shape"]) * ITEMSIZE[rec["dtype"]], key
            spans.append((begin, end))
        spans.sort()
        assert spans[0][0] == 0
        assert all(a[1] == b[0] for a, b in zip(spans, spans[1:])), "holes or overlaps"
        assert 8 + n + spans[-1][1] == path.stat().st_size


@pytest.mark.parametrize("name", variants_where(sharded=True))
def test_the_shard_index_names_only_files_in_the_directory_and_every_tensor_once(name):
    d = FIXTURES / name
    index = json.loads((d / "model.safetensors.index.json").read_text())
    wmap = index["weight_map"]
    files = set(wmap.values())
    assert all("/" not in f and (d / f).is_file() for f in files)
    assert files == {p.name for p in d.glob("model-*-of-*.safetensors")}
    in_files: dict[str, str] = {}
    total = 0
    for f in files:
        for key, rec in header(d / f).items():
            if key != "__metadata__":
                assert key not in in_files, f"{key} in {in_files.get(key)} and {f}"
                in_files[key] = f
                total += rec["data_offsets"][1] - rec["data_offsets"][0]
    assert in_files == wmap
    assert index["metadata"]["total_size"] == total


@pytest.mark.parametrize("name", variants_where(sharded=True))
def test_some_expert_straddles_shard_files(name):
    d, v = FIXTURES / name, VARIANTS[name]
    cfg = config(name)
    files: dict[tuple[int, int], set[str]] = {}
    for tname, f in weight_map(d).items():
        if m := PER_EXPERT_RE.match(tname):
            files.setdefault((int(m[1]), int(m[2])), set()).add(f)
        elif m := FUSED_RE.match(tname):  # expert e is a slice of both fused tensors
            for e in range(n_experts(cfg)):
                files.setdefault((int(m[1]), e), set()).add(f)
    straddling = sorted([list(k) for k, fs in files.items() if len(fs) > 1])
    assert straddling, "no expert's tensors lie in more than one file"
    assert straddling == v["straddling_experts"]


@pytest.mark.parametrize("name", sorted(VARIANTS))
def test_the_expert_and_dense_tensors_have_the_layout_and_shapes_the_config_implies(name):
    d, v, cfg = FIXTURES / name, VARIANTS[name], config(name)
    meta = {}
    for f in v["weight_files"]:
        meta.update({k: r for k, r in header(d / f).items() if k != "__metadata__"})
    H, E = cfg["hidden_size"], n_experts(cfg)
    width = cfg["intermediate_size"] if cfg["model_type"] == "olmoe" else cfg["moe_intermediate_size"]
    moe = moe_layers(cfg)
    assert moe and (cfg["model_type"] == "olmoe" or len(moe) < cfg["num_hidden_layers"])  # a dense layer too
    for layer in range(cfg["num_hidden_layers"]):
        p = f"model.layers.{layer}.mlp."
        if layer in moe:
            assert meta[p + "gate.weight"]["shape"] == [E, H]
            if v["layout"] == "fused":
                assert meta[p + "experts.gate_up_proj"]["shape"] == [E, 2 * width, H]
                assert meta[p + "experts.down_proj"]["shape"] == [E, H, width]
                assert not any(PER_EXPERT_RE.match(k) for k in meta)
            else:
                for e in range(E):
                    assert meta[f"{p}experts.{e}.gate_proj.weight"]["shape"] == [width, H]
                    assert meta[f"{p}experts.{e}.up_proj.weight"]["shape"] == [width, H]
                    assert meta[f"{p}experts.{e}.down_proj.weight"]["shape"] == [H, width]
                assert not any(FUSED_RE.match(k) for k in meta)
            if cfg["model_type"] == "qwen2_moe":
                S = cfg["shared_expert_intermediate_size"]
                assert meta[p + "shared_expert.gate_proj.weight"]["shape"] == [S, H]
                assert meta[p + "shared_expert_gate.weight"]["shape"] == [1, H]
        else:
            assert meta[p + "gate_proj.weight"]["shape"] == [cfg["intermediate_size"], H]
            assert p + "gate.weight" not in meta
    assert "lm_head.weight" in meta and not cfg["tie_word_embeddings"]
    dtypes = {r["dtype"] for r in meta.values()}
    assert dtypes == {"F32" if v["dtype"] == "float32" else "BF16"} and sorted(dtypes) == v["safetensors_dtypes"]


@pytest.mark.parametrize("name", sorted(VARIANTS))
def test_every_tensor_reads_and_is_finite(name):
    d, v = FIXTURES / name, VARIANTS[name]
    wmap = weight_map(d)
    for f in v["weight_files"]:
        raw = {k: read_tensor(d / f, k) for k, rec in header(d / f).items() if k != "__metadata__"}
        assert set(raw) == {k for k, g in wmap.items() if g == f}
        assert all(np.isfinite(a).all() for a in raw.values())
        if v["dtype"] == "float32":  # the safetensors library agrees with the raw reading
            lib = load_file(str(d / f))
            assert set(lib) == set(raw)
            for k in lib:
                assert lib[k].dtype == np.float32 and np.array_equal(lib[k], raw[k]), k


@pytest.mark.parametrize("arch", sorted(MODEL_TYPES))
def test_the_fused_layout_holds_the_same_expert_bytes_with_the_gate_rows_first(arch):
    fused = variants_where(model_type=arch, dtype="bfloat16", layout="fused")[0]
    per = variants_where(model_type=arch, dtype="bfloat16", layout="per_expert")[0]
    df, dp, cfg = FIXTURES / fused, FIXTURES / per, config(per)
    wf, wp = weight_map(df), weight_map(dp)
    for layer in moe_layers(cfg):
        gate_up = tensor(df, f"model.layers.{layer}.mlp.experts.gate_up_proj", wf)
        down = tensor(df, f"model.layers.{layer}.mlp.experts.down_proj", wf)
        width = gate_up.shape[1] // 2
        for e in range(n_experts(cfg)):
            p = f"model.layers.{layer}.mlp.experts.{e}."
            assert np.array_equal(gate_up[e, :width], tensor(dp, p + "gate_proj.weight", wp))
            assert np.array_equal(gate_up[e, width:], tensor(dp, p + "up_proj.weight", wp))
            assert np.array_equal(down[e], tensor(dp, p + "down_proj.weight", wp))
    # and every other tensor is the same too
    others = [k for k in wp if not PER_EXPERT_RE.match(k)]
    assert set(others) == {k for k in wf if not FUSED_RE.match(k)}
    for k in others:
        assert np.array_equal(tensor(df, k, wf), tensor(dp, k, wp)), k


@pytest.mark.parametrize("arch", sorted(MODEL_TYPES))
def test_the_bf16_weights_are_the_f32_weights_rounded(arch):
    f32 = FIXTURES / variants_where(model_type=arch, dtype="float32")[0]
    bf = FIXTURES / variants_where(model_type=arch, dtype="bfloat16", layout="per_expert")[0]
    wf, wb = weight_map(f32), weight_map(bf)
    assert set(wf) == set(wb)
    for k in wf:
        a, b = tensor(f32, k, wf), tensor(bf, k, wb)
        # round to nearest even on the top 16 bits
        u = a.view(np.uint32).astype(np.uint64)
        rounded = (((u + 0x7FFF + ((u >> 16) & 1)) >> 16) << 16).astype(np.uint32).view(np.float32)
        assert np.array_equal(rounded, b), k


@pytest.mark.parametrize("name", sorted(VARIANTS))
def test_reference_arrays_have_the_recorded_shapes_and_are_finite(name):
    v, cfg = VARIANTS[name], config(name)
    refs = references(name)
    assert {k: {"shape": list(a.shape), "dtype": str(a.dtype)} for k, a in refs.items()} == v["reference_arrays"]
    n_seq = len(v["sequences"])
    assert 2 <= n_seq <= 3
    for i in range(n_seq):
        tokens, logits, greedy = refs[f"tokens_{i}"], refs[f"logits_{i}"], refs[f"greedy_{i}"]
        assert tokens.tolist() == v["sequences"][i] and greedy.tolist() == v["greedy"][i]
        assert logits.dtype == np.float32 and logits.shape == (len(tokens), cfg["vocab_size"])
        assert np.isfinite(logits).all()
        assert len(greedy) == 8 and 0 <= greedy.min() and greedy.max() < cfg["vocab_size"]
        # the first greedy token is the argmax of the last position of the same forward
        assert greedy[0] == int(np.argmax(logits[-1]))


@pytest.mark.parametrize("arch", sorted(MODEL_TYPES))
def test_variants_with_the_same_weights_have_the_same_references(arch):
    names = variants_where(model_type=arch, dtype="bfloat16")
    assert len(names) >= 2
    first = references(names[0])
    for other in names[1:]:
        refs = references(other)
        assert refs.keys() == first.keys()
        for k in first:
            np.testing.assert_allclose(refs[k], first[k], rtol=0, atol=1e-6, err_msg=f"{names[0]} / {other} {k}")


def test_router_and_greedy_margins_clear_the_stated_thresholds():
    need = MANIFEST["margins"]
    assert need["router_min_required"] > 0 and need["greedy_min_required"] > 0
    for name, v in VARIANTS.items():
        assert v["min_router_margin"] >= need["router_min_required"], name
        assert v["min_greedy_margin"] >= need["greedy_min_required"], name


@pytest.mark.parametrize("name", sorted(VARIANTS))
def test_the_tokenizer_matches_the_vocabulary_and_encodes_the_recorded_sequences(name):
    d, v, cfg = FIXTURES / name, VARIANTS[name], config(name)
    tok = Tokenizer.from_file(str(d / "tokenizer.json"))
    assert tok.get_vocab_size() == cfg["vocab_size"]
    gen = json.loads((d / "generation_config.json").read_text())
    bos_tok, bos_id = MANIFEST["tokenizer"]["bos"]
    eos_tok, eos_id = MANIFEST["tokenizer"]["eos"]
    assert (gen["bos_token_id"], gen["eos_token_id"]) == (bos_id, eos_id) == (cfg["bos_token_id"], cfg["eos_token_id"])
    assert tok.token_to_id(bos_tok) == bos_id and tok.token_to_id(eos_tok) == eos_id
    for prompt, ids in zip(MANIFEST["prompts"], v["sequences"], strict=True):
        assert [bos_id] + tok.encode(prompt).ids == ids
        assert tok.decode(ids[1:]) == prompt


# ----------------------------------------------------------------- live: the library computes these (torch)


def _live_modules():
    torch = pytest.importorskip("torch")
    pytest.importorskip("transformers")
    spec = importlib.util.spec_from_file_location("make_open_fixtures", SCRIPT)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return torch, mod


def _assert_reproduces(name: str, refs: dict[str, np.ndarray]) -> None:
    want = references(name)
    assert refs.keys() == want.keys()
    for k in want:
        if k.startswith("logits"):
            np.testing.assert_allclose(refs[k], want[k], rtol=0, atol=1e-5, err_msg=f"{name} {k}")
        else:
            assert refs[k].tolist() == want[k].tolist(), f"{name} {k}"


@pytest.mark.parametrize("name", sorted(VARIANTS))
def test_live_the_library_loads_each_committed_variant_and_computes_its_references(name):
    torch, mod = _live_modules()
    seqs = VARIANTS[name]["sequences"]
    arrays, info = mod.reference(FIXTURES / name, seqs)
    _assert_reproduces(name, arrays)
    assert info["min_router_margin"] >= MANIFEST["margins"]["router_min_required"]


@pytest.mark.parametrize("arch, suffix", [("qwen3_moe", "bf16-fused-sharded"), ("qwen2_moe", "bf16-sharded-v4")])
def test_live_rebuilding_a_variant_reproduces_its_committed_reference(tmp_path, arch, suffix):
    torch, mod = _live_modules()
    spec = next(s for s in mod.VARIANTS[arch] if s[0] == suffix)
    tok = mod.train_tokenizer()
    seqs = mod.prompt_ids(tok)
    name = f"{arch}-{suffix}"
    assert seqs == VARIANTS[name]["sequences"]
    entries = mod.build_arch(arch, tok, seqs, tmp_path, specs=[spec])
    assert entries[name]["seed"] == VARIANTS[name]["seed"]
    _assert_reproduces(name, references_from(tmp_path / name))
    assert entries[name]["straddling_experts"] == VARIANTS[name]["straddling_experts"]
    same_versions = (mod.transformers.__version__, torch.__version__) == (
        MANIFEST["versions"]["transformers"], MANIFEST["versions"]["torch"])
    if same_versions:  # the script is deterministic: the same versions write the same bytes
        for fname, rec in VARIANTS[name]["files"].items():
            assert hashlib.sha256((tmp_path / name / fname).read_bytes()).hexdigest() == rec["sha256"], fname


def references_from(d: Path) -> dict[str, np.ndarray]:
    with np.load(d / "reference.npz", allow_pickle=False) as z:
        return {k: z[k] for k in z.files}
