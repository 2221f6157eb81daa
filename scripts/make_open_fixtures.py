"""Build tiny random open MoE checkpoints and their reference outputs with the `transformers` library (issue 22).

    OMP_WAIT_POLICY=PASSIVE python3 scripts/make_open_fixtures.py --out tests/fixtures/open

Needs the `reference` extra (torch 2.13.0, transformers 5.x); nothing else in moerun imports this script's
dependencies, and the committed fixtures are read by the tests without torch.

For each of the three model types qwen3_moe, qwen2_moe and olmoe it:
  1. trains one tiny byte-level BPE tokenizer (the `tokenizers` library) on a few invented lines about
     fog-harvesting stations, with exactly the models' vocabulary size;
  2. builds a random model with `AutoModelForCausalLM.from_config`, then re-initialises every tensor from a seeded
     generator: routers with a large spread, so that the k-th and (k+1)-th router logits are clearly apart, norm
     weights and biases away from their trivial values, so that a forward which skips one of them is caught;
  3. writes it with `save_pretrained` in several variants (F32 / BF16, per-expert / fused expert tensors, one
     file / small shards, the 5.x config keys as written / the same config rewritten in 4.x keys);
  4. loads every variant back with `from_pretrained(dir, dtype=torch.float32, attn_implementation="eager",
     experts_implementation="eager")` and records the float32 logits of fixed token sequences and the greedy
     continuation (`reference.npz`);
  5. checks, and refuses to write anything otherwise: the router margins at every MoE layer and token of the
     sequences and continuations, the margin of every greedy choice, the expert layout actually written, that an
     expert straddles shard files in the sharded variants, and that variants holding the same weights give the
     same logits;
  6. writes `manifest.json`: versions, the command, and for each variant its files, dtype, layout, sharding,
     config spelling, sequences, greedy tokens and minimum margins.

Deterministic: the same library versions write the same bytes (`--check DIR` rebuilds into a temporary directory
and compares every file). The weights are random; text generated from them means nothing and is not advice.
"""

from __future__ import annotations

import argparse
import copy
import filecmp
import hashlib
import io
import json
import os
import platform
import re
import shutil
import sys
import tempfile
import zipfile
from pathlib import Path

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")  # 2 shared cores: no spinning threads

import numpy as np  # noqa: E402
import torch  # noqa: E402

torch.set_num_threads(1)

import safetensors  # noqa: E402
import tokenizers  # noqa: E402
import transformers  # noqa: E402
from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers  # noqa: E402
from transformers import AutoModelForCausalLM, GenerationConfig, OlmoeConfig, Qwen2MoeConfig, Qwen3MoeConfig  # noqa: E402

# ----------------------------------------------------------------------------------------------------- settings

VOCAB_SIZE = 288
BOS, EOS = "<|bos|>", "<|eos|>"  # ids 0 and 1 (the trainer puts special tokens first)
BOS_ID, EOS_ID = 0, 1
GREEDY_STEPS = 8

# Re-initialisation (standard deviations); the library's own init is std 0.02 everywhere and 1 for norms.
WEIGHT_STD = 0.08  # every matrix but the routers and lm_head (also written as initializer_range)
ROUTER_STD = 1.0  # router logits of a normalised input: std about ROUTER_STD * sqrt(hidden) = 8
LM_HEAD_STD = 0.3  # next-token logits with std about 2.4, so that greedy choices are clear too
NORM_SPREAD = 0.15  # norm weights 1 + NORM_SPREAD * N(0, 1)
BIAS_STD = 0.05

# Thresholds the script enforces before it writes anything (logit units). A float32 forward written
# independently differs from the library's by about 1e-5 in a router logit and at most 1e-3 in an output logit
# (OPEN-CHECKPOINTS.md), so neither an expert choice nor a greedy token can flip within these margins.
ROUTER_MARGIN_MIN = 0.02  # k-th minus (k+1)-th router logit, every MoE layer, every token
GREEDY_MARGIN_MIN = 0.01  # best minus second-best next-token logit, every greedy step
SAME_WEIGHTS_TOL = 1e-6  # variants with the same weights (layout, sharding or config spelling differ)
MAX_SEED_TRIES = 200  # seeds tried in order from the model type's base seed; the first that clears both is kept

# Invented text (fog-harvesting stations), for the tokenizer and the fixed sequences.
CORPUS = [
    "The fog station on the north ridge collects water from the morning cloud.",
    "Each mesh panel catches droplets; the gutter carries them to the cistern.",
    "Station keepers log the yield in litres per square metre of mesh each day.",
    "When the wind turns east the fog thins and the panels stay dry until dusk.",
    "A torn mesh is patched before noon, and the valves are checked twice a week.",
    "The cistern at the lower station holds four days of water for the village.",
    "Keepers note the dew point, the wind speed and the hours of fog on a slate.",
    "Fine mesh catches more droplets but clogs with dust in the dry season.",
    "The ridge stations share one pump; the valley station fills by gravity alone.",
    "Morning fog rolls in from the coast, and the mesh drips long after sunrise.",
]
PROMPTS = [
    "Fog",
    "The mesh drips",
    "The keepers check the mesh",
]

# The three model types (no others). Shapes are tiny; head_dim differs from hidden/heads for qwen3_moe.
ARCHS: dict[str, dict] = {
    "qwen3_moe": dict(
        cls=Qwen3MoeConfig,
        seed=1101,
        kwargs=dict(
            vocab_size=VOCAB_SIZE, hidden_size=64, intermediate_size=64, num_hidden_layers=3,
            num_attention_heads=4, num_key_value_heads=2, head_dim=24, moe_intermediate_size=32,
            num_experts_per_tok=2, num_experts=8, norm_topk_prob=True, mlp_only_layers=[1], decoder_sparse_step=1,
            max_position_embeddings=128, rope_parameters={"rope_theta": 1000000.0, "rope_type": "default"},
            rms_norm_eps=1e-6, tie_word_embeddings=False,
        ),
    ),
    "qwen2_moe": dict(
        cls=Qwen2MoeConfig,
        seed=2202,
        kwargs=dict(
            vocab_size=VOCAB_SIZE, hidden_size=64, intermediate_size=40, num_hidden_layers=4,
            num_attention_heads=4, num_key_value_heads=2, moe_intermediate_size=32,
            shared_expert_intermediate_size=48, num_experts_per_tok=2, num_experts=4, norm_topk_prob=False,
            decoder_sparse_step=2, mlp_only_layers=[], max_position_embeddings=128,
            rope_parameters={"rope_theta": 1000000.0, "rope_type": "default"}, rms_norm_eps=1e-6,
            tie_word_embeddings=False,
        ),
    ),
    "olmoe": dict(
        cls=OlmoeConfig,
        seed=3303,
        kwargs=dict(
            vocab_size=VOCAB_SIZE, hidden_size=64, intermediate_size=32, num_hidden_layers=2,
            num_attention_heads=4, num_key_value_heads=2, num_experts_per_tok=2, num_experts=4,
            norm_topk_prob=False, max_position_embeddings=128,
            rope_parameters={"rope_theta": 500000.0, "rope_type": "default"}, rms_norm_eps=1e-5,
            tie_word_embeddings=False, clip_qkv=None,
        ),
    ),
}

# Variants: (name suffix, dtype, layout, max_shard_size or None for one file, config spelling). Same-dtype variants of one model type hold
# the same weights.
VARIANTS = {
    "qwen3_moe": [
        ("f32", "float32", "per_expert", None, "5.x"),
        ("bf16-fused-sharded", "bfloat16", "fused", "40KB", "5.x"),
        ("bf16-sharded-v4", "bfloat16", "per_expert", "30KB", "4.x"),
    ],
    "qwen2_moe": [
        ("f32", "float32", "per_expert", None, "5.x"),
        ("bf16-fused", "bfloat16", "fused", None, "5.x"),
        ("bf16-sharded-v4", "bfloat16", "per_expert", "30KB", "4.x"),
    ],
    "olmoe": [
        ("f32", "float32", "per_expert", None, "5.x"),
        ("bf16-fused", "bfloat16", "fused", None, "5.x"),
        ("bf16-sharded-v4", "bfloat16", "per_expert", "30KB", "4.x"),
    ],
}

PER_EXPERT_RE = re.compile(r"^model\.layers\.(\d+)\.mlp\.experts\.(\d+)\.(gate|up|down)_proj\.weight$")
FUSED_RE = re.compile(r"^model\.layers\.(\d+)\.mlp\.experts\.(gate_up_proj|down_proj)$")

COMMAND = "OMP_WAIT_POLICY=PASSIVE python3 scripts/make_open_fixtures.py --out tests/fixtures/open"


class FixtureError(RuntimeError):
    """A check failed: nothing is written."""


# ---------------------------------------------------------------------------------------------------- tokenizer


def train_tokenizer(vocab_size: int = VOCAB_SIZE) -> Tokenizer:
    """A byte-level BPE (no prefix space) with BOS = 0 and EOS = 1, exactly `vocab_size` entries."""
    tok = Tokenizer(models.BPE())
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tok.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(vocab_size=vocab_size, special_tokens=[BOS, EOS], min_frequency=1,
                                  initial_alphabet=pre_tokenizers.ByteLevel.alphabet(), show_progress=False)
    tok.train_from_iterator(CORPUS, trainer=trainer)
    if tok.get_vocab_size() != vocab_size:
        raise FixtureError(f"tokenizer: {tok.get_vocab_size()} entries, wanted {vocab_size} (corpus too small)")
    if tok.token_to_id(BOS) != BOS_ID or tok.token_to_id(EOS) != EOS_ID:
        raise FixtureError("tokenizer: BOS/EOS are not ids 0/1")
    return tok


def prompt_ids(tok: Tokenizer) -> list[list[int]]:
    """The fixed sequences: BOS, then each prompt's tokens (round trip checked)."""
    out = []
    for text in PROMPTS:
        ids = tok.encode(text).ids
        if tok.decode(ids) != text:
            raise FixtureError(f"tokenizer does not round-trip {text!r}")
        out.append([BOS_ID] + ids)
    return out


def write_tokenizer_files(tok: Tokenizer, out: Path) -> None:
    tok.save(str(out / "tokenizer.json"))
    cfg = {"bos_token": BOS, "eos_token": EOS, "model_max_length": 128, "tokenizer_class": "PreTrainedTokenizerFast"}
    (out / "tokenizer_config.json").write_text(json.dumps(cfg, indent=2, sort_keys=True) + "\n")


# --------------------------------------------------------------------------------------------------------- model


def make_config(arch: str):
    spec = ARCHS[arch]
    return spec["cls"](**spec["kwargs"], initializer_range=WEIGHT_STD, bos_token_id=BOS_ID, eos_token_id=EOS_ID,
                       pad_token_id=None)


def build_model(arch: str, seed: int):
    """A float32 random model of `arch`, re-initialised from `seed` (routers with clear margins)."""
    torch.manual_seed(seed)
    model = AutoModelForCausalLM.from_config(make_config(arch), dtype=torch.float32)
    gen = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for name, p in model.named_parameters():
            if name.endswith("mlp.gate.weight"):  # the router [E, H]
                p.copy_(torch.randn(p.shape, generator=gen) * ROUTER_STD)
            elif name == "lm_head.weight":
                p.copy_(torch.randn(p.shape, generator=gen) * LM_HEAD_STD)
            elif p.ndim == 1 and "norm" in name:
                p.copy_(1.0 + NORM_SPREAD * torch.randn(p.shape, generator=gen))
            elif name.endswith(".bias"):
                p.copy_(BIAS_STD * torch.randn(p.shape, generator=gen))
            else:
                p.copy_(WEIGHT_STD * torch.randn(p.shape, generator=gen))
    model.eval()
    return model


def load_reference_model(path: Path):
    """How a float32 reference is computed (OPEN-CHECKPOINTS.md): eager attention and eager experts."""
    model = AutoModelForCausalLM.from_pretrained(str(path), dtype=torch.float32, attn_implementation="eager",
                                                 experts_implementation="eager")
    model.eval()
    return model


def routers(model) -> list[tuple[int, torch.nn.Module]]:
    out = []
    for i, layer in enumerate(model.model.layers):
        gate = getattr(layer.mlp, "gate", None)
        if gate is not None and hasattr(gate, "top_k"):
            out.append((i, gate))
    return out


def forward_with_margins(model, ids: list[int]) -> tuple[np.ndarray, float]:
    """Float32 logits [T, V] of one sequence, and the smallest router margin over its MoE layers and tokens.

    The margin is the k-th minus the (k+1)-th router logit of a token (float64 from the router's float32 input):
    the experts chosen cannot change unless a router logit moves by half of it.
    """
    seen: list[float] = []

    def hook(module, args):
        u = args[0].detach().reshape(-1, module.weight.shape[1]).double()
        z = u @ module.weight.detach().double().T
        top = torch.topk(z, module.top_k + 1, dim=-1).values
        seen.append(float((top[:, module.top_k - 1] - top[:, module.top_k]).min()))

    handles = [gate.register_forward_pre_hook(hook) for _, gate in routers(model)]
    try:
        with torch.no_grad():
            logits = model(torch.tensor([ids])).logits[0].float().numpy()
    finally:
        for h in handles:
            h.remove()
    return logits, min(seen)


def greedy(model, ids: list[int], steps: int = GREEDY_STEPS) -> tuple[list[int], float, float]:
    """`steps` greedy tokens (argmax of the last position of a full forward; not stopped at EOS).

    Returns the tokens, the smallest best-minus-second logit margin, and the smallest router margin over the whole
    sequence the continuation is computed from.
    """
    seq = list(ids)
    greedy_margin = float("inf")
    router_margin = float("inf")
    for _ in range(steps):
        logits, rm = forward_with_margins(model, seq)
        router_margin = min(router_margin, rm)
        last = np.sort(logits[-1].astype(np.float64))
        greedy_margin = min(greedy_margin, float(last[-1] - last[-2]))
        seq.append(int(np.argmax(logits[-1])))
    _, rm = forward_with_margins(model, seq)  # the last token's routing too
    return seq[len(ids):], greedy_margin, min(router_margin, rm)


def check_margins(model, seqs: list[list[int]]) -> dict:
    """Margins of a model in memory; raises FixtureError below the thresholds."""
    rmin, gmin = float("inf"), float("inf")
    for ids in seqs:
        _, gm, rm = greedy(model, ids)
        rmin, gmin = min(rmin, rm), min(gmin, gm)
    return {"router": rmin, "greedy": gmin, "ok": rmin >= ROUTER_MARGIN_MIN and gmin >= GREEDY_MARGIN_MIN}


def as_bf16_model(model):
    """A float32 copy whose weights are the BF16 rounding of `model`'s (what a BF16 file loads as)."""
    m = copy.deepcopy(model)
    with torch.no_grad():
        for p in m.parameters():
            p.copy_(p.to(torch.bfloat16).float())
    return m


def choose_model(arch: str, seqs: list[list[int]]):
    """The first seed from ARCHS[arch]['seed'] on whose F32 and BF16 weights all margins clear the thresholds."""
    base = ARCHS[arch]["seed"]
    for attempt in range(MAX_SEED_TRIES):
        seed = base + attempt
        model = build_model(arch, seed)
        if check_margins(model, seqs)["ok"] and check_margins(as_bf16_model(model), seqs)["ok"]:
            return model, seed, attempt + 1
    raise FixtureError(f"{arch}: no seed in {MAX_SEED_TRIES} tries gives router margins >= {ROUTER_MARGIN_MIN} "
                       f"and greedy margins >= {GREEDY_MARGIN_MIN}; refusing to write fixtures")


# ---------------------------------------------------------------------------------------------------- variants


def rewrite_config_4x(path: Path) -> list[str]:
    """Rewrite a 5.x config.json in the 4.x library's spellings (OPEN-CHECKPOINTS.md, 'Config keys')."""
    cfg = json.loads(path.read_text())
    changes = []
    rope = cfg.pop("rope_parameters")
    if rope.get("rope_type", "default") != "default":
        raise FixtureError("only the default rope type is written")
    cfg["rope_theta"] = rope["rope_theta"]
    cfg["rope_scaling"] = None
    changes.append("rope_parameters.rope_theta -> rope_theta (and rope_scaling: null)")
    cfg["torch_dtype"] = cfg.pop("dtype")
    changes.append("dtype -> torch_dtype")
    if cfg["model_type"] == "qwen3_moe":
        cfg["num_experts"] = cfg.pop("num_local_experts")
        changes.append("num_local_experts -> num_experts")
    if cfg["model_type"] == "qwen2_moe":
        for key in ("qkv_bias", "layer_types"):  # 5.x fields; 4.x always had q/k/v biases
            if key in cfg:
                cfg.pop(key)
                changes.append(f"{key} dropped (4.x had none)")
    path.write_text(json.dumps(dict(sorted(cfg.items())), indent=2) + "\n")
    return changes


def safetensors_header(path: Path) -> dict:
    """The JSON header of a safetensors file (8-byte little-endian length, then JSON; the safetensors format)."""
    with open(path, "rb") as f:
        n = int.from_bytes(f.read(8), "little")
        return json.loads(f.read(n))


def weight_files(d: Path) -> tuple[dict[str, str], bool]:
    """tensor name -> file name, and whether the directory is sharded."""
    index = d / "model.safetensors.index.json"
    if index.exists():
        return dict(json.loads(index.read_text())["weight_map"]), True
    header = safetensors_header(d / "model.safetensors")
    return {k: "model.safetensors" for k in header if k != "__metadata__"}, False


def observed_layout(names: list[str]) -> str:
    per = any(PER_EXPERT_RE.match(n) for n in names)
    fused = any(FUSED_RE.match(n) for n in names)
    if per and not fused:
        return "per_expert"
    if fused and not per:
        return "fused"
    raise FixtureError(f"expert layout is neither per-expert nor fused (per={per}, fused={fused})")


def straddling_experts(wmap: dict[str, str], layout: str, n_experts: int) -> list[list[int]]:
    """[layer, expert] pairs whose bytes lie in more than one shard file."""
    files: dict[tuple[int, int], set[str]] = {}
    for name, fname in wmap.items():
        m = PER_EXPERT_RE.match(name)
        if m and layout == "per_expert":
            files.setdefault((int(m[1]), int(m[2])), set()).add(fname)
        m = FUSED_RE.match(name)
        if m and layout == "fused":  # expert e is a slice of both fused tensors
            for e in range(n_experts):
                files.setdefault((int(m[1]), e), set()).add(fname)
    return [list(k) for k, v in sorted(files.items()) if len(v) > 1]


def write_variant(model, tok: Tokenizer, arch: str, spec: tuple, out: Path) -> dict:
    suffix, dtype, layout, shard_size, spelling = spec
    sharded = shard_size is not None
    m = model if dtype == "float32" else copy.deepcopy(model).to(torch.bfloat16)
    kwargs = {"save_original_format": layout == "per_expert"}
    if sharded:
        kwargs["max_shard_size"] = shard_size
    m.save_pretrained(str(out), **kwargs)
    GenerationConfig(bos_token_id=BOS_ID, eos_token_id=EOS_ID).save_pretrained(str(out))
    write_tokenizer_files(tok, out)
    changes = rewrite_config_4x(out / "config.json") if spelling == "4.x" else []

    wmap, is_sharded = weight_files(out)
    if is_sharded != sharded:
        raise FixtureError(f"{out.name}: sharded={is_sharded}, wanted {sharded}")
    got = observed_layout(sorted(wmap))
    if got != layout:
        raise FixtureError(f"{out.name}: save_pretrained wrote the {got} layout, wanted {layout}")
    n_experts = model.config.num_experts
    straddle = straddling_experts(wmap, layout, n_experts) if sharded else []
    if sharded and not straddle:
        raise FixtureError(f"{out.name}: no expert straddles shard files; lower its max_shard_size")
    st_dtypes = sorted({v["dtype"] for f in set(wmap.values()) for k, v in safetensors_header(out / f).items()
                        if k != "__metadata__"})
    expert_tensors = {}
    for name in sorted(wmap):
        mm = PER_EXPERT_RE.match(name) or FUSED_RE.match(name)
        if mm and mm[1] == str(first_moe_layer(model)):
            if PER_EXPERT_RE.match(name) and mm[2] != "0":
                continue
            expert_tensors[name] = safetensors_header(out / wmap[name])[name]["shape"]
    return {
        "model_type": arch,
        "dtype": dtype,
        "safetensors_dtypes": st_dtypes,
        "layout": layout,
        "save_pretrained": kwargs,
        "sharded": sharded,
        "weight_files": sorted(set(wmap.values())),
        "config_spelling": spelling,
        "config_rewrites": changes,
        "expert_tensors_example": expert_tensors,
        "straddling_experts": straddle,
    }


def first_moe_layer(model) -> int:
    return routers(model)[0][0]


def reference(path: Path, seqs: list[list[int]]) -> tuple[dict[str, np.ndarray], dict]:
    """Float32 eager logits and greedy continuations of a written variant, and its margins (checked)."""
    model = load_reference_model(path)
    arrays: dict[str, np.ndarray] = {}
    info = {"sequences": [], "greedy": [], "min_router_margin": float("inf"), "min_greedy_margin": float("inf")}
    for i, ids in enumerate(seqs):
        logits, _ = forward_with_margins(model, ids)
        cont, gm, rm = greedy(model, ids)
        # the library's own generate() (KV cache) agrees up to its first EOS
        with torch.no_grad():
            gen = model.generate(torch.tensor([ids]), do_sample=False, max_new_tokens=GREEDY_STEPS,
                                 attention_mask=torch.ones(1, len(ids), dtype=torch.long))[0, len(ids):].tolist()
        if gen != cont[: len(gen)] or (len(gen) < GREEDY_STEPS and gen[-1] != EOS_ID):
            raise FixtureError(f"{path.name}: generate() gives {gen}, the full-forward loop {cont}")
        arrays[f"tokens_{i}"] = np.asarray(ids, dtype=np.int64)
        arrays[f"logits_{i}"] = logits.astype(np.float32)
        arrays[f"greedy_{i}"] = np.asarray(cont, dtype=np.int64)
        info["sequences"].append(ids)
        info["greedy"].append(cont)
        info["min_router_margin"] = min(info["min_router_margin"], rm)
        info["min_greedy_margin"] = min(info["min_greedy_margin"], gm)
    if info["min_router_margin"] < ROUTER_MARGIN_MIN or info["min_greedy_margin"] < GREEDY_MARGIN_MIN:
        raise FixtureError(f"{path.name}: margins {info['min_router_margin']:.4g} / {info['min_greedy_margin']:.4g} "
                           f"below {ROUTER_MARGIN_MIN} / {GREEDY_MARGIN_MIN}; refusing to write fixtures")
    info["min_router_margin"] = round(info["min_router_margin"], 6)
    info["min_greedy_margin"] = round(info["min_greedy_margin"], 6)
    return arrays, info


def save_npz(path: Path, arrays: dict[str, np.ndarray]) -> None:
    """An .npz (a zip of .npy files, numpy's format) with fixed entry dates, so the bytes are reproducible."""
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_STORED) as zf:
        for name in sorted(arrays):
            buf = io.BytesIO()
            np.lib.format.write_array(buf, np.ascontiguousarray(arrays[name]), allow_pickle=False)
            info = zipfile.ZipInfo(name + ".npy", date_time=(1980, 1, 1, 0, 0, 0))
            info.external_attr = 0o644 << 16
            zf.writestr(info, buf.getvalue())


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# --------------------------------------------------------------------------------------------------------- main


def build_arch(arch: str, tok: Tokenizer, seqs: list[list[int]], out: Path, specs=None) -> dict[str, dict]:
    """Write the variants of one model type under `out` (one directory each); returns their manifest entries."""
    model, seed, tries = choose_model(arch, seqs)
    entries: dict[str, dict] = {}
    refs: dict[str, dict[str, np.ndarray]] = {}
    for spec in specs or VARIANTS[arch]:
        name = f"{arch}-{spec[0]}"
        d = out / name
        entry = write_variant(model, tok, arch, spec, d)
        arrays, info = reference(d, seqs)
        save_npz(d / "reference.npz", arrays)
        entry.update(seed=seed, seed_tries=tries, **info)
        entry["reference_arrays"] = {k: {"shape": list(v.shape), "dtype": str(v.dtype)} for k, v in sorted(arrays.items())}
        entry["files"] = {f.name: {"bytes": f.stat().st_size, "sha256": sha256(f)} for f in sorted(d.iterdir())}
        entries[name] = entry
        refs[name] = arrays
    # variants with the same weights must give the same logits whatever the layout, shards or config spelling
    by_dtype: dict[str, list[str]] = {}
    for name, e in entries.items():
        by_dtype.setdefault(e["dtype"], []).append(name)
    for names in by_dtype.values():
        for other in names[1:]:
            for k in refs[names[0]]:
                diff = float(np.max(np.abs(refs[names[0]][k].astype(np.float64) - refs[other][k])))
                if diff > SAME_WEIGHTS_TOL:
                    raise FixtureError(f"{names[0]} and {other} hold the same weights but {k} differs by {diff:.3g}")
    return entries


def build_all(out: Path) -> dict:
    tok = train_tokenizer()
    seqs = prompt_ids(tok)
    variants: dict[str, dict] = {}
    for arch in ARCHS:
        variants.update(build_arch(arch, tok, seqs, out))
    return {
        "about": "Tiny random open MoE checkpoints and the transformers library's float32 eager reference outputs "
                 "(issue 22). Random weights: generated text means nothing and is not advice.",
        "command": COMMAND,
        "versions": {"transformers": transformers.__version__, "torch": torch.__version__,
                     "tokenizers": tokenizers.__version__, "safetensors": safetensors.__version__,
                     "numpy": np.__version__, "python": platform.python_version()},
        "reference": {"load": 'from_pretrained(dir, dtype=torch.float32, attn_implementation="eager", '
                              'experts_implementation="eager")',
                      "logits": "logits_{i}: float32 [len(tokens_{i}), vocab], one forward of tokens_{i} (no batch)",
                      "greedy": f"greedy_{{i}}: {GREEDY_STEPS} tokens, argmax of the last position of a full "
                                "forward, repeated; not stopped at EOS"},
        "margins": {"router": "k-th minus (k+1)-th router logit, min over every MoE layer and token of every "
                              "sequence and its continuation",
                    "greedy": "best minus second-best next-token logit, min over every greedy step",
                    "router_min_required": ROUTER_MARGIN_MIN, "greedy_min_required": GREEDY_MARGIN_MIN},
        "init": {"weights_std": WEIGHT_STD, "router_std": ROUTER_STD, "lm_head_std": LM_HEAD_STD, "norm": f"1 + {NORM_SPREAD} * N(0,1)",
                 "bias_std": BIAS_STD},
        "tokenizer": {"kind": "byte-level BPE (tokenizers library), no prefix space", "vocab_size": VOCAB_SIZE,
                      "bos": [BOS, BOS_ID], "eos": [EOS, EOS_ID]},
        "prompts": PROMPTS,
        "observed": observed_notes(variants),
        "variants": variants,
    }


def observed_notes(variants: dict[str, dict]) -> dict[str, str]:
    """What the installed library actually wrote, in words (from the files, not from its documentation)."""
    notes = {}
    for name, v in variants.items():
        shapes = ", ".join(f"{k} {v['expert_tensors_example'][k]}" for k in v["expert_tensors_example"])
        key = "save_original_format=False" if v["layout"] == "fused" else "save_original_format=True (default)"
        notes.setdefault(key, f"{name}: {shapes}")
        if v["sharded"]:
            notes.setdefault(f"max_shard_size ({v['layout']})",
                             f"{name}: {len(v['weight_files'])} files; {len(v['straddling_experts'])} experts straddle "
                             "files (see the index's weight_map)")
    return notes


def write_all(out: Path) -> dict:
    """Build everything in a temporary directory next to `out`, then replace `out` (nothing is written on failure)."""
    out = out.resolve()
    out.parent.mkdir(parents=True, exist_ok=True)
    keep = [p for p in (out / "README.md",) if p.exists()]
    with tempfile.TemporaryDirectory(dir=out.parent) as tmp:
        stage = Path(tmp) / "open"
        stage.mkdir()
        manifest = build_all(stage)
        (stage / "manifest.json").write_text(json.dumps(manifest, indent=2) + "\n")
        for p in keep:
            shutil.copy2(p, stage / p.name)
        if out.exists():
            shutil.rmtree(out)
        shutil.move(str(stage), str(out))
    return manifest


def compare_trees(a: Path, b: Path) -> list[str]:
    diffs = []
    names = sorted({p.relative_to(a) for p in a.rglob("*") if p.is_file()} | {p.relative_to(b) for p in b.rglob("*") if p.is_file()})
    for rel in names:
        if rel.name == "README.md":
            continue
        if not (a / rel).exists() or not (b / rel).exists() or not filecmp.cmp(a / rel, b / rel, shallow=False):
            diffs.append(str(rel))
    return diffs


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=Path("tests/fixtures/open"))
    ap.add_argument("--check", action="store_true",
                    help="rebuild into a temporary directory and compare every byte with --out instead of writing")
    args = ap.parse_args(argv)
    try:
        if args.check:
            with tempfile.TemporaryDirectory() as tmp:
                write_all(Path(tmp) / "open")
                diffs = compare_trees(args.out, Path(tmp) / "open")
            if diffs:
                print(f"differ from {args.out}: {', '.join(diffs)}")
                return 1
            print(f"rebuilt: every file equal to {args.out}")
            return 0
        manifest = write_all(args.out)
    except FixtureError as e:
        print(f"make_open_fixtures: {e}", file=sys.stderr)
        return 2
    for name, v in manifest["variants"].items():
        print(f"{name:32s} {v['dtype']:9s} {v['layout']:10s} {'sharded' if v['sharded'] else 'single':8s} "
              f"{v['config_spelling']:4s} router margin {v['min_router_margin']:.3f} greedy {v['min_greedy_margin']:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
