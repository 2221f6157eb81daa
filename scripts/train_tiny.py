#!/usr/bin/env python3
"""Train the bundled tiny model "pebble" on the invented corpus and export it.

    python scripts/make_corpus.py --seed 1234 --out data/corpus
    OMP_WAIT_POLICY=PASSIVE python scripts/train_tiny.py --corpus data/corpus --out tiny_models/pebble

Steps: train a byte-level BPE tokenizer (vocabulary 2048, special token <doc> = id 0)
on train.txt; tokenize; train the DESIGN section 6 configuration with PyTorch on
CPU (seeded, 2 threads); export config.json, model.safetensors, tokenizer.json,
heldout.txt (a slice of whole held-out documents), reference.npz and CARD.md,
each written atomically (temp file + os.replace).

Held-out scoring (used for the CARD figures): ids = encode(heldout.txt) (the file
holds a literal <doc> before every document, which encodes to id 0); windows
ids[i:i+256] for i = 0, 256, 512, ...; in each window every position after the
first is predicted from the window's earlier tokens; cross-entropy is the mean
over all predicted positions, perplexity its exp.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import math
import os
import sys
import time
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F
from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from moerun.torch_ref import TorchMoE  # noqa: E402  (after the sys.path insert above)

DOC = "<doc>"

CONFIG = {
    "format": "moerun/1", "name": "pebble", "vocab_size": 2048, "d_model": 128, "n_layers": 4,
    "n_heads": 4, "n_kv_heads": 2, "head_dim": 32, "n_experts": 8, "top_k": 2, "d_expert": 256,
    "max_seq_len": 256, "rope_theta": 10000.0, "norm_eps": 1e-5, "tied_embeddings": True,
    "bos_token_id": 0, "dtype": "F32",
}


# ------------------------------------------------------------------ helpers


def log(msg: str) -> None:
    print(msg, flush=True)


def atomic_write(path: Path, data: bytes) -> None:
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def split_docs(text: str) -> list[str]:
    """Documents of a corpus file, each including its leading <doc> marker."""
    return [DOC + d for d in text.split(DOC)[1:]]


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


def main() -> None:
    ap = argparse.ArgumentParser(description="Train and export the tiny model 'pebble'.")
    ap.add_argument("--corpus", default=str(ROOT / "data" / "corpus"))
    ap.add_argument("--out", default=str(ROOT / "tiny_models" / "pebble"))
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--steps", type=int, default=1200)
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

    if os.environ.get("OMP_WAIT_POLICY", "").upper() != "PASSIVE":
        log("note: set OMP_WAIT_POLICY=PASSIVE for training on shared cores "
            "(OMP_WAIT_POLICY=PASSIVE python scripts/train_tiny.py ...)")
    torch.set_num_threads(args.threads)
    torch.manual_seed(args.seed)
    np.random.seed(args.seed)
    t_start = time.monotonic()
    corpus, out = Path(args.corpus), Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    cfg = dict(CONFIG)
    seq = cfg["max_seq_len"]

    # -- corpus and tokenizer
    train_docs = split_docs((corpus / "train.txt").read_text(encoding="utf-8"))
    held_docs = split_docs((corpus / "heldout.txt").read_text(encoding="utf-8"))
    tok = train_tokenizer(train_docs, cfg["vocab_size"])
    for d in held_docs[:50]:
        enc = tok.encode(d)
        if enc.ids[0] != 0 or tok.decode(enc.ids, skip_special_tokens=False) != d:
            raise RuntimeError("tokenizer does not round-trip a held-out document")
    train_ids = encode_docs(tok, train_docs)
    held_ids = encode_docs(tok, held_docs)
    log(f"tokenizer: vocab {tok.get_vocab_size()}; train {len(train_ids):,} tokens "
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
    log(f"model: {n_params:,} parameters; {args.steps} steps of {args.batch}x{seq} tokens on {args.threads} threads")
    t0 = time.monotonic()
    hist: list[float] = []
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
        if (step + 1) % 50 == 0 or step == 0:
            recent = hist[-50:]
            log(f"step {step + 1:5d}/{args.steps}  loss {sum(recent) / len(recent):.4f}  lb {aux['lb'].item():.3f}  "
                f"z {aux['z'].item():.2f}  lr {lr_at(step):.2e}  {time.monotonic() - t0:7.1f} s")
        if args.eval_every and (step + 1) % args.eval_every == 0 and step + 1 < args.steps:
            ce_h, _, _ = score(model, held_ids, seq)
            evals.append((step + 1, ce_h))
            log(f"           held-out {ce_h:.4f} nats/token (ppl {math.exp(ce_h):.3f})")
    train_seconds = time.monotonic() - t0
    final_train_loss = sum(hist[-50:]) / len(hist[-50:])
    model.eval()

    # -- evaluation
    ce_all, n_all, _ = score(model, held_ids, seq)
    ce_slice, n_slice, counts = score(model, slice_ids, seq)
    rng = np.random.default_rng(args.seed)
    tr_windows = np.concatenate([train_ids[s:s + seq] for s in rng.integers(0, max_start, 64)])
    ce_train, _, _ = score(model, tr_windows, seq)
    shares = counts / counts.sum(axis=1, keepdims=True)
    log(f"done in {train_seconds:.0f} s: train loss (last 50 steps) {final_train_loss:.4f}; "
        f"eval-mode train {ce_train:.4f}; held-out {ce_all:.4f} (ppl {math.exp(ce_all):.3f}); "
        f"bundled slice {ce_slice:.4f} (ppl {math.exp(ce_slice):.3f})")
    log("expert shares per layer (% of top-k assignments):")
    for li in range(cfg["n_layers"]):
        log(f"  layer {li}: " + " ".join(f"{100 * s:5.1f}" for s in shares[li]))

    # -- export
    atomic_write(out / "config.json", (json.dumps(cfg, indent=2) + "\n").encode())
    tensors = model.state_to_numpy()
    meta = {"format": "moerun/1", "name": "pebble", "torch_version": torch.__version__}
    try:
        from moerun.modelfile import save_model_file
        save_model_file(out / "model.safetensors", tensors, metadata=meta)
        writer = "moerun.modelfile.save_model_file"
    except ImportError:
        from safetensors.numpy import save_file
        tmp = out / ".model.safetensors.tmp"
        save_file(tensors, str(tmp), metadata=meta)
        os.replace(tmp, out / "model.safetensors")
        writer = "safetensors.numpy.save_file (moerun.modelfile not available)"
    os.chmod(out / "model.safetensors", 0o644)
    log(f"model.safetensors written with {writer}")
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

    # samples (torch decode path)
    sgen = torch.Generator().manual_seed(args.seed)
    samples = []
    for prompt, temp in ((DOC + "== log", 0.0), (DOC + "Field notes —", 0.8), (DOC + "[radio", 0.8),
                         (DOC + "TICKET", 0.8), (DOC + "## Weekly yield", 0.0), (DOC, 0.8)):
        text = sample(fresh, tok, prompt, 160, temp, sgen)
        samples.append((prompt, temp, text))
        log(f"--- sample {prompt!r} (temperature {temp}) ---\n{text}")

    write_card(out, cfg, corpus, args, n_params, train_seconds, final_train_loss, ce_train, ce_all, n_all,
               ce_slice, n_slice, shares, samples, evals, len(train_ids), len(held_ids), writer, tok)
    log(f"exported to {out} ({sum(p.stat().st_size for p in out.iterdir()) / 2**20:.1f} MiB) "
        f"in {time.monotonic() - t_start:.0f} s total")


def write_card(out: Path, cfg: dict, corpus: Path, args, n_params: int, train_seconds: float,
               final_train_loss: float, ce_train: float, ce_all: float, n_all: int, ce_slice: float,
               n_slice: int, shares: np.ndarray, samples, evals, n_train_tok: int, n_held_tok: int,
               writer: str, tok: Tokenizer) -> None:
    stats = json.loads((corpus / "stats.json").read_text(encoding="utf-8"))
    today = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d")
    model_mib = (out / "model.safetensors").stat().st_size / 2**20
    slice_kb = (out / "heldout.txt").stat().st_size / 1000
    reg_desc = {
        "log": "terse station telemetry, one reading per line (`05:45 fog=dense vis=40m ... cist=64.1% cond=38µS/cm`), with WARN/ERR/INFO/ACK events",
        "table": "fixed-width numeric tables: weekly yields per ridge, 14-day station ledgers, cart-run schedules",
        "notes": "first-person prose field notes by a station keeper (weather, work done, visitors, birds, reflections)",
        "radio": "two-party radio dialogue between valley dispatch and a station keeper (levels, carts, parts, faults)",
        "ticket": "maintenance tickets in `key: value` form, several per document separated by `----`",
    }
    total_bytes = stats["train_bytes"] + stats["heldout_bytes"]
    reg_rows = "\n".join(
        f"| {name} | {r['docs']:,} | {r['bytes'] / 1e6:.2f} MB | {100 * r['bytes'] / total_bytes:.0f} % | {reg_desc[name]} |"
        for name, r in stats["registers"].items())
    head = "| layer | " + " | ".join(f"e{e}" for e in range(cfg["n_experts"])) + " | min | max |"
    rule = "|---" * (cfg["n_experts"] + 3) + "|"
    share_rows = "\n".join(
        f"| {li} | " + " | ".join(f"{100 * s:.1f}" for s in shares[li]) + f" | {100 * shares[li].min():.1f} | {100 * shares[li].max():.1f} |"
        for li in range(cfg["n_layers"]))
    eval_rows = ", ".join(f"step {s}: {v:.3f}" for s, v in evals)
    sample_blocks = "\n\n".join(
        f"Prompt `{p.replace(DOC, '<doc>')}`, {'greedy' if t <= 0 else f'temperature {t}'}:\n\n```text\n{s.strip()[:600]}\n```"
        for p, t, s in samples[:3])
    card = f"""# pebble — the bundled tiny model

A 4-layer sparse mixture-of-experts model (8 experts, top-2) following DESIGN
section 3, trained on CPU on an invented corpus. It exists to exercise moerun
(offloading, routing traces, policies), not to be useful for anything else.

**Everything this model generates is invented text about an invented place. It is
not advice of any kind, and its numbers describe nothing real.**

Built on {today} (UTC) by `scripts/train_tiny.py`; every figure below was written
by that script from the same run.

## How it was built

```sh
python scripts/make_corpus.py --seed {stats['seed']} --out data/corpus
OMP_WAIT_POLICY=PASSIVE python scripts/train_tiny.py --corpus data/corpus --out tiny_models/pebble --seed {args.seed} --steps {args.steps}
```

PyTorch {torch.__version__} (CPU), {args.threads} threads, seed {args.seed}.
`model.safetensors` written with {writer}.

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

Byte-level BPE (`tokenizers` library, ByteLevel pre-tokenizer and decoder, no
prefix space), vocabulary {tok.get_vocab_size()}, trained on train.txt; {n_train_tok:,}
training tokens ({stats['train_bytes'] / n_train_tok:.2f} bytes/token), {n_held_tok:,} held-out tokens. Decoding
round-trips any UTF-8 text.

## Model

| field | value |
|---|---|
| layers | {cfg['n_layers']} |
| d_model | {cfg['d_model']} |
| heads / KV heads / head_dim | {cfg['n_heads']} / {cfg['n_kv_heads']} / {cfg['head_dim']} |
| experts / top_k / d_expert | {cfg['n_experts']} / {cfg['top_k']} / {cfg['d_expert']} |
| context | {cfg['max_seq_len']} tokens |
| rope_theta, norm_eps | {cfg['rope_theta']}, {cfg['norm_eps']} |
| embeddings | tied |
| parameters | {n_params:,} ({model_mib:.1f} MiB in F32) |

## Training

AdamW (lr peak {args.lr}, betas 0.9/0.95, weight decay {args.weight_decay} on matrices),
{args.warmup}-step linear warm-up then cosine decay to 10 % of peak, batch
{args.batch} x {cfg['max_seq_len']} tokens (random windows of the tokenized train stream),
gradient clipping 1.0, load-balancing loss x {args.lb_coef}, router z-loss x {args.z_coef},
{args.steps} steps in **{train_seconds / 60:.1f} min** ({train_seconds:.0f} s) on {args.threads} CPU threads.

## Results

| measure | value |
|---|---|
| train loss, mean of the last 50 steps | {final_train_loss:.3f} nats/token |
| train loss, 64 random train windows, eval mode | {ce_train:.3f} nats/token |
| held-out cross-entropy, corpus heldout.txt ({n_all:,} predicted tokens) | {ce_all:.3f} nats/token (perplexity {math.exp(ce_all):.2f}) |
| held-out cross-entropy, bundled heldout.txt ({slice_kb:.0f} KB, {n_slice:,} predicted tokens) | **{ce_slice:.3f} nats/token (perplexity {math.exp(ce_slice):.2f})** |

Held-out loss during training: {eval_rows or 'not measured'}.

Scoring rule: `ids = encode(heldout.txt)`; windows `ids[i:i+256]` for
i = 0, 256, 512, ... (the last window may be shorter); in each window every
position after the first is predicted from the earlier tokens of the same
window; cross-entropy is the mean over all predicted positions (natural log),
perplexity is its exp.

### Expert use

Share of top-2 assignments per expert and layer over the bundled heldout.txt, in %
(each token counts once for each of its two experts; each row sums to 100 %,
uniform use would be 12.5 %):

{head}
{rule}
{share_rows}

## Files

| file | content |
|---|---|
| config.json | model configuration (format `moerun/1`) |
| model.safetensors | F32 weights, DESIGN section 3 names |
| tokenizer.json | the byte-level BPE tokenizer |
| heldout.txt | {slice_kb:.0f} KB of whole held-out documents (never trained on) for scoring |
| reference.npz | `token_ids` int64 [3, 64] (three held-out windows, each starting at a document start, token 0), `logits` float32 [3, 64, {cfg['vocab_size']}] from the PyTorch reference in float32 (`moerun/torch_ref.py`), `torch_version` |
| CARD.md | this card |

## Samples

Produced by the PyTorch reference's KV-cache decode path from this run. They are
invented text, shown only to illustrate the registers; they are not advice.

{sample_blocks}
"""
    atomic_write(out / "CARD.md", card.encode("utf-8"))


if __name__ == "__main__":
    main()
