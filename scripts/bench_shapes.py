#!/usr/bin/env python3
"""Eviction in a pool shared by all layers against per-layer quotas, on held-out text of both bundled models.

Part 1, replay (hits and misses only, no timing): each model's bundled ``heldout.txt`` (never used to
train the models or to tune the policies) is recorded teacher-forced and fully resident (``moerun
record``), then replayed for lru, lfu, markov, orbit and the offline optimum (Belady's MIN with the
pool's pinning) at pool sizes of 10%, 25% and 50% of all experts (layers x experts), in two pool
kinds: one pool shared by all layers (``replay_counts(..., shared=True)``, the live engine's order)
and even per-layer quotas (the pool size split over the layers as ``budget.plan_budget`` splits it;
a quota below top_k cannot run live and is replayed with each access pinned alone, as replay does).
Beside every hit rate: the same policy on the time-shuffled trace (the same decode tokens in a
seeded random order).  For each online rule, the share of the LRU-to-optimum gap it closes.

Part 2, live decode (``--live-model``, default scree): one pool shared by all layers holding
``--live-share`` of the experts, lru against orbit, prefetch off; sessions of ``--session-prompts``
prompts x ``--max-new`` tokens in one engine each (pool and policy carry over), the emulated link
calibrated so that LRU spends about half its decode time stalled, ``--repeats`` runs interleaved;
median, best and spread of decode tok/s, the stall share, and the tokens checked against a resident
session.  BLAS pinned to one thread.

Usage: python scripts/bench_shapes.py [--json] [--work DIR] [--repeats N] [--no-live]

It imports ``_bench`` first, before numpy and moerun: one BLAS thread, and the helpers the
benchmarks share.
"""

from __future__ import annotations

import argparse
import contextlib
import datetime
import io
import json
import platform
import statistics
import sys
import tempfile
import time
from pathlib import Path

import _bench  # first: one BLAS thread before numpy is imported; the shared helpers
import numpy as np

import moerun
from moerun import policies
from moerun.cli import main as cli
from moerun.cli.report import pct, table
from moerun.files.trace import Trace, read_trace
from moerun.runtime.budget import fixed_bytes, slot_bytes
from moerun.sim.counts import shuffled_trace

ROOT = Path(__file__).resolve().parent.parent
MODELS = ("pebble", "scree")
POLICIES = ("lru", "lfu", "markov", "orbit", "optimal")
ONLINE_RULES = ("lfu", "markov", "orbit")
SHARES = (0.10, 0.25, 0.50)


def heldout_trace(model: str, work: Path) -> Trace:
    path = work / f"{model}_heldout.npz"
    if not path.exists():
        argv = ["record", "--model", str(ROOT / "tiny_models" / model), "--text", str(ROOT / "tiny_models" / model / "heldout.txt"),
                "--trace", str(path), "--json"]
        with contextlib.redirect_stdout(io.StringIO()):
            if cli.main(argv) != 0:
                raise SystemExit(f"moerun record failed for {model}")
    return read_trace(path)


def even_quotas(total: int, L: int, E: int) -> list[int]:
    """``total`` slots split over L layers as budget.plan_budget's even split does (at least 1 each)."""
    base, extra = divmod(min(total, L * E), L)
    return [max(1, min(E, base + (1 if i < extra else 0))) for i in range(L)]


def shape_hit_rates(trace: Trace, name: str, sizes: list[int], shared: bool) -> dict[int, float]:
    """Hit rate over all layers per pool size: one shared pool, or the size split into even quotas."""
    return _bench.hit_rates(trace, name, sizes, shared=shared,
                            quotas=lambda c: even_quotas(c, trace.n_layers, trace.n_experts))


def replay_part(model: str, work: Path, seed: int) -> dict:
    trace = heldout_trace(model, work)
    shuffled = shuffled_trace(trace, seed)
    L, E, k = trace.n_layers, trace.n_experts, trace.top_k
    sizes = [max(1, round(s * L * E)) for s in SHARES]
    kinds = {}
    for kind, shared in (("shared", True), ("even", False)):
        t0 = time.monotonic()
        rates = {n: shape_hit_rates(trace, n, sizes, shared) for n in POLICIES}
        shuf = {n: shape_hit_rates(shuffled, n, sizes, shared) for n in POLICIES}
        rows = []
        for c in sizes:
            lru, opt = rates["lru"][c], rates["optimal"][c]
            row = {"pool_slots": c, "share_of_experts": c / (L * E),
                   "quotas": None if shared else even_quotas(c, L, E)}
            for n in POLICIES:
                row[n] = rates[n][c]
                row[f"{n}_shuffled"] = shuf[n][c]
            for n in ONLINE_RULES:
                row[f"{n}_gap_closed"] = (rates[n][c] - lru) / (opt - lru) if opt - lru > 1e-12 else None
            rows.append(row)
        kinds[kind] = rows
        _bench.log(f"{model} {kind}: replayed in {time.monotonic() - t0:.0f} s")
    return {"model": model, "tokens": trace.n_tokens, "layers": L, "experts": E, "top_k": k,
            "decode_accesses": int((trace.experts >= 0).sum()), "pool_sizes": sizes, "kinds": kinds}


def live_part(a) -> dict:
    model = ROOT / "tiny_models" / a.live_model
    with moerun.load(model, tokenizer=False) as eng:
        st = eng.store
        c = st.config
        d, kv, s = fixed_bytes(c, st.dense_nbytes, st.codec.scratch_bytes())
        per = slot_bytes(st.expert_nbytes)
    n = max(c.top_k, round(a.live_share * c.n_layers * c.n_experts))
    cap = d + kv + s + n * per
    prompts = _bench.SESSION_PROMPTS[: a.session_prompts]
    ref = _bench.session(model, prompts, a.max_new, a.seed)
    kw = {"mem_cap": cap, "split": "shared"}
    cal = _bench.session(model, prompts, a.max_new, a.seed, **kw)  # LRU at real speed: its page-in time equal to its compute time
    rate = cal["misses"] * st.expert_nbytes / max(cal["total_s"] - cal["stall_s"], 1e-6)
    calibration = []
    for _ in range(3):  # then closer to half the time stalled, as LRU measures it at that link
        got = _bench.session(model, prompts, a.max_new, a.seed, link_speed=rate, **kw)
        share = got["stall_s"] / got["total_s"]
        calibration.append({"link_bytes_per_s": rate, "lru_stall_share": share})
        if 0.4 <= share <= 0.6:
            break
        rate *= min(4.0, max(0.25, share / max(1e-3, 1.0 - share)))
    names = ["lru", "orbit"]
    runs: dict = {name: [] for name in names}
    for _ in range(a.repeats):  # interleaved, so both see the same background load
        for name in names:
            runs[name].append(_bench.session(model, prompts, a.max_new, a.seed, evict=name, link_speed=rate, **kw))
    rows = []
    for name, rs in runs.items():
        tok = [r["tok_s"] for r in rs]
        rows.append({"policy": name, "median_tok_s": statistics.median(tok), "best_tok_s": max(tok), "min_tok_s": min(tok),
                     "spread": (max(tok) - min(tok)) / statistics.median(tok), "tok_s": tok, "hit_rate": rs[0]["hit_rate"],
                     "misses": rs[0]["misses"], "stall_share": statistics.median(r["stall_s"] / r["total_s"] for r in rs),
                     "same_tokens_as_resident": all(r["tokens"] == ref["tokens"] for r in rs)})
    lru, orb = rows
    ratios = [o["tok_s"] / lr["tok_s"] for lr, o in zip(runs["lru"], runs["orbit"])]
    return {"model": a.live_model, "pool_slots": n, "experts": c.n_layers * c.n_experts, "cap_bytes": cap,
            "link_bytes_per_s": rate, "calibration": calibration, "prompts": len(prompts), "max_new": a.max_new, "tokens_per_session": ref["steps"],
            "repeats": a.repeats, "rows": rows, "orbit_vs_lru_median": orb["median_tok_s"] / lru["median_tok_s"],
            "orbit_vs_lru_per_run": ratios, "orbit_vs_lru_pair_median": statistics.median(ratios)}


def render(doc: dict) -> str:
    lines = [f"measured {doc['date_utc']} UTC on {doc['host']}; {_bench.BLAS_NOTE}", ""]
    for m in doc["replay"]:
        lines.append(f"{m['model']}: held-out text, {m['tokens']} tokens x {m['layers']} layers, top-{m['top_k']} of {m['experts']} experts")
        for kind, rows in m["kinds"].items():
            head = ["pool" if kind == "shared" else "even quotas", *POLICIES, *(f"{n} gap" for n in ONLINE_RULES)]
            body = []
            for r in rows:
                label = f"{r['pool_slots']} ({100 * r['share_of_experts']:.0f}%)" + ("" if r["quotas"] is None else f" {r['quotas']}")
                body.append([label, *(f"{pct(r[n])} / {pct(r[n + '_shuffled'])}" for n in POLICIES),
                             *(pct(r[f"{n}_gap_closed"]) for n in ONLINE_RULES)])
            lines.append(f"  {kind}: hit rate / the same on the time-shuffled trace")
            lines.append(table(head, body))
        lines.append("")
    lv = doc.get("live")
    if lv:
        lines.append(f"live: {lv['model']}, one shared pool of {lv['pool_slots']} of {lv['experts']} experts, link "
                     f"{lv['link_bytes_per_s'] / 1e9:.2f} GB/s emulated, {lv['repeats']} interleaved sessions of "
                     f"{lv['tokens_per_session']} decode tokens")
        head = ["policy", "median tok/s", "best", "worst", "spread", "hit rate", "stalled", "tokens = resident"]
        body = [[r["policy"], f"{r['median_tok_s']:.0f}", f"{r['best_tok_s']:.0f}", f"{r['min_tok_s']:.0f}", pct(r["spread"]),
                 pct(r["hit_rate"]), pct(r["stall_share"]), str(r["same_tokens_as_resident"])] for r in lv["rows"]]
        lines.append(table(head, body))
        per = lv["orbit_vs_lru_per_run"]
        lines.append(f"orbit / lru: {lv['orbit_vs_lru_median']:.2f}x (medians of each); per interleaved pair {min(per):.2f}-{max(per):.2f}x, "
                     f"median {lv['orbit_vs_lru_pair_median']:.2f}x")
    return "\n".join(lines)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--work", default=None, help="directory for the recorded traces, reused across runs (default: a temp dir)")
    ap.add_argument("--seed", type=int, default=0, help="seed of the time-shuffled traces and of sampling (default 0)")
    ap.add_argument("--no-live", action="store_true", help="skip the live decode part")
    ap.add_argument("--no-replay", action="store_true", help="skip the replay part")
    ap.add_argument("--live-model", default="scree", choices=MODELS)
    ap.add_argument("--live-share", type=float, default=0.25, help="share of all experts the live shared pool holds (default 0.25)")
    ap.add_argument("--session-prompts", type=int, default=8, help="prompts per live session (default 8)")
    ap.add_argument("--max-new", type=int, default=240, help="tokens generated per prompt (default 240)")
    ap.add_argument("--repeats", type=int, default=5, help="interleaved live sessions per policy (default 5)")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args()
    work = Path(a.work) if a.work else Path(tempfile.gettempdir()) / "moerun-bench-shapes"
    work.mkdir(parents=True, exist_ok=True)
    started = datetime.datetime.now(datetime.UTC)
    t0 = time.monotonic()
    doc = {"date_utc": started.strftime("%Y-%m-%d %H:%M"), "host": platform.node(), "command": " ".join(["python", *sys.argv]),
           "policy_params": {"orbit": {k: getattr(policies.Orbit, k) for k in ("beta", "w", "kappa", "gamma", "horizon", "memory", "lam")}},
           "replay": [] if a.no_replay else [replay_part(m, work, a.seed) for m in MODELS]}
    if not a.no_live:
        doc["live"] = live_part(a)
    doc["seconds"] = time.monotonic() - t0
    doc["numpy"] = np.__version__
    if a.json:
        json.dump(doc, sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        print(render(doc))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
