#!/usr/bin/env python3
"""Quantization benchmark: size, held-out perplexity and decode speed of every setting, in one run.

For expert bits {8, 4, 3, 2} x attention {16 (float16), 8, 4} x method {rtn, hqq}
(group 64) the source model is quantized into a temporary directory, then:

* file size and bytes per expert;
* held-out perplexity with ``moerun score``'s rule (moerun.checks.score.score_text on
  the model's heldout.txt, all of it unless --score-tokens);
* decode tok/s, greedy, same prompt, at a fixed memory cap: the model's own
  fixed parts (dense weights + KV cache + scratch, codec scratch included)
  plus one third of the float32 model's expert bytes: 1 / the median process
  CPU time per decode step, best of --reps runs interleaved across settings;
  and the same over an emulated slower link (wall time, since its waits sleep);
* the dequantization cost per expert for each bit width, against the float32
  expert's one-token matmul and its page-in from the page cache.

BLAS is pinned to one thread: the script imports ``_bench`` (the benchmarks' shared helpers)
before numpy and moerun, and ``_bench`` sets the thread variables.

    python scripts/bench_quant.py [--model DIR] [--json] [--write-docs]

--write-docs replaces the table in docs/research/quant.md (between the bench markers). The
benchmark writes nothing into the package: the table that `moerun quantize` quotes in its cards is
built from this script's --json output by scripts/make_quant_table.py.
"""

from __future__ import annotations

import argparse
import datetime
import json
import os
import platform
import sys
import tempfile
import time
from pathlib import Path

import _bench  # first: one BLAS thread before numpy is imported; the shared helpers
import numpy as np

import moerun
from moerun.checks.score import score_text
from moerun.cli.report import table
from moerun.files.codec import QuantCodec
from moerun.files.packed import QuantSpec
from moerun.makers.quantize import quantize_model
from moerun.model.sampling import Sampling
from moerun.model.tokenizer import read_text_file
from moerun.model.transformer import expert
from moerun.runtime.budget import fixed_bytes, slot_bytes
from moerun.runtime.engine import default_model_dir
from moerun.units import fmt_bytes, parse_rate

ROOT = Path(__file__).resolve().parent.parent
START, END = "<!-- bench_quant:start -->", "<!-- bench_quant:end -->"


def machine() -> str:
    cpu = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    core = os.environ.get("OPENBLAS_CORETYPE")
    return (f"{cpu or platform.machine()}, {os.cpu_count()} vCPU, Python {platform.python_version()}, numpy {np.__version__}"
            + (f", OPENBLAS_CORETYPE={core}" if core else ""))


def decode_once(model_dir: Path, cap: int, prompt_ids: list[int], max_new: int, link=None) -> dict:
    """One greedy decode at the cap; speed = 1 / median time per decode step.

    A step is the time between two generated tokens (forward pass, logits,
    sampling, page-ins). Without a link the clock is the process's CPU time
    (the engine runs on one thread here: one BLAS thread, no prefetch), so
    other processes on a shared machine do not count; with the emulated link,
    whose waits are sleeps, it is wall time. The median over a run's steps
    ignores short bursts of other work.
    """
    clock = time.perf_counter_ns if link else time.process_time_ns
    stamps: list[int] = []
    with moerun.load(model_dir, mem_cap=cap, tokenizer=False, link_speed=link) as eng:
        gen = eng.generate(prompt_ids=prompt_ids, max_new=max_new, sampling=Sampling(temperature=0.0),
                           on_token=lambda _t: stamps.append(clock()))
        steps = np.diff(np.array(stamps, np.int64))
        pool = eng.stats.get("pool", {})
        return {"tok_s": 1e9 / float(np.median(steps)), "mean_tok_s": gen.decode_tok_s, "slots": sum(eng.budget.slots),
                "hit_rate": pool.get("hit_rate"), "tokens": gen.new_ids}


def decode_rounds(entries: list[tuple[dict, Path]], prompt_ids, max_new: int, reps: int, link) -> None:
    """Decode every setting once per round, ``reps`` rounds, keeping each setting's best run.

    Interleaving spreads each setting's runs over the whole measurement, so
    other work on a shared machine slows all settings alike instead of a few.
    The emulated-link runs (two rounds) follow the same pattern.
    """
    for r in range(reps):
        _bench.log(f"decode round {r + 1}/{reps} ...")
        for row, d in entries:
            got = decode_once(d, row["cap_bytes"], prompt_ids, max_new)
            if got["tok_s"] > row.get("decode_tok_s", 0.0):
                row["decode_tok_s"] = got["tok_s"]
                row["decode_tok_s_mean"] = got["mean_tok_s"]
            row["slots"], row["hit_rate"], row["tokens"] = got["slots"], got["hit_rate"], got["tokens"]
    if link:
        for r in range(2):
            _bench.log(f"decode round {r + 1}/2 over the emulated link ...")
            for row, d in entries:
                got = decode_once(d, row["cap_bytes"], prompt_ids, max_new, link)
                row["decode_tok_s_link"] = max(row.get("decode_tok_s_link", 0.0), got["tok_s"])


def measure(model_dir: Path, fp32_expert_total: int, text: str, score_tokens) -> dict:
    """Sizes, the cap for this model, and held-out perplexity."""
    with moerun.load(model_dir) as eng:
        s = eng.store
        d, kv, sc = fixed_bytes(s.config, s.dense_nbytes, s.codec.scratch_bytes())
        t0 = time.monotonic()
        r = score_text(eng, text, score_tokens)
        return {
            "file_bytes": s.header.file_size,
            "expert_bytes": s.expert_nbytes,
            "slot_bytes": slot_bytes(s.expert_nbytes),
            "perplexity": r.perplexity,
            "cross_entropy_nats": r.cross_entropy,
            "scored_tokens": r.predicted,
            "score_tok_s": r.tok_s,
            "score_seconds": time.monotonic() - t0,
            "cap_bytes": d + kv + sc + fp32_expert_total // 3,
        }


class Ring:
    def __init__(self, items):
        self.items = list(items)
        self.i = 0

    def next(self):
        self.i = (self.i + 1) % len(self.items)
        return self.items[self.i]


def _pagein_ns(store) -> float:
    """Median warm page-in of one expert, cycling through every expert of the file (page cache, not CPU cache)."""
    c = store.config
    keys = Ring([(layer, e) for layer in range(c.n_layers) for e in range(c.n_experts)])
    buf = np.empty(slot_bytes(store.expert_nbytes), np.uint8)
    for layer, e in keys.items:  # warm the page cache
        store.page_in(layer, e, buf)
    return _bench.per_call_ns(lambda: store.page_in(*keys.next(), buf), reps=64)


def dequant_costs(src: Path, quantized: dict[int, Path]) -> dict:
    """ns per expert: decode (dequantize) for each bit width, fp32 one-token matmul, fp32 page-in (warm)."""
    out: dict = {}
    with moerun.load(src, tokenizer=False) as eng:
        s = eng.store
        rng = np.random.default_rng(0)
        u = rng.standard_normal((1, s.config.d_model)).astype(np.float32)
        w = [x.copy() for x in s.codec.weights(eng.pool.slots[0].bound)]
        out["fp32_matmul_ns"] = _bench.per_call_ns(lambda: expert(u, *w))
        out["fp32_pagein_ns"] = _pagein_ns(s)
        out["fp32_expert_bytes"] = s.expert_nbytes
    out["bits"] = {}
    for bits, d in sorted(quantized.items(), reverse=True):
        with moerun.load(d, tokenizer=False) as eng:
            codec: QuantCodec = eng.store.codec
            ring = Ring([slot.bound for slot in eng.pool.slots])  # every resident expert in turn, as decode meets them
            dq = _bench.per_call_ns(lambda codec=codec, ring=ring: codec.weights(ring.next()))
            both = _bench.per_call_ns(lambda codec=codec, ring=ring: expert(u, *codec.weights(ring.next())))
            pin = _pagein_ns(eng.store)
            out["bits"][bits] = {"dequant_ns": dq, "dequant_matmul_ns": both, "pagein_ns": pin,
                                 "expert_bytes": eng.store.expert_nbytes, "scratch_bytes": codec.scratch_bytes()}
    return out


def render(doc: dict) -> tuple[str, str]:
    rows = []
    base = doc["fp32"]
    link = doc.get("link_speed_emulated")

    def speeds(r):
        out = [f"{r['decode_tok_s']:.0f}"]
        if link:
            out.append(f"{r['decode_tok_s_link']:.0f}")
        return out

    rows.append(["fp32 (source)", "-", "-", f"{base['file_bytes'] / 2**20:.2f}", f"{base['expert_bytes']:,}",
                 f"{base['perplexity']:.4f}", "-", f"{base['slots']}/{doc['n_experts_total']}", *speeds(base)])
    for r in doc["rows"]:
        attn = "f16" if r["attn_bits"] == 16 else f"{r['attn_bits']}-bit"
        rows.append([f"{r['expert_bits']}-bit", attn, r["method"], f"{r['file_bytes'] / 2**20:.2f}", f"{r['expert_bytes']:,}",
                     f"{r['perplexity']:.4f}", f"{100 * (r['perplexity'] / base['perplexity'] - 1):+.2f}%",
                     f"{r['slots']}/{doc['n_experts_total']}", *speeds(r)])
    heads = ["experts", "attention", "method", "file MiB", "B/expert", "held-out ppl", "vs fp32", "resident", "decode tok/s"]
    if link:
        heads.append(f"tok/s, {link / 1e9:g} GB/s link (emulated)")
    t1 = table(heads, rows, "lll" + "r" * (len(heads) - 3))
    dq = doc["dequant"]
    rows2 = [["fp32 (no decode)", f"{dq['fp32_expert_bytes']:,}", "-", f"{dq['fp32_matmul_ns'] / 1e3:.1f}",
              f"{dq['fp32_pagein_ns'] / 1e3:.1f}", "-"]]
    for bits, v in dq["bits"].items():
        rows2.append([f"{bits}-bit", f"{v['expert_bytes']:,}", f"{v['dequant_ns'] / 1e3:.1f}", f"{v['dequant_matmul_ns'] / 1e3:.1f}",
                      f"{v['pagein_ns'] / 1e3:.1f}", f"{v['dequant_ns'] / dq['fp32_matmul_ns']:.1f}x"])
    t2 = table(["experts", "B/expert", "dequant us", "(dequant +) 1-token expert us", "page-in us (warm)", "dequant / fp32 matmul"],
               rows2, "lrrrrr")
    return t1, t2


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model", help="source model directory (default: the bundled model)")
    ap.add_argument("--bits", default="8,4,3,2")
    ap.add_argument("--attn", default="16,8,4")
    ap.add_argument("--methods", default="rtn,hqq")
    ap.add_argument("--group", type=int, default=64)
    ap.add_argument("--score-tokens", type=int, help="score only the first N held-out tokens (default: all)")
    ap.add_argument("--max-new", type=int, default=128, help="decode steps per run (default 128)")
    ap.add_argument("--reps", type=int, default=5, help="decode runs per setting; the best counts (default 5)")
    ap.add_argument("--link-speed", default="1GB/s",
                    help="also decode with page-in over an emulated link of this rate, best of 2 runs (default 1GB/s; 0 = skip)")
    ap.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    ap.add_argument("--write-docs", action="store_true", help="update the table in docs/research/quant.md")
    args = ap.parse_args()
    src = Path(args.model) if args.model else default_model_dir()
    text = read_text_file(src / "heldout.txt")
    t_start = time.monotonic()
    with moerun.load(src) as eng:
        s = eng.store
        fp32_total = s.expert_total_nbytes
        n_total = s.config.n_layers * s.config.n_experts
        name = s.config.name or src.name
        ids = eng.tokenizer.encode(text, bos=False)
        prompt_ids = ids[:48]  # the start of the first held-out document (it begins with <doc>)
    _bench.log(f"fp32 {name}: scoring ...")
    doc: dict = {
        "model": name,
        "date": datetime.datetime.now().astimezone().strftime("%Y-%m-%d %H:%M %Z"),
        "machine": machine(),
        "blas_threads": _bench.BLAS_THREADS,
        "group": args.group,
        "n_experts_total": n_total,
        "cap_rule": "model's dense + KV cache + scratch (codec scratch included) + one third of the fp32 model's expert bytes",
        "decode": {"prompt_tokens": len(prompt_ids), "max_new": args.max_new, "sampling": "greedy", "reps": args.reps},
        "score_rule": "moerun score: windows of bos + the next max_seq_len-1 tokens, every token predicted once",
    }
    link = parse_rate(args.link_speed) if args.link_speed not in (None, "", "0") else None
    doc["link_speed_emulated"] = link
    doc["fp32"] = measure(src, fp32_total, text, args.score_tokens)
    doc["fp32"]["fp32_expert_total_bytes"] = fp32_total
    rows = []
    deq_dirs: dict[int, Path] = {}
    with tempfile.TemporaryDirectory(prefix="moerun-bench-quant-") as tmp:
        entries: list[tuple[dict, Path]] = [(doc["fp32"], src)]
        for bits in [int(b) for b in args.bits.split(",")]:
            for attn in [int(a) for a in args.attn.split(",")]:
                for method in args.methods.split(","):
                    spec = QuantSpec.checked(bits, attn, args.group, method)
                    out = Path(tmp) / f"e{bits}a{attn}{method}"
                    t0 = time.monotonic()
                    quantize_model(src, out, spec, score=False)
                    qs = time.monotonic() - t0
                    row = {"model": name, "expert_bits": bits, "attn_bits": attn, "method": method, "group": args.group,
                           "quantize_seconds": qs}
                    row.update(measure(out, fp32_total, text, args.score_tokens))
                    rows.append(row)
                    entries.append((row, out))
                    _bench.log(f"{bits}-bit experts, attention {attn}, {method}: ppl {row['perplexity']:.4f}, quantized in {qs:.1f} s")
                    if attn == 16 and method == "rtn":
                        deq_dirs[bits] = out
        decode_rounds(entries, prompt_ids, args.max_new, args.reps, link)
        for row in rows:
            row["same_tokens_as_fp32"] = row.pop("tokens") == doc["fp32"]["tokens"]
        _bench.log("dequantization cost ...")
        doc["dequant"] = dequant_costs(src, deq_dirs)
    doc["fp32"]["same_tokens_as_fp32"] = True
    doc["fp32"].pop("tokens", None)
    doc["rows"] = rows
    doc["seconds"] = time.monotonic() - t_start
    t1, t2 = render(doc)
    if args.write_docs:
        write_docs(doc, t1, t2)
    if args.json:
        sys.stdout.write(json.dumps(doc, indent=2) + "\n")
    else:
        sys.stdout.write(t1 + "\n\n" + t2 + "\n")
        sys.stdout.write(f"\n{doc['date']}, {doc['machine']}; BLAS {_bench.BLAS_NOTE}; {doc['seconds']:.0f} s\n")
    return 0


def write_docs(doc: dict, t1: str, t2: str) -> None:
    from moerun.files.fileio import write_text_atomic

    path = ROOT / "docs" / "research" / "quant.md"
    md = path.read_text(encoding="utf-8")
    if START not in md or END not in md:
        raise SystemExit(f"{path}: bench markers missing")
    base = doc["fp32"]
    block = "\n".join([
        START,
        f"Measured by `python scripts/bench_quant.py --write-docs` on {doc['date']}, {doc['machine']}; "
        f"BLAS {doc['blas_threads']}; whole run {doc['seconds']:.0f} s. Source model: {doc['model']}. Group {doc['group']}.",
        "",
        f"Held-out perplexity: all of heldout.txt ({base['scored_tokens']:,} predicted tokens), `moerun score` rule. "
        f"Decode: greedy, {doc['decode']['prompt_tokens']}-token prompt, {doc['decode']['max_new']} new tokens; "
        f"tok/s = 1 / median time per decode step (forward, logits, sampling, page-ins; process CPU time, so other "
        "processes on the shared machine do not count; wall time for the emulated link, whose waits are sleeps), best of "
        f"{doc['decode']['reps']} runs interleaved across settings (emulated link: 2 rounds), at a cap of the model's fixed parts plus one third of the fp32 expert bytes "
        f"({fmt_bytes(base['fp32_expert_total_bytes'] // 3)} of pool; fp32 cap {fmt_bytes(base['cap_bytes'])}). "
        "\"resident\" is how many experts that pool holds.",
        "",
        "```",
        t1,
        "```",
        "",
        "Dequantization cost per expert (process CPU time, best of 9 rounds of 400 calls cycling through every resident "
        "expert; page-in: 64 calls cycling through every expert of the file, page cache warm; rtn, group 64, float16 "
        "attention models):",
        "",
        "```",
        t2,
        "```",
        "",
        "Greedy tokens identical to fp32's for: "
        + ", ".join(f"{r['expert_bits']}-bit/{r['attn_bits']}/{r['method']}" for r in doc["rows"] if r["same_tokens_as_fp32"])
        + ".",
        END,
    ])
    head, rest = md.split(START, 1)
    _, tail = rest.split(END, 1)
    write_text_atomic(path, head + block + tail)


if __name__ == "__main__":
    raise SystemExit(main())
