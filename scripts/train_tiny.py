#!/usr/bin/env python3
"""Train a bundled tiny model ("pebble" or "scree") on the invented corpus and export it.

    python scripts/make_corpus.py --seed 1234 --out data/corpus
    OMP_WAIT_POLICY=PASSIVE python scripts/train_tiny.py --corpus data/corpus --out tiny_models/pebble
    OMP_WAIT_POLICY=PASSIVE python scripts/train_tiny.py --name scree      # after pebble: reuses its tokenizer

Steps: train a byte-level BPE tokenizer (vocabulary 2048, special token <doc> = id 0)
on train.txt, or reuse one (--tokenizer; scree reuses pebble's: same corpus, same
vocabulary); tokenize; train the named shape with PyTorch on CPU (seeded, 2
threads); export config.json, model.safetensors, tokenizer.json, heldout.txt (a
slice of whole held-out documents), reference.npz and CARD.md, each written
atomically (temp file + os.replace).

Shapes (SHAPES below): pebble is the configuration the project first measured training with (8 experts,
top-2 of d_expert 256); scree has many small experts and a shared one (32
experts, top-4 of d_expert 64, plus a shared expert of width 256): the same
512 active hidden units per layer and token as pebble, and the same routed
expert bytes.

Held-out scoring (used for the CARD figures): ids = encode(heldout.txt) (the file
holds a literal <doc> before every document, which encodes to id 0); windows
ids[i:i+256] for i = 0, 256, 512, ...; in each window every position after the
first is predicted from the window's earlier tokens; cross-entropy is the mean
over all predicted positions, perplexity its exp.  With --compare DIR (scree:
pebble) the other model is scored in the same run by the same rule on the same
token ids, for the card.

It imports ``_bench`` (the scripts' shared helpers: ``log``, ``split_docs``) before numpy and
torch, which pins numpy's BLAS to one thread; torch's own threads are set by --threads.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import math
import os
import time
from pathlib import Path

import _bench  # first: before numpy; puts the repository on sys.path
import numpy as np
import torch
import torch.nn.functional as F
from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers

from moerun.checks.torch_twin import TorchMoE

ROOT = Path(__file__).resolve().parent.parent
DOC = _bench.DOC
BUNDLED = ROOT / "tiny_models"

PEBBLE = {
    "format": "moerun/1", "name": "pebble", "vocab_size": 2048, "d_model": 128, "n_layers": 4,
    "n_heads": 4, "n_kv_heads": 2, "head_dim": 32, "n_experts": 8, "top_k": 2, "d_expert": 256,
    "max_seq_len": 256, "rope_theta": 10000.0, "norm_eps": 1e-5, "tied_embeddings": True,
    "bos_token_id": 0, "dtype": "F32",
}
CONFIG = PEBBLE  # the name older callers used
SCREE = {**PEBBLE, "name": "scree", "n_experts": 32, "top_k": 4, "d_expert": 64, "d_shared": 256}
SHAPES = {"pebble": PEBBLE, "scree": SCREE}
# per model: default steps, and what it reuses from an earlier bundled model (tokenizer, comparison)
PRESETS = {
    "pebble": {"steps": 1200, "tokenizer": None, "compare": None},
    "scree": {"steps": 1200, "tokenizer": BUNDLED / "pebble" / "tokenizer.json", "compare": BUNDLED / "pebble"},
}
BLURB = {
    "pebble": "exists to exercise moerun (offloading, routing traces, policies)",
    "scree": ("has the shape of recent sparse models (many small routed experts and an always-on shared "
              "expert) at pebble's active compute per token; it exists to exercise moerun's offloading and "
              "policies on that shape"),
}


# ------------------------------------------------------------------ helpers


def atomic_write(path: Path, data: bytes) -> None:
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def register_of(doc: str) -> str:
    body = doc[len(DOC):]
    for prefix, name in (("== log", "log"), ("## ", "table"), ("Field notes", "notes"),
                         ("[radio", "radio"), ("TICKET", "ticket")):
        if body.startswith(prefix):
            return name
    return "other"


# ------------------------------------------------------------------ tokenizer


def train_tokenizer(docs: list[str], vocab_size: int) -> Tokenizer:
    tok = Tokenizer(models.BPE())
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tok.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(vocab_size=vocab_size, special_tokens=[DOC], min_frequency=2,
                                  initial_alphabet=pre_tokenizers.ByteLevel.alphabet(), show_progress=False)
    tok.train_from_iterator((d[len(DOC):] for d in docs), trainer=trainer)
    if tok.token_to_id(DOC) != 0 or tok.get_vocab_size() != vocab_size:
        raise RuntimeError(f"tokenizer: <doc> id {tok.token_to_id(DOC)}, vocabulary {tok.get_vocab_size()}")
    return tok


def encode_docs(tok: Tokenizer, docs: list[str]) -> np.ndarray:
    encs = tok.encode_batch(docs)
    ids = np.concatenate([np.asarray(e.ids, dtype=np.int64) for e in encs])
    return ids


# ------------------------------------------------------------------ evaluation


@torch.no_grad()
def score(model: TorchMoE, ids: np.ndarray, window: int, batch: int = 8) -> tuple[float, int, np.ndarray]:
    """(mean cross-entropy in nats/token, predicted tokens, expert assignment counts [L, E])."""
    model.eval()
    chunks = [ids[i:i + window] for i in range(0, len(ids), window)]
    chunks = [c for c in chunks if len(c) >= 2]
    total, n = 0.0, 0
    counts = torch.zeros(model.n_layers, model.n_experts, dtype=torch.long)
    full = [c for c in chunks if len(c) == window]
    rest = [c for c in chunks if len(c) != window]
    groups = [full[i:i + batch] for i in range(0, len(full), batch)] + [[c] for c in rest]
    for g in groups:
        x = torch.from_numpy(np.stack(g))
        logits, aux = model(x, return_aux=True)
        ce = F.cross_entropy(logits[:, :-1].reshape(-1, logits.shape[-1]), x[:, 1:].reshape(-1), reduction="sum")
        total += ce.item()
        n += x[:, 1:].numel()
        counts += aux["counts"]
    model.train()
    return total / n, n, counts.numpy()


@torch.no_grad()
def sample(model: TorchMoE, tok: Tokenizer, prompt: str, n: int, temperature: float, gen: torch.Generator) -> str:
    ids = tok.encode(prompt).ids
    logits = model.prefill(ids)
    out = []
    for _ in range(n):
        if temperature <= 0:
            t = int(torch.argmax(logits))
        else:
            t = int(torch.multinomial(torch.softmax(logits / temperature, dim=-1), 1, generator=gen))
        if t == 0 or len(ids) + len(out) + 1 >= model.max_seq_len:
            break
        out.append(t)
        logits = model.decode_step(t)
    return prompt[len(DOC):] + tok.decode(out)


# ------------------------------------------------------------------ main


def load_tokenizer(path: Path, vocab_size: int) -> Tokenizer:
    """A tokenizer.json made by train_tokenizer for the same corpus (checked: <doc> is id 0, same vocabulary)."""
    tok = Tokenizer.from_file(str(path))
    if tok.token_to_id(DOC) != 0 or tok.get_vocab_size() != vocab_size:
        raise RuntimeError(f"{path}: <doc> id {tok.token_to_id(DOC)}, vocabulary {tok.get_vocab_size()} "
                           f"(need id 0 and {vocab_size})")
    return tok


def numpy_max_diff(model_dir: Path, ids: np.ndarray, want: np.ndarray) -> float:
    """Largest |logit| difference between moerun's numpy engine (all experts resident) and ``want``."""
    import moerun

    with moerun.load(model_dir, tokenizer=False) as eng:
        return max(float(np.max(np.abs(eng.logits(row.tolist()) - ref))) for row, ref in zip(ids, want, strict=True))


def main() -> None:
    ap = argparse.ArgumentParser(description="Train and export a bundled tiny model (pebble or scree).")
    ap.add_argument("--name", choices=sorted(SHAPES), default="pebble", help="which bundled model (shape) to train")
    ap.add_argument("--corpus", default=str(ROOT / "data" / "corpus"))
    ap.add_argument("--out", help="model directory to write (default tiny_models/NAME)")
    ap.add_argument("--tokenizer", help="reuse this tokenizer.json instead of training one (default for scree: pebble's)")
    ap.add_argument("--compare", help="another model directory to score in the same way for the card (scree: pebble)")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--steps", type=int, help="optimizer steps (default 1200)")
    ap.add_argument("--batch", type=int, default=8)
    ap.add_argument("--lr", type=float, default=2.5e-3)
    ap.add_argument("--warmup", type=int, default=60)
    ap.add_argument("--weight-decay", type=float, default=0.1)
    ap.add_argument("--lb-coef", type=float, default=0.01)
    ap.add_argument("--z-coef", type=float, default=1e-3)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--heldout-kb", type=int, default=80, help="size of the bundled held-out slice")
    ap.add_argument("--eval-every", type=int, default=300)
    args = ap.parse_args()
    preset = PRESETS[args.name]
    args.out = args.out or str(BUNDLED / args.name)
    args.steps = args.steps or preset["steps"]
    args.tokenizer = args.tokenizer or (str(preset["tokenizer"]) if preset["tokenizer"] else None)
    args.compare = args.compare or (str(preset["compare"]) if preset["compare"] else None)

    if os.environ.get("OMP_WAIT_POLICY", "").upper() != "PASSIVE":
        _bench.log("note: set OMP_WAIT_POLICY=PASSIVE for training on shared cores "
            "(OMP_WAIT_POLICY=PASSIVE python scripts/train_tiny.py ...)")
    torch.set_num_threads(args.threads)
    torch.manual_seed(args.seed)
    np.random.seed(args.seed)
    t_start = time.monotonic()
    corpus, out = Path(args.corpus), Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    cfg = dict(SHAPES[args.name])
    seq = cfg["max_seq_len"]

    # -- corpus and tokenizer
    train_docs = _bench.split_docs((corpus / "train.txt").read_text(encoding="utf-8"))
    held_docs = _bench.split_docs((corpus / "heldout.txt").read_text(encoding="utf-8"))
    if args.tokenizer:
        tok = load_tokenizer(Path(args.tokenizer), cfg["vocab_size"])
        _bench.log(f"tokenizer: reused {args.tokenizer}")
    else:
        tok = train_tokenizer(train_docs, cfg["vocab_size"])
    for d in held_docs[:50]:
        enc = tok.encode(d)
        if enc.ids[0] != 0 or tok.decode(enc.ids, skip_special_tokens=False) != d:
            raise RuntimeError("tokenizer does not round-trip a held-out document")
    train_ids = encode_docs(tok, train_docs)
    held_ids = encode_docs(tok, held_docs)
    _bench.log(f"tokenizer: vocab {tok.get_vocab_size()}; train {len(train_ids):,} tokens "
        f"({sum(len(d.encode()) for d in train_docs) / len(train_ids):.2f} bytes/token), held-out {len(held_ids):,} tokens")

    # bundled held-out slice: whole documents from the start of heldout.txt
    slice_docs, size = [], 0
    for d in held_docs:
        if size >= args.heldout_kb * 1000:
            break
        slice_docs.append(d)
        size += len(d.encode("utf-8"))
    slice_text = "".join(slice_docs)
    slice_ids = np.asarray(tok.encode(slice_text).ids, dtype=np.int64)

    # -- model and optimiser
    model = TorchMoE(cfg)
    n_params = sum(p.numel() for p in model.parameters())
    decay = [p for p in model.parameters() if p.ndim >= 2]
    no_decay = [p for p in model.parameters() if p.ndim < 2]
    opt = torch.optim.AdamW([{"params": decay, "weight_decay": args.weight_decay},
                             {"params": no_decay, "weight_decay": 0.0}],
                            lr=args.lr, betas=(0.9, 0.95), eps=1e-8)

    def lr_at(step: int) -> float:
        if step < args.warmup:
            return args.lr * (step + 1) / args.warmup
        prog = (step - args.warmup) / max(1, args.steps - args.warmup)
        return args.lr * (0.1 + 0.9 * 0.5 * (1 + math.cos(math.pi * prog)))

    gen = torch.Generator().manual_seed(args.seed)
    data = torch.from_numpy(train_ids)
    max_start = len(train_ids) - seq - 1
    _bench.log(f"model {args.name}: {n_params:,} parameters; {args.steps} steps of {args.batch}x{seq} tokens on {args.threads} threads")
    t0 = time.monotonic()
    hist: list[float] = []
    lb_hist: list[float] = []
    evals: list[tuple[int, float]] = []
    model.train()
    for step in range(args.steps):
        for g in opt.param_groups:
            g["lr"] = lr_at(step)
        starts = torch.randint(0, max_start, (args.batch,), generator=gen)
        xb = torch.stack([data[s:s + seq + 1] for s in starts.tolist()])
        logits, aux = model(xb[:, :-1], return_aux=True)
        ce = F.cross_entropy(logits.reshape(-1, logits.shape[-1]), xb[:, 1:].reshape(-1))
        loss = ce + args.lb_coef * aux["lb"] + args.z_coef * aux["z"]
        opt.zero_grad(set_to_none=True)
        loss.backward()
        torch.nn.utils.clip_grad_norm_(model.parameters(), 1.0)
        opt.step()
        hist.append(ce.item())
        lb_hist.append(aux["lb"].item())
        if (step + 1) % 50 == 0 or step == 0:
            recent = hist[-50:]
            _bench.log(f"step {step + 1:5d}/{args.steps}  loss {sum(recent) / len(recent):.4f}  lb {aux['lb'].item():.3f}  "
                f"z {aux['z'].item():.2f}  lr {lr_at(step):.2e}  {time.monotonic() - t0:7.1f} s")
        if args.eval_every and (step + 1) % args.eval_every == 0 and step + 1 < args.steps:
            ce_h, _, _ = score(model, held_ids, seq)
            evals.append((step + 1, ce_h))
            _bench.log(f"           held-out {ce_h:.4f} nats/token (ppl {math.exp(ce_h):.3f})")
    train_seconds = time.monotonic() - t0
    final_train_loss = sum(hist[-50:]) / len(hist[-50:])
    final_lb = sum(lb_hist[-50:]) / len(lb_hist[-50:])
    model.eval()

    # -- evaluation
    ce_all, n_all, _ = score(model, held_ids, seq)
    ce_slice, n_slice, counts = score(model, slice_ids, seq)
    rng = np.random.default_rng(args.seed)
    tr_windows = np.concatenate([train_ids[s:s + seq] for s in rng.integers(0, max_start, 64)])
    ce_train, _, _ = score(model, tr_windows, seq)
    shares = counts / counts.sum(axis=1, keepdims=True)
    _bench.log(f"done in {train_seconds:.0f} s: train loss (last 50 steps) {final_train_loss:.4f}; "
        f"eval-mode train {ce_train:.4f}; held-out {ce_all:.4f} (ppl {math.exp(ce_all):.3f}); "
        f"bundled slice {ce_slice:.4f} (ppl {math.exp(ce_slice):.3f})")
    _bench.log("expert shares per layer (% of top-k assignments):")
    for li in range(cfg["n_layers"]):
        _bench.log(f"  layer {li}: " + " ".join(f"{100 * s:5.1f}" for s in shares[li]))
    compare = None
    if args.compare:  # the other model, scored by the same rule on the same token ids in this run
        other = TorchMoE.from_model_dir(args.compare)
        other_all, other_n_all, _ = score(other, held_ids, seq)
        other_slice, other_n_slice, _ = score(other, slice_ids, seq)
        if (other_n_all, other_n_slice) != (n_all, n_slice):
            raise RuntimeError("the comparison model predicted a different number of tokens")
        name = json.loads((Path(args.compare) / "config.json").read_text(encoding="utf-8")).get("name") or Path(args.compare).name
        compare = {"name": name, "dir": args.compare, "ce_all": other_all, "ce_slice": other_slice}
        _bench.log(f"{name}, same rule and tokens: held-out {other_all:.4f} (ppl {math.exp(other_all):.3f}); "
            f"bundled slice {other_slice:.4f} (ppl {math.exp(other_slice):.3f})")

    # -- export
    atomic_write(out / "config.json", (json.dumps(cfg, indent=2) + "\n").encode())
    tensors = model.state_to_numpy()
    meta = {"format": "moerun/1", "name": cfg["name"], "torch_version": torch.__version__}
    try:
        from moerun.files.modelfile import save_model_file
        save_model_file(out / "model.safetensors", tensors, metadata=meta)
        writer = "moerun.files.modelfile.save_model_file"
    except ImportError:
        from safetensors.numpy import save_file
        tmp = out / ".model.safetensors.tmp"
        save_file(tensors, str(tmp), metadata=meta)
        os.replace(tmp, out / "model.safetensors")
        writer = "safetensors.numpy.save_file (moerun.files.modelfile not available)"
    os.chmod(out / "model.safetensors", 0o644)
    _bench.log(f"model.safetensors written with {writer}")
    tmp = out / ".tokenizer.json.tmp"
    tok.save(str(tmp))
    os.replace(tmp, out / "tokenizer.json")
    atomic_write(out / "heldout.txt", slice_text.encode("utf-8"))

    # reference windows: three documents of different registers in the slice, 64 tokens from their start
    doc_starts = np.flatnonzero(slice_ids == 0)
    picked, seen = [], set()
    for s, d in zip(doc_starts, slice_docs, strict=True):
        reg = register_of(d)
        if reg not in seen and s + 64 <= len(slice_ids):
            picked.append(s)
            seen.add(reg)
        if len(picked) == 3:
            break
    ref_ids = np.stack([slice_ids[s:s + 64] for s in picked]).astype(np.int64)
    fresh = TorchMoE.from_model_dir(out)
    with torch.no_grad():
        ref_logits = fresh(torch.from_numpy(ref_ids)).numpy().astype(np.float32)
        same = model(torch.from_numpy(ref_ids)).numpy()
    if not np.array_equal(ref_logits, same):
        raise RuntimeError("reloaded model gives different logits from the trained one")
    tmp = out / ".reference.npz.tmp"
    with open(tmp, "wb") as f:
        np.savez(f, token_ids=ref_ids, logits=ref_logits, torch_version=np.array(torch.__version__))
    os.replace(tmp, out / "reference.npz")
    np_diff = numpy_max_diff(out, ref_ids, ref_logits)
    _bench.log(f"numpy engine vs torch reference on reference.npz: max |logit difference| {np_diff:.2e}")

    # samples (torch decode path)
    sgen = torch.Generator().manual_seed(args.seed)
    samples = []
    for prompt, temp in ((DOC + "== log", 0.0), (DOC + "Field notes —", 0.8), (DOC + "[radio", 0.8),
                         (DOC + "TICKET", 0.8), (DOC + "## Weekly yield", 0.0), (DOC, 0.8)):
        text = sample(fresh, tok, prompt, 160, temp, sgen)
        samples.append((prompt, temp, text))
        _bench.log(f"--- sample {prompt!r} (temperature {temp}) ---\n{text}")

    results = {
        "n_params": n_params, "train_seconds": train_seconds, "final_train_loss": final_train_loss,
        "final_lb": final_lb, "ce_train": ce_train, "ce_all": ce_all, "n_all": n_all, "ce_slice": ce_slice,
        "n_slice": n_slice, "shares": shares, "samples": samples, "evals": evals, "n_train_tok": len(train_ids),
        "n_held_tok": len(held_ids), "writer": writer, "compare": compare, "np_diff": np_diff,
        "total_seconds": time.monotonic() - t_start,
    }
    write_card(out, cfg, corpus, args, tok, results)
    _bench.log(f"exported to {out} ({sum(p.stat().st_size for p in out.iterdir()) / 2**20:.1f} MiB) "
        f"in {time.monotonic() - t_start:.0f} s total")


REG_DESC = {
    "log": "terse station telemetry, one reading per line (`05:45 fog=dense vis=40m ... cist=64.1% cond=38µS/cm`), with WARN/ERR/INFO/ACK events",
    "table": "fixed-width numeric tables: weekly yields per ridge, 14-day station ledgers, cart-run schedules",
    "notes": "first-person prose field notes by a station keeper (weather, work done, visitors, birds, reflections)",
    "radio": "two-party radio dialogue between valley dispatch and a station keeper (levels, carts, parts, faults)",
    "ticket": "maintenance tickets in `key: value` form, several per document separated by `----`",
}


def expert_use_section(cfg: dict, shares: np.ndarray) -> str:
    """Share of top-k assignments per expert and layer: every value for few experts, a summary row per layer for many."""
    E, k = cfg["n_experts"], cfg["top_k"]
    intro = (f"Share of top-{k} assignments per expert and layer over the bundled heldout.txt, in %\n"
             f"(each token counts once for each of its {k} experts; each row sums to 100 %,\n"
             f"uniform use would be {100 / E:.3g} %)")
    if E <= 8:
        head = "| layer | " + " | ".join(f"e{e}" for e in range(E)) + " | min | max |"
        rule = "|---" * (E + 3) + "|"
        rows = "\n".join(
            f"| {li} | " + " | ".join(f"{100 * s:.1f}" for s in shares[li]) + f" | {100 * shares[li].min():.1f} | {100 * shares[li].max():.1f} |"
            for li in range(cfg["n_layers"]))
        return f"{intro}:\n\n{head}\n{rule}\n{rows}\n"
    quarter = 0.25 / E
    rows = "\n".join(
        f"| {li} | {100 * r.min():.2f} | {100 * np.percentile(r, 10):.2f} | {100 * np.median(r):.2f} | "
        f"{100 * np.percentile(r, 90):.2f} | {100 * r.max():.2f} | {int(np.sum(r < quarter))} | {int(np.sum(r == 0))} |"
        for li, r in enumerate(shares))
    full = "\n".join(f"layer {li}: " + " ".join(f"{100 * s:.1f}" for s in r) for li, r in enumerate(shares))
    return (f"{intro}, summarised per layer:\n\n"
            f"| layer | min | 10th pct | median | 90th pct | max | experts under a quarter of uniform ({100 * quarter:.2f} %) | unused |\n"
            f"|---|---|---|---|---|---|---|---|\n{rows}\n\n"
            f"Every expert's share, e0 to e{E - 1} from left to right:\n\n```text\n{full}\n```\n")


def rel(path) -> str:
    """A path as the card shows it: relative to the repository when inside it."""
    p = Path(path).resolve()
    return str(p.relative_to(ROOT)) if p.is_relative_to(ROOT) else str(path)


def write_card(out: Path, cfg: dict, corpus: Path, args, tok: Tokenizer, r: dict) -> None:
    import platform

    stats = json.loads((corpus / "stats.json").read_text(encoding="utf-8"))
    today = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d")
    machine = (f"{platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, "
               f"numpy {np.__version__}")
    model_mib = (out / "model.safetensors").stat().st_size / 2**20
    slice_kb = (out / "heldout.txt").stat().st_size / 1000
    name, E, k, dx = cfg["name"], cfg["n_experts"], cfg["top_k"], cfg["d_expert"]
    d_shared, norm_topk = cfg.get("d_shared", 0), cfg.get("norm_topk", True)
    total_bytes = stats["train_bytes"] + stats["heldout_bytes"]
    reg_rows = "\n".join(
        f"| {reg} | {s['docs']:,} | {s['bytes'] / 1e6:.2f} MB | {100 * s['bytes'] / total_bytes:.0f} % | {REG_DESC[reg]} |"
        for reg, s in stats["registers"].items())
    eval_rows = ", ".join(f"step {s}: {v:.3f}" for s, v in r["evals"])
    sample_blocks = "\n\n".join(
        f"Prompt `{p.replace(DOC, '<doc>')}`, {'greedy' if t <= 0 else f'temperature {t}'}:\n\n```text\n{s.strip()[:600]}\n```"
        for p, t, s in r["samples"][:3])
    shape = f"{E} experts, top-{k}" + (f", plus an always-on shared expert of width {d_shared}" if d_shared else "")
    name_opt = f" --name {name}" if name != "pebble" else ""
    tok_opt = f" --tokenizer {rel(args.tokenizer)}" if args.tokenizer else ""
    expert_bytes = 4 * 3 * cfg["d_model"] * dx
    shared_rows = ""
    if d_shared or not norm_topk:
        shared_rows = (f"| shared expert (d_shared) | {d_shared} (dense, always resident: "
                       f"{4 * 3 * cfg['d_model'] * d_shared * cfg['n_layers'] / 2**20:.2f} MiB in all) |\n"
                       f"| chosen weights (norm_topk) | {'renormalised to sum to 1 (true)' if norm_topk else 'the router probabilities as they are (false)'} |\n")
    active = k * dx + d_shared
    file_bytes = (out / "model.safetensors").stat().st_size
    L, D = cfg["n_layers"], cfg["d_model"]
    wider = file_bytes + 4 * 3 * D * L * (E * (96 - dx) + (128 - d_shared))  # same file with 4 x 96 + 128
    why = ""
    if name == "scree":
        why = f"""
Why this shape: recent sparse models route each token to many small experts
and add an always-on shared expert; scree has both at pebble's scale. Per
layer and token it runs {k} x {dx} routed + {d_shared} shared = **{active} hidden
units**, the same as pebble's 2 x 256, so the active compute per token is
pebble's (its router is {E} wide instead of 8). Its routed experts take
{expert_bytes:,} B each and {E * expert_bytes * cfg['n_layers'] / 2**20:.1f} MiB in all,
the same as pebble's 8 x 393,216 B per layer; the shared expert adds
{4 * 3 * cfg['d_model'] * d_shared / 2**10:.0f} KiB of dense weights per layer. The same
active width split as 4 x 96 + 128 would have made the weights file about
{wider / 1e6:.1f} MB, over the 20 MB a bundled model may take in the repository;
64 experts of width 32, top-8, would keep the bytes but run 8 routed expert
calls per layer and token instead of 4.
"""
    cmp = r["compare"]
    compare_block = ""
    if cmp:
        compare_block = f"""
Beside {cmp['name']}, scored in this run by the same rule on the same token ids
(`{rel(cmp['dir'])}`, PyTorch reference, float32):

| held-out text | {name} | {cmp['name']} |
|---|---|---|
| corpus heldout.txt ({r['n_all']:,} predicted tokens) | {r['ce_all']:.3f} nats/token (perplexity {math.exp(r['ce_all']):.2f}) | {cmp['ce_all']:.3f} nats/token (perplexity {math.exp(cmp['ce_all']):.2f}) |
| bundled heldout.txt ({r['n_slice']:,} predicted tokens) | {r['ce_slice']:.3f} nats/token (perplexity {math.exp(r['ce_slice']):.2f}) | {cmp['ce_slice']:.3f} nats/token (perplexity {math.exp(cmp['ce_slice']):.2f}) |
"""
    if args.tokenizer:
        tok_text = (f"Reused unchanged from `{tok_opt.split()[-1]}` (same corpus, same vocabulary): byte-level BPE "
                    f"(`tokenizers` library, ByteLevel pre-tokenizer and decoder, no\nprefix space), vocabulary "
                    f"{tok.get_vocab_size()}, trained on train.txt by this script for pebble")
    else:
        tok_text = (f"Byte-level BPE (`tokenizers` library, ByteLevel pre-tokenizer and decoder, no\n"
                    f"prefix space), vocabulary {tok.get_vocab_size()}, trained on train.txt")
    card = f"""# {name} — a bundled tiny model

A {cfg['n_layers']}-layer sparse mixture-of-experts model ({shape}) following the model spec of docs/design/architecture.md,
trained on CPU on an invented corpus. It {BLURB[name]}, not to be useful
for anything else.

**Everything this model generates is invented text about an invented place. It is
not advice of any kind, and its numbers describe nothing real.**

Built on {today} (UTC) by `scripts/train_tiny.py` on {machine}; every figure below
was written by that script from the same run.

## How it was built

```sh
python scripts/make_corpus.py --seed {stats['seed']} --out data/corpus
OMP_WAIT_POLICY=PASSIVE python scripts/train_tiny.py{name_opt} --corpus data/corpus --out tiny_models/{name}{tok_opt} --seed {args.seed} --steps {args.steps}
```

PyTorch {torch.__version__} (CPU), {args.threads} threads, seed {args.seed}.
`model.safetensors` written with {r['writer']}.

## Corpus

An invented scenario: the Teneth Ridges, a coastal range where a cooperative (the
Teneth Fogwater Compact) runs {stats['world']['stations']} stations of mesh nets that comb drinking
water out of sea fog into cisterns, on five ridges ({', '.join(stats['world']['ridges'])});
carts carry the water down to the valley town of {stats['world']['valley']}. All names of
people, places, birds and parts are generated from random syllables.

{total_bytes / 1e6:.2f} MB of UTF-8 text in {stats['train_docs'] + stats['heldout_docs']:,} documents
(train {stats['train_bytes'] / 1e6:.2f} MB / {stats['train_docs']:,} documents; held out
{stats['heldout_bytes'] / 1e6:.2f} MB / {stats['heldout_docs']:,} documents, about 5 %, whole documents).
Non-ASCII characters occur naturally (°, µ, –, —, ², ×, é, ö, à).

| register | documents | size | share | what it looks like |
|---|---|---|---|---|
{reg_rows}

Every document starts with the literal marker `<doc>`, which the tokenizer maps
to its one special token, id 0 (`bos_token_id` in config.json). The tokenizer
does not add it by itself: a prompt for a new document starts with id 0.

## Tokenizer

{tok_text}; {r['n_train_tok']:,}
training tokens ({stats['train_bytes'] / r['n_train_tok']:.2f} bytes/token), {r['n_held_tok']:,} held-out tokens. Decoding
round-trips any UTF-8 text.

## Model

| field | value |
|---|---|
| layers | {cfg['n_layers']} |
| d_model | {cfg['d_model']} |
| heads / KV heads / head_dim | {cfg['n_heads']} / {cfg['n_kv_heads']} / {cfg['head_dim']} |
| experts / top_k / d_expert | {E} / {k} / {dx} |
{shared_rows}| context | {cfg['max_seq_len']} tokens |
| rope_theta, norm_eps | {cfg['rope_theta']}, {cfg['norm_eps']} |
| embeddings | tied |
| parameters | {r['n_params']:,} ({model_mib:.1f} MiB in F32) |
{why}
## Training

AdamW (lr peak {args.lr}, betas 0.9/0.95, weight decay {args.weight_decay} on matrices),
{args.warmup}-step linear warm-up then cosine decay to 10 % of peak, batch
{args.batch} x {cfg['max_seq_len']} tokens (random windows of the tokenized train stream),
gradient clipping 1.0, load-balancing loss x {args.lb_coef}, router z-loss x {args.z_coef},
{args.steps} steps in **{r['train_seconds'] / 60:.1f} min** ({r['train_seconds']:.0f} s) on {args.threads} CPU threads
(the whole script, tokenizing to samples, {r['total_seconds'] / 60:.1f} min).
The load-balancing loss is E * sum_e f_e * P_e per layer (f_e the share of
top-k assignments, P_e the mean router probability; 1.0 when use is even, E
when one expert takes everything); mean of the last 50 steps: {r['final_lb']:.3f}.

## Results

| measure | value |
|---|---|
| train loss, mean of the last 50 steps | {r['final_train_loss']:.3f} nats/token |
| train loss, 64 random train windows, eval mode | {r['ce_train']:.3f} nats/token |
| held-out cross-entropy, corpus heldout.txt ({r['n_all']:,} predicted tokens) | {r['ce_all']:.3f} nats/token (perplexity {math.exp(r['ce_all']):.2f}) |
| held-out cross-entropy, bundled heldout.txt ({slice_kb:.0f} KB, {r['n_slice']:,} predicted tokens) | **{r['ce_slice']:.3f} nats/token (perplexity {math.exp(r['ce_slice']):.2f})** |
| numpy engine (moerun, all experts resident) vs PyTorch, reference.npz windows | max \\|logit difference\\| {r['np_diff']:.1e} |

Held-out loss during training: {eval_rows or 'not measured'}.
{compare_block}
Scoring rule: `ids = encode(heldout.txt)`; windows `ids[i:i+256]` for
i = 0, 256, 512, ... (the last window may be shorter); in each window every
position after the first is predicted from the earlier tokens of the same
window; cross-entropy is the mean over all predicted positions (natural log),
perplexity is its exp.

### Expert use

{expert_use_section(cfg, r['shares'])}
## Files

| file | content |
|---|---|
| config.json | model configuration (format `moerun/1`) |
| model.safetensors | F32 weights, tensor names of the model spec (docs/design/architecture.md) |
| tokenizer.json | the byte-level BPE tokenizer |
| heldout.txt | {slice_kb:.0f} KB of whole held-out documents (never trained on) for scoring |
| reference.npz | `token_ids` int64 [3, 64] (three held-out windows, each starting at a document start, token 0), `logits` float32 [3, 64, {cfg['vocab_size']}] from the PyTorch reference in float32 (`moerun/checks/torch_twin.py`), `torch_version` |
| CARD.md | this card |

## Samples

Produced by the PyTorch reference's KV-cache decode path from this run. They are
invented text, shown only to illustrate the registers; they are not advice.

{sample_blocks}
"""
    atomic_write(out / "CARD.md", card.encode("utf-8"))


if __name__ == "__main__":
    main()
