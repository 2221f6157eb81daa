"""Open checkpoints at a realistic shape: resident decode against the reference library, capped cold decode against
the storage bound, and policies with prefetch at that cap (issue 22's benchmark).

    python scripts/bench_open.py [--dir DIR] [--layers 2] [--tokens 24] [--rounds 3] [--busy 1] [--json FILE]

The checkpoint is written by ``moerun synth --open-type qwen3_moe`` (reused when DIR already holds it): BF16,
layers shaped like the 30B-total / 3B-active class (hidden 2048, 128 experts of width 768, top-8, 32 query heads
and 4 KV heads of width 128, per-head q/k norms, vocabulary 151,936), as many layers as ``--layers`` (2 give
3.7 GB on disk).  **Random weights**: its routing follows no content, so hit rates and guess precision here say
nothing about a trained model's; they are printed beside pebble's (trained) for that reason.

Every configuration runs in a process of its own (so one's memory never counts against another's), the
configurations interleaved over ``--rounds`` rounds; medians and spread are printed.  Each process decodes
``--tokens`` tokens after the same prompt, feeding the same tokens (teacher-forced: the bench compares speed,
not text).  BLAS and torch run on one thread.

1. Resident decode: moerun (every expert resident, BF16 in the pool, widened per use) against the transformers
   library's eager float32 decode of the same checkpoint, same tokens; the two logits are compared.  Weight bytes
   read per token (dense float32, experts as stored) against this machine's memcpy bandwidth.
2. Capped cold decode: a cap holding 25% of the experts, every expert read from the device (its pages dropped
   after each read): tok/s, hit rate, bytes missed per token, against the probe's cold bandwidth for one expert
   (``moerun.probe(sizes=..., work_dir=DIR)``): the storage bound is that bandwidth over the bytes missed.
3. Policies and prefetch at that cap: lru, markov (per-layer quotas) and orbit (shared pool), prefetch off, 1 and
   2 guesses per layer, warm (page cache) and cold; and once more with ``--busy`` CPU-bound processes beside.
4. Next-layer guess precision (guesses = top-k) on a trace of this checkpoint, beside pebble's.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import _bench  # first: one BLAS thread before numpy is imported; the shared helpers

SHAPE = dict(model_type="qwen3_moe", hidden=2048, experts=128, expert_width=768, top_k=8, heads=32, kv_heads=4,
             head_dim=128, vocab=151936, context=4096)
PROMPT = [0] + list(range(300, 332))


def forced_tokens(n: int) -> list[int]:
    return [(1009 * i + 77) % 150000 + 2 for i in range(n)]


# ------------------------------------------------------------------------------------------ child processes


def child_moerun(d: str, tokens: int, settings: dict) -> dict:
    import numpy as np

    import moerun

    eng = moerun.load(d, **settings)
    with eng:
        m = eng.model
        eng.experts.begin_step(-1)
        m.forward(np.array(PROMPT), 0, eng.cache, eng.experts)
        pos = len(PROMPT)
        times, last = [], None
        observer = eng._observer()
        for i, tok in enumerate(forced_tokens(tokens)):
            t0 = time.perf_counter()
            eng.experts.begin_step(i)
            x = m.forward(np.array([tok]), pos, eng.cache, eng.experts, None, observer)
            last = m.logits(x)[0]
            times.append(time.perf_counter() - t0)
            pos += 1
        st = eng.stats
        pool = st.get("pool") or {}
        ps = eng.pool.stats if eng.pool is not None else None
        return {
            "step_s": times,
            "last_logits": last[:64].tolist(),
            "hit_rate": pool.get("hit_rate"),
            "misses": sum(ps.misses) if ps else 0,
            "expert_bytes": eng.store.expert_nbytes,
            "slot_bytes": eng.store.slot_nbytes,
            "expert_storage": eng.store.codec.name,
            "dense_bytes": eng.store.dense_nbytes,
            "slots": list(eng.budget.slots),
            "prefetch_loads": ps.prefetch_loads if ps else 0,
            "prefetch_used": ps.prefetch_used if ps else 0,
        }


BREAKDOWN = {  # function (file suffix, name) -> the share it is reported under
    ("transformer.py", "logits"): "output matrix (lm_head)",
    ("transformer.py", "attention"): "attention",
    ("transformer.py", "expert"): "expert products",
    ("checkpoint.py", "widen_into"): "widening stored experts",
    ("~", "<built-in method posix.preadv>"): "reads (preadv)",
    ("~", "<built-in method posix.posix_fadvise>"): "page drops (cold)",
}


def child_breakdown(d: str, tokens: int, settings: dict) -> dict:
    """Where a decode step's time goes (cProfile's own time of the functions in BREAKDOWN; the rest is other)."""
    import cProfile
    import pstats

    import numpy as np

    import moerun

    with moerun.load(d, **settings) as eng:
        m = eng.model
        eng.experts.begin_step(-1)
        m.forward(np.array(PROMPT), 0, eng.cache, eng.experts)
        prof = cProfile.Profile()
        t0 = time.perf_counter()
        prof.enable()
        for i, tok in enumerate(forced_tokens(tokens)):
            eng.experts.begin_step(i)
            m.logits(m.forward(np.array([tok]), len(PROMPT) + i, eng.cache, eng.experts))
        prof.disable()
        wall = time.perf_counter() - t0
    out: dict = {}
    for (file, _line, name), (_cc, _nc, tt, _ct, _callers) in pstats.Stats(prof).stats.items():
        key = next((v for (f, n), v in BREAKDOWN.items() if n == name and (f == "~" or file.endswith(f))), None)
        if key is not None:
            out[key] = out.get(key, 0.0) + tt
    out["other"] = max(0.0, wall - sum(out.values()))
    return {"step_ms": {k: 1e3 * v / tokens for k, v in out.items()}, "total_ms": 1e3 * wall / tokens}


def child_reference(d: str, tokens: int) -> dict:
    import torch
    import transformers

    torch.set_num_threads(1)
    model = transformers.AutoModelForCausalLM.from_pretrained(
        d, dtype=torch.float32, attn_implementation="eager", experts_implementation="eager")
    model.eval()
    times, last = [], None
    with torch.no_grad():
        out = model(torch.tensor([PROMPT]), use_cache=True)
        pkv = out.past_key_values
        for tok in forced_tokens(tokens):
            t0 = time.perf_counter()
            out = model(torch.tensor([[tok]]), past_key_values=pkv, use_cache=True)
            pkv = out.past_key_values
            last = out.logits[0, -1]
            times.append(time.perf_counter() - t0)
    return {"step_s": times, "last_logits": last[:64].tolist()}


def run_child(kind: str, d: str, tokens: int, settings: dict | None = None) -> dict:
    cmd = [sys.executable, __file__, "--child", kind, "--dir", d, "--tokens", str(tokens), "--settings", json.dumps(settings or {})]
    env = dict(os.environ, OMP_WAIT_POLICY="PASSIVE")
    out = subprocess.run(cmd, capture_output=True, text=True, env=env)
    if out.returncode != 0:
        raise SystemExit(f"bench_open: the {kind} run failed:\n{out.stderr[-2000:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


# ------------------------------------------------------------------------------------------ the parent


def tok_s(run: dict) -> float:
    return 1.0 / statistics.median(run["step_s"])


def summary(runs: list[dict]) -> dict:
    v = [tok_s(r) for r in runs]
    return {"median_tok_s": statistics.median(v), "best": max(v), "worst": min(v),
            "spread": (max(v) - min(v)) / max(v) if max(v) else 0.0, "runs": v}


def ensure_checkpoint(d: Path, layers: int) -> None:
    from moerun.files.ckpt_config import is_open_checkpoint
    from moerun.makers.synth_open import OpenShape, synthesize_open

    if d.is_dir() and is_open_checkpoint(d):
        cfg = json.loads((d / "config.json").read_text())
        if cfg.get("num_hidden_layers") == layers and cfg.get("hidden_size") == SHAPE["hidden"]:
            _bench.log(f"reusing {d}")
            return
    s = dict(SHAPE)
    mt = s.pop("model_type")
    shape = OpenShape(mt, layers=layers, experts=s["experts"], hidden=s["hidden"], expert_width=s["expert_width"],
                      top_k=s["top_k"], heads=s["heads"], kv_heads=s["kv_heads"], head_dim=s["head_dim"], vocab=s["vocab"],
                      context=s["context"])
    _bench.log(f"writing a {layers}-layer {mt} checkpoint of random BF16 weights to {d} ...")
    t0 = time.monotonic()
    doc = synthesize_open(d, shape, seed=0, shard_bytes=1 << 30, force=d.exists())
    _bench.log(f"  {doc['file_bytes'] / 1e9:.2f} GB in {len(doc['files'])} files, {time.monotonic() - t0:.0f} s")


def cap_for_quarter(d: str) -> tuple[int, int, dict]:
    from moerun.files.ckpt_store import open_store
    from moerun.runtime.budget import fixed_bytes, slot_bytes

    store = open_store(d)
    try:
        c = store.config
        dense, kv, scratch = fixed_bytes(c, store.dense_nbytes, store.codec.scratch_bytes())
        per = slot_bytes(store.expert_nbytes)
        quarter = c.n_layers * c.n_experts // 4
        info = {"layers": c.n_layers, "experts": c.n_experts, "top_k": c.top_k, "expert_bytes": store.expert_nbytes,
                "dense_f32_bytes": dense, "kv_bytes": kv, "scratch_bytes": scratch}
        return dense + kv + scratch + quarter * per, store.expert_nbytes, info
    finally:
        store.close()


def guess_precision(model, text: str, max_tokens: int) -> float | None:
    """Next-layer recall of top-k guesses (= precision, as many guesses as chosen experts) on a recorded trace."""
    import moerun
    from moerun.sim.prefetch import prefetch_recall

    with moerun.load(model) as eng:
        k = eng.config.top_k
        eng.start_trace(lookahead=1, n_guesses=k)
        ids = eng.tokenizer.encode(text)[: min(max_tokens, eng.config.max_seq_len)]
        eng.logits(ids)
        trace = eng.finish_trace()
    rows = [r for r in prefetch_recall(trace, max_guesses=k, max_lookahead=1) if r["guesses"] == k]
    return rows[0]["recall"] if rows else None


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--dir", default=os.path.join(tempfile.gettempdir(), "moerun-bench-open"), help="checkpoint directory (made if absent)")
    ap.add_argument("--layers", type=int, default=2)
    ap.add_argument("--tokens", type=int, default=24, help="decode steps per run")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--busy", type=int, default=1, help="CPU-bound processes beside the busy rows (0: none)")
    ap.add_argument("--no-reference", action="store_true", help="skip the transformers runs")
    ap.add_argument("--json", metavar="FILE", help="also write the results there")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--settings", default="{}", help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.child:
        settings = json.loads(a.settings)
        if a.child == "breakdown":
            doc = child_breakdown(a.dir, a.tokens, settings)
        else:
            doc = child_reference(a.dir, a.tokens) if a.child == "reference" else child_moerun(a.dir, a.tokens, settings)
        print(json.dumps(doc))
        return 0

    d = Path(a.dir)
    ensure_checkpoint(d, a.layers)
    import moerun

    cap, expert_bytes, info = cap_for_quarter(str(d))
    _bench.log(f"cap for 25% of the experts: {cap / 2**20:.0f} MiB; probing the device's cold reads of {expert_bytes:,} B ...")
    probe = moerun.probe(sizes=[expert_bytes], work_dir=str(d.parent), runs=12).to_json()
    cold_block = next(b for b in probe["blocks"] if b["source"] == "tempfile")
    cold = cold_block.get("cold") or {}
    cold_bw = expert_bytes / cold["p50_s"] if cold.get("verified") and cold.get("p50_s") else None
    memcpy = _bench.memcpy_bandwidth(256 << 20)

    configs: dict[str, tuple[str, dict]] = {"moerun resident": ("moerun", {})}
    if not a.no_reference:
        configs["transformers eager f32"] = ("reference", {})
    configs["capped cold, lru"] = ("moerun", {"mem_cap": cap, "cold_reads": True})
    # the same cap with float32 slots: half as many experts held, none widened at each use
    configs["capped cold, lru, float32 slots"] = ("moerun", {"mem_cap": cap, "cold_reads": True, "expert_slots": "float32"})
    for policy, split in (("lru", "even"), ("markov", "even"), ("orbit", "shared")):
        for pf in (0, 1, 2):
            for cold in (False, True):
                name = f"{policy}{' shared' if split == 'shared' else ''}, prefetch {pf}, {'cold' if cold else 'warm'}"
                configs[name] = ("moerun", {"mem_cap": cap, "evict": policy, "split": split, "prefetch": pf, "cold_reads": cold})
    busy_configs = {f"busy {a.busy}: lru, prefetch {pf}, cold": ("moerun", {"mem_cap": cap, "prefetch": pf, "cold_reads": True})
                    for pf in (0, 1)} if a.busy else {}

    runs: dict[str, list[dict]] = {k: [] for k in [*configs, *busy_configs]}
    for r in range(a.rounds):
        for name, (kind, settings) in configs.items():
            _bench.log(f"round {r + 1}/{a.rounds}: {name}")
            runs[name].append(run_child(kind, str(d), a.tokens, settings))
        if busy_configs:
            procs = _bench.busy_processes(a.busy)
            try:
                for name, (kind, settings) in busy_configs.items():
                    _bench.log(f"round {r + 1}/{a.rounds}: {name}")
                    runs[name].append(run_child(kind, str(d), a.tokens, settings))
            finally:
                _bench.stop_busy(procs)

    res = {name: summary(rs) for name, rs in runs.items()}
    resident = runs["moerun resident"][0]
    # what a resident decode step reads: the dense float32 weights, and each chosen expert as its slot holds it
    dense, experts_per_token = info["dense_f32_bytes"], info["layers"] * info["top_k"] * resident["slot_bytes"]
    bytes_per_token = dense + experts_per_token
    doc = {
        "machine": {"cpus": os.cpu_count(), "blas": _bench.BLAS_NOTE, "memcpy_bytes_per_s": memcpy, "cold_read_bytes_per_s": cold_bw},
        "checkpoint": {"dir": str(d), **SHAPE, "layers": a.layers, **info, "cap_bytes": cap, "note": "random weights"},
        "tokens": a.tokens, "rounds": a.rounds, "results": res,
        "resident": {"weight_bytes_per_token": bytes_per_token, "expert_storage": resident["expert_storage"],
                     "memcpy_bound_tok_s": memcpy / bytes_per_token,
                     "share_of_memcpy_bound": res["moerun resident"]["median_tok_s"] / (memcpy / bytes_per_token)},
    }
    if not a.no_reference:
        ref = runs["transformers eager f32"][0]
        doc["resident"]["vs_reference"] = res["moerun resident"]["median_tok_s"] / res["transformers eager f32"]["median_tok_s"]
        doc["resident"]["max_abs_logit_diff"] = max(abs(x - y) for x, y in zip(resident["last_logits"], ref["last_logits"]))
    capped = runs["capped cold, lru"]
    missed_per_token = statistics.median(r["misses"] for r in capped) * expert_bytes / (a.tokens + 1)  # the prefill too
    doc["capped_cold"] = {"hit_rate": statistics.median(r["hit_rate"] for r in capped), "missed_bytes_per_token": missed_per_token}
    if cold_bw:
        # the storage alone: the bytes missed a token at the device's cold rate; with the resident compute after
        # each token's reads (nothing overlapped) or beside them (everything overlapped, the best prefetch can do)
        read_s = missed_per_token / cold_bw
        compute_s = 1.0 / res["moerun resident"]["median_tok_s"]
        got = res["capped cold, lru"]["median_tok_s"]
        doc["capped_cold"].update({
            "storage_bound_tok_s": 1.0 / read_s, "share_of_storage_bound": got * read_s,
            "serial_bound_tok_s": 1.0 / (read_s + compute_s), "share_of_serial_bound": got * (read_s + compute_s),
            "overlap_bound_tok_s": 1.0 / max(read_s, compute_s),
        })
    _bench.log("where a decode step's time goes (profiled, one run each)")
    doc["breakdown"] = {
        "resident": run_child("breakdown", str(d), a.tokens, {}),
        "capped cold, lru": run_child("breakdown", str(d), a.tokens, {"mem_cap": cap, "cold_reads": True}),
        "capped cold, lru, float32 slots": run_child("breakdown", str(d), a.tokens,
                                                     {"mem_cap": cap, "cold_reads": True, "expert_slots": "float32"}),
    }
    doc["guess_precision"] = {
        "this checkpoint (random weights)": guess_precision(str(d), "The keepers check the mesh at dawn " * 8, 64),
        "pebble (trained)": guess_precision("pebble", "The keepers check the mesh at dawn, and the fog comes in " * 4, 200),
    }
    for name, rs in runs.items():
        res[name]["hit_rate"] = statistics.median(r["hit_rate"] for r in rs) if rs[0].get("hit_rate") is not None else None
        res[name]["prefetch_loads"] = statistics.median(r.get("prefetch_loads", 0) for r in rs)
        res[name]["prefetch_used"] = statistics.median(r.get("prefetch_used", 0) for r in rs)

    print(f"open checkpoint bench: {a.layers} layers of {SHAPE['model_type']} at the 30B/3B class's shape, random BF16 weights")
    print(f"machine: {os.cpu_count()} CPUs, {_bench.BLAS_NOTE}; memcpy {memcpy / 1e9:.1f} GB/s; cold reads of one expert "
          f"{'%.2f GB/s' % (cold_bw / 1e9) if cold_bw else 'not measured'}")
    print(f"{a.tokens} decode tokens a run, {a.rounds} rounds interleaved, medians (spread = (best - worst) / best)\n")
    print(f"{'configuration':<36}{'tok/s':>9}{'spread':>9}{'hit rate':>10}{'guesses read/used':>19}")
    for name, r in res.items():
        hr = "-" if r.get("hit_rate") is None else f"{100 * r['hit_rate']:.1f}%"
        pf = f"{r['prefetch_loads']:.0f}/{r['prefetch_used']:.0f}" if r["prefetch_loads"] else "-"
        print(f"{name:<36}{r['median_tok_s']:>9.2f}{100 * r['spread']:>8.0f}%{hr:>10}{pf:>19}")
    rd = doc["resident"]
    print(f"\nresident (experts {rd['expert_storage']}): {rd['weight_bytes_per_token'] / 1e6:.0f} MB of weights read a token; memcpy bound "
          f"{rd['memcpy_bound_tok_s']:.2f} tok/s; moerun reaches {100 * rd['share_of_memcpy_bound']:.0f}% of it")
    if "vs_reference" in rd:
        print(f"resident: moerun / transformers eager f32 = {rd['vs_reference']:.2f}x; last logits differ by at most "
              f"{rd['max_abs_logit_diff']:.2e}")
    cc = doc["capped_cold"]
    line = f"capped cold (lru): hit rate {100 * cc['hit_rate']:.1f}%, {cc['missed_bytes_per_token'] / 1e6:.0f} MB missed a token"
    if "storage_bound_tok_s" in cc:
        line += (f"; storage alone {cc['storage_bound_tok_s']:.2f} tok/s (reached {100 * cc['share_of_storage_bound']:.0f}%), "
                 f"storage then resident compute {cc['serial_bound_tok_s']:.2f} tok/s (reached {100 * cc['share_of_serial_bound']:.0f}%), "
                 f"both overlapped {cc['overlap_bound_tok_s']:.2f} tok/s")
    print(line)
    print("\nwhere a decode step's time goes (ms, profiled: the profiler adds a little to each call)")
    parts = sorted({k for b in doc["breakdown"].values() for k in b["step_ms"]})
    names = list(doc["breakdown"])
    print(f"{'':<28}" + "".join(f"{n:>34}" for n in names))
    for k in parts:
        print(f"{k:<28}" + "".join(f"{doc['breakdown'][n]['step_ms'].get(k, 0.0):>34.1f}" for n in names))
    print(f"{'total':<28}" + "".join(f"{doc['breakdown'][n]['total_ms']:>34.1f}" for n in names))
    gp = doc["guess_precision"]
    print("next-layer guess precision (top-k guesses): " + "; ".join(
        f"{k} {'-' if v is None else f'{100 * v:.1f}%'}" for k, v in gp.items()))
    if a.json:
        Path(a.json).write_text(json.dumps(doc, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
