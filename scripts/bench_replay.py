"""Replay and plan at real shapes: the fast paths against the reference path, side by side in one run.

Three figures, each timed wall-clock over whole calls of the library (what the command runs, output aside):

1. ``replay --shared-pool`` with lru, markov, orbit and the optimum on a trace of scree's held-out text
   (``moerun record --model scree``: about 29k tokens), the default pool sizes and baselines: the fast
   paths (``moerun.replay``) against the reference path (``generic=True``: the decision core and the policy
   objects, for every policy); their counts must be equal, and the script says whether they are.
2. ``plan --shape`` for 24 layers, top-6 of 64 experts, with a 2,000-token trace and the default policy
   set: the trace routed by a synthetic model of that shape (``moerun synth``, then ``moerun record`` over
   scree's held-out text, kept as a trace of routing only, as one imported from another runtime would be).
   The reference of this command is the base revision's planner: give ``--base DIR`` (a worktree of it) to
   time it once beside (it took 18 minutes and more before this change; ``--base-timeout`` bounds it).
3. Accesses per second per policy in a shared pool of scree's default sizes: the fast path on the whole
   trace, the reference path on its first ``--reference-tokens`` tokens.

Runs are interleaved (fast, reference, fast, ...) so both see the same load; medians and spread (min-max)
are printed.  Read the ratios: on a machine shared with other work the absolute times move.

Usage: python scripts/bench_replay.py [--repeat N] [--reference-repeat N] [--base DIR] [--evict P,P]
       [--trace FILE] [--reference-tokens N] [--json]

It imports ``_bench`` first, before numpy and moerun: one BLAS thread, and the helpers the benchmarks share.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import _bench  # first: one BLAS thread before numpy is imported; the shared helpers
import numpy as np

import moerun
from moerun import policies
from moerun.cli import main as cli
from moerun.files.trace import Trace, read_trace, write_trace
from moerun.sim import report as replay

REPLAY_POLICIES = ["lru", "markov", "orbit", "optimal"]
SHAPE = {"layers": 24, "experts": 64, "top_k": 6, "expert_bytes": 9437184, "dense_bytes": 2147483648,
         "expert_us": 300.0, "dense_layer_us": 400.0, "head_us": 2000.0}
PLAN_ARGS = ["--mem-cap", "10GB", "--link-speed", "5GB/s"]


def quiet_cli(args: list[str]) -> int:
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        return cli.main(args)


def timed(fn) -> tuple[float, object]:
    t0 = time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, out


def spread(xs: list[float]) -> dict:
    return {"median": statistics.median(xs), "min": min(xs), "max": max(xs), "runs": len(xs)}


def fmt(s: dict) -> str:
    if s["runs"] == 1:
        return f"{s['median']:7.2f} s (1 run)"
    return f"{s['median']:7.2f} s (min {s['min']:.2f}, max {s['max']:.2f}, {s['runs']} runs)"


def make_inputs(work: Path, trace_arg: str | None) -> tuple[Path, Path, Path]:
    """The scree trace, the 24-layer shape file and its 2,000-token trace (routing only)."""
    scree = Path(trace_arg) if trace_arg else work / "scree.npz"
    if not trace_arg:
        _bench.log("recording scree's held-out text (moerun record --model scree)")
        if quiet_cli(["record", "--model", "scree", "--trace", str(scree)]) != 0:
            raise SystemExit("record failed")
    shape = work / "shape24.json"
    shape.write_text(json.dumps(SHAPE))
    model = work / "m24"
    _bench.log("a synthetic model of 24 layers, top-6 of 64 experts, routing 2,000 tokens of scree's held-out text")
    if quiet_cli(["synth", "--layers", "24", "--experts", "64", "--top-k", "6", "--d-model", "64", "--d-expert", "32",
                  "--context", "512", str(model)]) != 0:
        raise SystemExit("synth failed")
    routed = work / "routed24.npz"
    held = Path(moerun.__file__).resolve().parent.parent / "tiny_models" / "scree" / "heldout.txt"
    if quiet_cli(["record", "--model", str(model), "--text", str(held), "--max-tokens", "2000",
                  "--trace", str(routed)]) != 0:
        raise SystemExit("record failed")
    t = read_trace(routed)
    plan_trace = work / "trace24.npz"
    write_trace(plan_trace, Trace(t.experts, meta={"n_experts": 64, "prefill_tokens": 0, "source": "import"}))
    return scree, shape, plan_trace


def replay_doc(path: Path, evict: list[str], generic: bool) -> dict:
    return moerun.replay(str(path), evict, shared_pool=True, generic=generic).to_json()


def counts(doc: dict) -> list:
    key = ("policy", "slots", "layer", "accesses", "misses", "prefill_loads", "baseline")
    return sorted(tuple(str(r.get(k)) for k in key) for r in doc["results"] + doc.get("baselines", []))


def plan_base(base: Path, shape: Path, trace: Path, timeout: float) -> dict:
    """The base revision's ``moerun plan``, once, in a subprocess (its own checkout first on the path)."""
    code = ("import sys; sys.path.insert(0, sys.argv[1]); import moerun, json; "
            "assert moerun.__file__.startswith(sys.argv[1]), moerun.__file__; "
            "r = moerun.plan(shape=sys.argv[2], trace=sys.argv[3], mem_cap='10GB', link_speed='5GB/s'); "
            "print(json.dumps({'policy': r.recommended.policy, 'split': r.recommended_split, 'slots': r.recommended.slots, "
            "'tok_s': r.recommended.tok_s}))")
    t0 = time.perf_counter()
    try:
        p = subprocess.run([sys.executable, "-c", code, str(base.resolve()), str(shape), str(trace)], capture_output=True,
                           text=True, timeout=timeout, env=dict(os.environ, PYTHONPATH=str(base.resolve())))
    except subprocess.TimeoutExpired:
        return {"seconds": None, "timed_out_after_s": timeout}
    if p.returncode != 0:
        return {"seconds": None, "error": p.stderr.strip().splitlines()[-1:]}
    return {"seconds": time.perf_counter() - t0, "recommended": json.loads(p.stdout)}


def per_policy(scree: Path, names: list[str], ref_tokens: int) -> dict:
    """Accesses per second in a shared pool (scree's default sizes), fast on the whole trace, reference on a prefix."""
    t = replay.compact(read_trace(scree))
    prefix = Trace(t.experts[:ref_tokens], meta=dict(t.meta))
    sizes = replay.shared_slots(t.n_layers * t.n_experts)
    out = {}
    for name in names:
        row = {}
        for label, tr, fast in (("fast", t, True), ("reference", prefix, False)):
            plan = replay.shared_plan(tr)
            n = int(plan.counted_per_access().sum()) * len(sizes)
            s, _ = timed(lambda plan=plan, fast=fast, name=name: replay.layer_misses(plan, policies.get(name), sizes, fast))
            row[label] = {"accesses": n, "seconds": s, "accesses_per_s": n / s}
        out[name] = row
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3, help="runs of each fast figure (default 3)")
    ap.add_argument("--reference-repeat", type=int, default=1, help="runs of the reference replay (default 1)")
    ap.add_argument("--base", help="a worktree of the base revision: its plan --shape is timed once")
    ap.add_argument("--base-timeout", type=float, default=1500.0, help="seconds the base plan may take (default 1500)")
    ap.add_argument("--evict", default=",".join(policies.names()), help="policies of the per-policy figure (default: all)")
    ap.add_argument("--trace", help="the shared-pool trace (default: moerun record --model scree)")
    ap.add_argument("--reference-tokens", type=int, default=3000, help="prefix the per-policy reference replays (default 3000)")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    load0 = os.getloadavg()
    work = Path(tempfile.mkdtemp(prefix="bench_replay_"))
    scree, shape, plan_trace = make_inputs(work, args.trace)
    n_acc = int((read_trace(scree).experts >= 0).sum())

    fast_s, ref_s, plan_s = [], [], []
    same = None
    plan_rec = None
    for r in range(max(args.repeat, args.reference_repeat)):
        if r < args.repeat:
            _bench.log(f"replay --shared-pool, fast ({r + 1})")
            s, fast_doc = timed(lambda: replay_doc(scree, REPLAY_POLICIES, False))
            fast_s.append(s)
        if r < args.reference_repeat:
            _bench.log(f"replay --shared-pool, reference path ({r + 1})")
            s, ref_doc = timed(lambda: replay_doc(scree, REPLAY_POLICIES, True))
            ref_s.append(s)
            same = counts(fast_doc) == counts(ref_doc)
        if r < args.repeat:
            _bench.log(f"plan --shape, 24 layers ({r + 1})")
            s, res = timed(lambda: moerun.plan(shape=str(shape), trace=str(plan_trace), mem_cap="10GB", link_speed="5GB/s"))
            plan_s.append(s)
            plan_rec = {"policy": res.recommended.policy, "split": res.recommended_split, "slots": res.recommended.slots,
                        "tok_s": res.recommended.tok_s}
    base = None
    if args.base:
        _bench.log(f"plan --shape on the base revision at {args.base} (once, at most {args.base_timeout:.0f} s)")
        base = plan_base(Path(args.base), shape, plan_trace, args.base_timeout)
    _bench.log("accesses per second per policy")
    names = replay.parse_policies(args.evict)
    pol = per_policy(scree, names, args.reference_tokens)
    load1 = os.getloadavg()

    doc = {
        "replay_shared": {"trace": str(scree), "accesses": n_acc, "policies": REPLAY_POLICIES,
                          "fast": spread(fast_s), "reference": spread(ref_s), "counts_equal": same,
                          "reference_over_fast": statistics.median(ref_s) / statistics.median(fast_s)},
        "plan_shape": {"shape": SHAPE, "args": PLAN_ARGS, "tokens": read_trace(plan_trace).n_tokens, "fast": spread(plan_s),
                       "recommended": plan_rec, "base": base},
        "per_policy_shared": pol,
        "load_average": {"start": load0, "end": load1},
        "note": "wall time; the machine was shared with other work (load averages printed); one BLAS thread",
        "python": platform.python_version(),
        "numpy": np.__version__,
    }
    if args.json:
        json.dump(doc, sys.stdout, indent=2)
        sys.stdout.write("\n")
        return 0
    print("NOTE: a shared machine (other work ran beside this); load average "
          f"{load0[0]:.2f} at the start, {load1[0]:.2f} at the end; read the ratios")
    print(f"\nreplay --shared-pool --evict {','.join(REPLAY_POLICIES)} on {scree.name} ({n_acc} accesses, default sizes, baselines)")
    print(f"  fast       {fmt(doc['replay_shared']['fast'])}")
    print(f"  reference  {fmt(doc['replay_shared']['reference'])}   ({doc['replay_shared']['reference_over_fast']:.1f}x the fast time)")
    print(f"  counts equal: {same}")
    print(f"\nplan --shape (24 layers, top-6 of 64, {doc['plan_shape']['tokens']} tokens, default policies) {' '.join(PLAN_ARGS)}")
    print(f"  fast       {fmt(doc['plan_shape']['fast'])}   recommends {plan_rec['split']} {plan_rec['policy']} "
          f"at {plan_rec['tok_s']:.4g} tok/s")
    if base is not None:
        if base.get("seconds") is not None:
            same_rec = base["recommended"] == plan_rec
            print(f"  base       {base['seconds']:7.2f} s (1 run)   recommends {base['recommended']['split']} "
                  f"{base['recommended']['policy']}; the same recommendation: {same_rec}")
        else:
            print(f"  base       did not finish: {base}")
    print(f"\naccesses per second per policy, shared pool of {replay.shared_slots(128)} slots on scree "
          f"(reference on the first {args.reference_tokens} tokens)")
    w = max(len(n) for n in pol)
    print(f"  {'policy':<{w}}  {'fast':>12}  {'reference':>12}  ratio")
    for name, row in pol.items():
        f, r = row["fast"]["accesses_per_s"], row["reference"]["accesses_per_s"]
        print(f"  {name:<{w}}  {f / 1e6:9.2f} M/s  {r / 1e6:9.3f} M/s  {f / r:5.1f}x")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
