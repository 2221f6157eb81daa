#!/usr/bin/env python3
"""Tune the ``markov`` (or ``--policy orbit``) eviction policy on one part of the text and report it on parts never used for tuning.

With ``--shared``, the pool is one pool shared by all layers and ``--slots`` / ``--objective-slots`` are
percentages of all experts (docs/research/policies.md, "A rule for the shared pool").

The protocol, end to end (docs/research/policies.md has the results and the reasoning):

1. Traces.  ``moerun record`` (teacher-forced, fully resident, with router probabilities) over
   - the TUNING text: by default the first ``--tune-bytes`` of whole documents of the training corpus
     ``data/corpus/train.txt``; when that file is absent, the first half (whole documents) of the
     model's bundled ``heldout.txt``;
   - the TEST text: the bundled ``heldout.txt`` (or its second half in the fallback case), never
     used for tuning;
   and ``moerun generate --trace`` (fully resident, so routing is the model's own, sampled) for
   every prompt in ``--prompts`` and seed in ``--seeds``: a few thousand generated tokens, also
   never used for tuning.
2. Search, on the tuning trace only: coordinate descent over a small grid of the policy's
   parameters, starting from the class defaults, for ``--rounds`` rounds; the objective is the mean
   share of the LRU-to-optimum hit-rate gap closed over ``--objective-slots``.  The cost per access
   grows with ``order``, ``horizon`` and ``memory``, so a larger value of those is taken only when it beats
   the best smaller one by more than ``--min-gain`` percentage points of the objective.
3. Report, with the chosen parameters fixed: per slot count (default 1-6 per layer) the hit rate of
   LRU, the policy, the offline optimum (Belady's MIN with the pool's pinning), the share of the
   gap closed, and the time-shuffled baselines (LRU, and the policy, on the same decode tokens in a
   random order), for the tuning trace, the test trace and the generation traces (summed over
   traces, each replayed from an empty pool).

Replays use moerun.sim.report's reference path (Residency + policy objects, exactly the live pool's
code) for the policy and the fast paths for LRU and the optimum.  Traces are cached in ``--work``
(default: a directory under the system temp dir) and reused when present.

Usage: python scripts/tune_policy.py [--work DIR] [--rounds N] [--jobs N] [--no-search] [--json]
       python scripts/tune_policy.py --model tiny_models/scree --policy orbit --shared --slots 10,25,50 --objective-slots 10,25,50

It imports ``_bench`` first, before numpy and moerun: one BLAS thread, and the helpers the
benchmarks share.
"""

from __future__ import annotations

import argparse
import contextlib
import datetime
import io
import json
import multiprocessing as mp
import platform
import sys
import tempfile
import time
from pathlib import Path

import _bench  # first: one BLAS thread before numpy is imported; the shared helpers
import numpy as np

from moerun.cli import main as cli
from moerun.cli.report import pct, table
from moerun.files.trace import Trace, read_trace
from moerun.policies import LRU, Markov, Optimal, Orbit
from moerun.runtime.engine import default_model_dir
from moerun.sim import report as replay

ROOT = Path(__file__).resolve().parent.parent
CORPUS_TRAIN = ROOT / "data" / "corpus" / "train.txt"
PROMPTS = _bench.SESSION_PROMPTS  # one opener per register, and an empty document
# The grid the search walks (values per parameter); the class defaults are the starting point.
GRIDS = {}
GRIDS["markov"] = GRID = {
    "order": [1, 2, 3, 4, 5, 6],
    "gamma": [0.3, 0.5, 0.7],
    "horizon": [2, 4, 8, 12],
    "kappa": [0.5, 2.0, 8.0],
    "memory": [1, 2],
    "lam": [0.003, 0.01, 0.03],
    "w": [0.25, 0.5, 1.0, 2.0],
}
GRIDS["orbit"] = {
    "beta": [0.0, 0.1, 0.25, 0.5, 1.0],
    "w": [0.0, 0.1, 0.25, 0.5, 1.0],
    "kappa": [0.25, 0.5, 2.0, 8.0],
    "gamma": [0.3, 0.5, 0.7],
    "horizon": [2, 4, 8, 12],
    "memory": [0.25, 0.5, 0.75, 1.0],
    "lam": [0.003, 0.01, 0.03],
}
CLASSES = {"markov": Markov, "orbit": Orbit}
COSTLY_BY = {"markov": ("order", "horizon", "memory"), "orbit": ("horizon",)}


# ---------------------------------------------------------------------------- texts and traces


def first_bytes(docs: list[str], limit: int) -> list[str]:
    out, n = [], 0
    for d in docs:
        if n >= limit:
            break
        out.append(d)
        n += len(d.encode())
    return out


def texts(args, work: Path) -> dict:
    """Write the tuning and test texts into ``work``; say where they came from."""
    model = Path(args.model) if args.model else default_model_dir()
    heldout = model / "heldout.txt"
    tune_src = Path(args.tune_text) if args.tune_text else (CORPUS_TRAIN if CORPUS_TRAIN.is_file() else None)
    held_docs = _bench.split_docs(heldout.read_text(encoding="utf-8"))
    if tune_src is not None:
        tune_docs = first_bytes(_bench.split_docs(tune_src.read_text(encoding="utf-8")), args.tune_bytes)
        test_docs = held_docs
        tune_label = f"{tune_src} (first {sum(len(d.encode()) for d in tune_docs)} bytes, {len(tune_docs)} documents)"
        test_label = f"{heldout} (all {len(test_docs)} documents)"
    else:
        half = len(held_docs) // 2
        tune_docs, test_docs = held_docs[:half], held_docs[half:]
        tune_label = f"{heldout}, first half ({len(tune_docs)} documents)"
        test_label = f"{heldout}, second half ({len(test_docs)} documents)"
    (work / "tune.txt").write_text("".join(tune_docs), encoding="utf-8")
    (work / "test.txt").write_text("".join(test_docs), encoding="utf-8")
    return {"model": str(model), "tune": tune_label, "test": test_label}


def _quiet(argv: list[str]) -> None:
    with contextlib.redirect_stdout(io.StringIO()):
        code = cli.main(argv)
    if code != 0:
        raise SystemExit(f"moerun {' '.join(argv[:1])} failed with exit code {code}")


def record(args, work: Path, name: str) -> Trace:
    path = work / f"{name}.npz"
    if not path.exists():
        t0 = time.monotonic()
        _quiet(["record", *(["--model", args.model] if args.model else []), "--text", str(work / f"{name}.txt"), "--trace", str(path), "--json"])
        _bench.log(f"recorded {path} in {time.monotonic() - t0:.0f} s")
    else:
        _bench.log(f"reusing {path}")
    trace = read_trace(path)
    if trace.probs is None:
        raise SystemExit(f"{path} holds no router probabilities; delete it to record it again")
    return trace


def generations(args, work: Path) -> list[Trace]:
    out = []
    t0 = time.monotonic()
    for i, prompt in enumerate(args.prompts):
        for seed in args.seeds:
            path = work / f"gen_p{i}_s{seed}_n{args.gen_tokens}.npz"
            if not path.exists():
                _quiet(["generate", *(["--model", args.model] if args.model else []), "--prompt", prompt, "--seed", str(seed),
                        "--max-new", str(args.gen_tokens), "--trace", str(path), "--json"])
            out.append(read_trace(path))
    _bench.log(f"{len(out)} generation traces ready in {time.monotonic() - t0:.0f} s")
    return out


# ---------------------------------------------------------------------------- replay


SHARED = False  # --shared: slots are totals of one pool shared by all layers


def pool_hit_rates(traces: list[Trace], policy, slots: list[int], fast: bool = True) -> dict[int, float]:
    """Overall hit rate per quota (per layer, or per shared pool with --shared), counts summed over
    traces (each replayed from an empty pool)."""
    return _bench.hit_rates(traces, policy, slots, shared=SHARED, fast=fast)


def gap_share(pol: float, lru: float, opt: float) -> float | None:
    return (pol - lru) / (opt - lru) if opt - lru > 1e-12 else None


_TRACES: list[Trace] = []
_SLOTS: list[int] = []
_CLS = Markov


def _evaluate(params: dict) -> tuple[dict, dict[int, float], float]:
    t0 = time.monotonic()
    r = pool_hit_rates(_TRACES, _CLS.with_params(**params), _SLOTS, fast=False)
    return params, r, time.monotonic() - t0


def search(tune: Trace, slots: list[int], rounds: int, jobs: int, min_gain: float, name: str = "markov") -> tuple[dict, list[dict]]:
    """Coordinate descent over the policy's grid on the tuning trace; returns (best parameters, every evaluation)."""
    global _TRACES, _SLOTS, _CLS
    _TRACES, _SLOTS, _CLS = [tune], slots, CLASSES[name]
    GRID, COSTLY = GRIDS[name], COSTLY_BY[name]
    lru = pool_hit_rates([tune], LRU, slots)
    opt = pool_hit_rates([tune], Optimal, slots)

    def objective(r: dict[int, float]) -> float:
        return float(np.mean([gap_share(r[c], lru[c], opt[c]) for c in slots]))

    best = {k: getattr(_CLS, k) for k in GRID}
    seen: dict[tuple, dict[int, float]] = {}
    history = []
    ctx = mp.get_context("fork")
    with ctx.Pool(jobs) as pool:
        for rnd in range(rounds):
            changed = False
            for name, values in GRID.items():
                cands = [dict(best, **{name: v}) for v in values]
                todo = [c for c in cands if tuple(sorted(c.items())) not in seen]
                for params, r, dt in pool.imap(_evaluate, todo):
                    seen[tuple(sorted(params.items()))] = r
                    history.append({"params": params, "hit_rate": r, "objective": objective(r), "seconds": dt})
                    _bench.log(f"  round {rnd + 1} {name}={params[name]!s:<6} objective {100 * objective(r):5.1f}% of the gap  "
                        + " ".join(f"{c}:{100 * r[c]:.1f}%" for c in slots) + f"  ({dt:.0f} s)")
                score = {i: objective(seen[tuple(sorted(c.items()))]) for i, c in enumerate(cands)}
                if name in COSTLY:  # the cheapest value within min_gain of the best
                    top_score = max(score.values())
                    top = cands[min(i for i in score if score[i] >= top_score - min_gain / 100)]
                else:
                    top = max(cands, key=lambda c: (score[cands.index(c)], c == best))
                if top != best:
                    best, changed = top, True
            _bench.log(f"after round {rnd + 1}: {best}")
            if not changed:
                break
    return best, history


# ---------------------------------------------------------------------------- report


def shuffled(traces: list[Trace], seed: int) -> list[Trace]:
    return [replay.shuffled_trace(t, seed) for t in traces]


def report_set(label: str, traces: list[Trace], policy, slots: list[int], seed: int) -> dict:
    t0 = time.monotonic()
    lru = pool_hit_rates(traces, LRU, slots)
    pol = pool_hit_rates(traces, policy, slots, fast=False)
    opt = pool_hit_rates(traces, Optimal, slots)
    shuf = shuffled(traces, seed)
    lru_s = pool_hit_rates(shuf, LRU, slots)
    pol_s = pool_hit_rates(shuf, policy, slots, fast=False)
    rows = [
        {
            "slots": c,
            "lru": lru[c],
            "policy": pol[c],
            "optimal": opt[c],
            "gap_closed": gap_share(pol[c], lru[c], opt[c]),
            "lru_shuffled": lru_s[c],
            "policy_shuffled": pol_s[c],
        }
        for c in slots
    ]
    tokens = sum(t.n_tokens for t in traces)
    accesses = sum(int((t.experts[replay.prefill_tokens(t):] >= 0).sum()) for t in traces)
    _bench.log(f"reported {label} in {time.monotonic() - t0:.0f} s")
    return {"label": label, "traces": len(traces), "tokens": tokens, "decode_accesses": accesses, "rows": rows}


def render(doc: dict) -> str:
    lines = [
        f"model {doc['model']}; policy {doc['policy']} with {doc['params']}",
        f"tuned on: {doc['texts']['tune']}",
        f"objective: mean share of the lru-to-optimum gap closed at {doc['objective_slots']} "
        + ("slots of one pool shared by all layers" if doc["shared_pool"] else "slots per layer") + ", on the tuning trace only",
        "",
    ]
    for s in doc["sets"]:
        lines.append(f"{s['label']}: {s['traces']} trace(s), {s['tokens']} tokens, {s['decode_accesses']} decode accesses")
        head = ["pool slots" if doc["shared_pool"] else "slots/layer", "lru", doc["policy"], "optimum", "gap closed", "lru shuffled", f"{doc['policy']} shuffled"]
        rows = [[r["slots"], pct(r["lru"]), pct(r["policy"]), pct(r["optimal"]), pct(r["gap_closed"]), pct(r["lru_shuffled"]),
                 pct(r["policy_shuffled"])] for r in s["rows"]]
        lines.append(table(head, rows))
        lines.append("")
    lines.append("hit rate = 1 - misses / decode accesses, all layers; gap closed = (policy - lru) / (optimum - lru); "
                 "shuffled = the same decode tokens in a random order (seed 0)")
    return "\n".join(lines)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model", default=None, help="model directory (default: the bundled model)")
    ap.add_argument("--tune-text", default=None, help=f"tuning text (default: {CORPUS_TRAIN.relative_to(ROOT)} if present)")
    ap.add_argument("--tune-bytes", type=int, default=200_000, help="bytes of whole documents taken from the tuning text (default 200000)")
    ap.add_argument("--prompts", nargs="+", default=PROMPTS, help="generation prompts (default: one opener per register)")
    ap.add_argument("--seeds", type=lambda s: [int(x) for x in s.split(",")], default=[1, 2, 3], help="sampling seeds (default 1,2,3)")
    ap.add_argument("--gen-tokens", type=int, default=240, help="tokens generated per prompt and seed (default 240)")
    ap.add_argument("--slots", default="1-6", help="slots per layer in the report (default 1-6)")
    ap.add_argument("--objective-slots", default="3-6", help="slots per layer the search optimises (default 3-6)")
    ap.add_argument("--rounds", type=int, default=2, help="coordinate-descent rounds (default 2)")
    ap.add_argument("--min-gain", type=float, default=0.25, help="points of the objective a costlier order or horizon must add (default 0.25)")
    ap.add_argument("--no-search", action="store_true", help="report the class defaults without searching")
    ap.add_argument("--jobs", type=int, default=2, help="parallel replays during the search (default 2)")
    ap.add_argument("--seed", type=int, default=0, help="seed of the time-shuffled baselines (default 0)")
    ap.add_argument("--work", default=None, help="directory for texts and traces, reused across runs (default: a temp dir)")
    ap.add_argument("--policy", choices=sorted(CLASSES), default="markov", help="the policy tuned (default markov)")
    ap.add_argument("--shared", action="store_true",
                    help="one pool shared by all layers: --slots and --objective-slots are then percentages of all experts")
    ap.add_argument("--search-tokens", type=int, default=0, help="tokens of the tuning trace the search replays (default 0: all)")
    ap.add_argument("--no-generations", action="store_true", help="skip the sampled generations")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    global SHARED
    SHARED = args.shared
    cls = CLASSES[args.policy]
    GRID = GRIDS[args.policy]

    work = Path(args.work) if args.work else Path(tempfile.gettempdir()) / "moerun-tune-policy"
    work.mkdir(parents=True, exist_ok=True)
    started = datetime.datetime.now(datetime.UTC)
    t0 = time.monotonic()
    src = texts(args, work)
    tune = record(args, work, "tune")
    test = record(args, work, "test")
    gens = [] if args.no_generations else generations(args, work)
    slots = replay.parse_slots(args.slots)
    obj_slots = replay.parse_slots(args.objective_slots)
    if args.shared:  # percentages of all experts -> pool sizes
        everything = tune.n_layers * tune.n_experts
        slots = sorted({max(1, round(p / 100 * everything)) for p in slots})
        obj_slots = sorted({max(1, round(p / 100 * everything)) for p in obj_slots})
    searched = tune
    if args.search_tokens and tune.n_tokens > args.search_tokens:
        n = args.search_tokens
        searched = Trace(tune.experts[:n], None, None, dict(tune.meta), {}, None if tune.probs is None else tune.probs[:n])

    if args.no_search:
        params, history = {k: getattr(cls, k) for k in GRID}, []
    else:
        _bench.log(f"searching on the tuning trace ({searched.n_tokens} tokens), slots {obj_slots}")
        params, history = search(searched, obj_slots, args.rounds, args.jobs, args.min_gain, args.policy)
    policy = cls.with_params(**params)
    defaults = {k: getattr(cls, k) for k in GRID}
    sets = [
        report_set("tuning trace (used for the search)", [tune], policy, slots, args.seed),
        report_set("TEST: held-out text, never used for tuning", [test], policy, slots, args.seed),
    ]
    if gens:
        sets.append(report_set(f"TEST: sampled generations ({len(args.prompts)} prompts x seeds {args.seeds}, fully resident)", gens, policy,
                               slots, args.seed))
    doc = {
        "date_utc": started.strftime("%Y-%m-%d %H:%M"),
        "command": "python " + " ".join([sys.argv[0], *sys.argv[1:]]),
        "model": src["model"],
        "texts": src,
        "policy": args.policy,
        "shared_pool": args.shared,
        "search_tokens": searched.n_tokens,
        "params": params,
        "params_equal_class_defaults": params == defaults,
        "class_defaults": defaults,
        "objective_slots": obj_slots,
        "min_gain_points": args.min_gain,
        "grid": GRID,
        "search": history,
        "sets": sets,
        "seconds": time.monotonic() - t0,
        "python": platform.python_version(),
        "numpy": np.__version__,
    }
    if args.json:
        json.dump(doc, sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        print(render(doc))
        if not doc["params_equal_class_defaults"]:
            print(f"note: the tuned parameters differ from the class defaults {defaults}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
