#!/usr/bin/env python3
"""The planner's predictions against measured decode speed, over the settings users choose from.

Part 1, the bundled model over emulated links: pebble as F32 and with 8-bit and 4-bit experts
(``moerun quantize``, into a temporary directory), policies lru and markov, prefetch off, 1 and
2 guesses, 4 caps, 2 links (every combination for F32; prefetch off and 2 at 2 caps for the
quantized variants).  Part 2 (``--realistic``), real reads at realistic expert sizes: a random
model (``moerun synth``) with 4 layers of 8 experts of 33 MiB (1.1 GB in all) runs with pebble's
routing replayed from a trace (``moerun.load(routing=...)``), its experts read from this
machine's storage warm (page cache) and cold (each read from the device, as the probe's cold
path), the planner fed the probe's page-in times (``moerun probe --save``) and no emulated link.

For each model: a fresh calibration (not cached; its flags are printed), one routing trace from a
resident session of ``--gens`` generations (every capped run routes exactly the same, since
offloading never changes numbers), then for every pair the prediction and the measured decode
speed: ``--repeats`` runs, interleaved over the pairs, median kept and the spread printed beside
the error.  Goal: max error 10% on the bundled model, 15% at realistic sizes.

It imports ``_bench`` first, before numpy and moerun: one BLAS thread, and the helpers the
benchmarks share.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

import _bench  # first: one BLAS thread before numpy is imported; the shared helpers

import moerun
from moerun.planner.calibration import calibrate, costs_from_calibration, describe, page_seconds
from moerun.planner.timeline import predict
from moerun.prober.pagein import load_probe
from moerun.runtime.budget import fixed_bytes, slot_bytes
from moerun.units import parse_rate


def timed_run(model, gens, max_new, seed, **kw):
    """Decode tok/s of one engine generating ``gens`` times from token i (and its trace, with ``trace=True``)."""
    got = _bench.session(model, [[i] for i in range(gens)], max_new, seed, tokenizer=False, **kw)
    return got["tok_s"], got["trace"], got["slots"]


def layout(model):
    with moerun.load(model, tokenizer=False) as eng:
        st, c = eng.store, eng.config
        return c, sum(fixed_bytes(c, st.dense_nbytes, st.codec.scratch_bytes())), slot_bytes(st.expert_nbytes), st.expert_nbytes


def measure_pairs(pairs, repeats, gens, max_new, seed):
    """Every pair measured ``repeats`` times, interleaved: median and spread."""
    runs = {i: [] for i in range(len(pairs))}
    for _ in range(repeats):
        for i, p in enumerate(pairs):
            runs[i].append(timed_run(p["model"], gens, max_new, seed, **p["load"])[0])
    for i, p in enumerate(pairs):
        tok = runs[i]
        p["measured_tok_s"] = statistics.median(tok)
        p["runs_tok_s"] = tok
        p["spread"] = (max(tok) - min(tok)) / p["measured_tok_s"]
        p["rel_error"] = abs(p["predicted_tok_s"] - p["measured_tok_s"]) / p["measured_tok_s"]
    return pairs


def bundled_pairs(a, tmp: Path) -> tuple[list, dict]:
    src = Path(a.model or moerun.default_model_dir())
    models = {"F32": src}
    for bits in (8, 4):
        out = tmp / f"q{bits}"
        subprocess.run([sys.executable, "-m", "moerun", "quantize", "--model", str(src), "--expert-bits", str(bits), "--no-score",
                        str(out)], check=True, stdout=subprocess.DEVNULL)
        models[f"{bits}-bit experts"] = out
    links = [parse_rate(x) for x in a.links.split(",")]
    pairs, cals = [], {}
    for fmt, model in models.items():
        cal = calibrate(model, recalibrate=True, cache=False)
        cals[fmt] = {"text": describe(cal), "flags": cal["flags"], "step_spread": cal["step_spread"]}
        c, fixed, slot, nbytes = layout(model)
        _, trace, _ = timed_run(model, a.gens, a.max_new, a.seed, trace=True)
        full = fmt == "F32"
        per_layer = (2, 3, 4, 6) if full else (3, 4)
        for link in links:
            page, src_note = page_seconds(nbytes, link_speed=link)
            costs = costs_from_calibration(cal, page, src_note, emulated=True)
            for s in per_layer:
                cap = fixed + s * c.n_layers * slot
                for policy in ("lru", "markov"):
                    for pf in ((0, 1, 2) if full else (0, 2)):
                        slots = [s] * c.n_layers
                        pred = predict(trace, slots, policy, pf, 1, costs)
                        pairs.append({"format": fmt, "model": model, "link_bytes_s": link, "cap_bytes": cap, "slots": slots,
                                      "policy": policy, "prefetch": pf, "predicted_tok_s": pred.tok_s,
                                      "load": {"mem_cap": cap, "slots": slots, "evict": policy, "prefetch": pf, "link_speed": link}})
    return pairs, cals


def realistic_pairs(a, tmp: Path) -> tuple[list, dict]:
    model = tmp / "big"
    subprocess.run([sys.executable, "-m", "moerun", "synth", "--layers", "4", "--experts", "8", "--top-k", "2", "--d-model", "1024",
                    "--d-expert", "2816", str(model)], check=True, stdout=subprocess.DEVNULL)
    probe_file = tmp / "probe.json"
    subprocess.run([sys.executable, "-m", "moerun", "probe", "--model", str(model), "--runs", "8", "--save", str(probe_file)],
                   check=True, stdout=subprocess.DEVNULL)
    probe = load_probe(probe_file)
    src = Path(a.model or moerun.default_model_dir())
    _, routing, _ = timed_run(src, 1, a.real_tokens, a.seed, trace=True)  # a trained model's routing
    cal = calibrate(model, recalibrate=True, cache=False)
    c, fixed, slot, nbytes = layout(model)
    _, trace, _ = timed_run(model, 1, a.real_tokens, a.seed, trace=True, routing=routing)
    pairs = []
    for regime in ("warm", "cold"):
        page, src_note = page_seconds(nbytes, probe=probe, regime=regime)
        costs = costs_from_calibration(cal, page, src_note, emulated=False)
        for s in (3, 4, 6):  # prefetch off: the random model's own routers would guess at random
            cap = fixed + s * c.n_layers * slot
            for pf in (0,):
                slots = [s] * c.n_layers
                pred = predict(trace, slots, "lru", pf, 1, costs)
                pairs.append({"format": f"synth F32, {nbytes / 2**20:.0f} MiB experts, {regime}", "model": model, "cap_bytes": cap,
                              "slots": slots, "policy": "lru", "prefetch": pf, "regime": regime, "predicted_tok_s": pred.tok_s,
                              "page_us": page * 1e6,
                              "load": {"mem_cap": cap, "slots": slots, "prefetch": pf, "routing": routing, "cold_reads": regime == "cold"}})
    return pairs, {"synth": {"text": describe(cal), "flags": cal["flags"], "step_spread": cal["step_spread"]},
                   "expert_bytes": nbytes, "total_bytes": nbytes * c.n_layers * c.n_experts}


def show(title, pairs, goal):
    print(title)
    print(f"{'format':<34}{'link':>9}{'cap MiB':>9}{'policy':>8}{'pf':>4}{'predicted':>11}{'measured':>10}{'spread':>8}{'error':>8}")
    for p in pairs:
        link = f"{p['link_bytes_s'] / 1e9:.1f}GB/s" if "link_bytes_s" in p else p.get("regime", "")
        print(f"{p['format']:<34}{link:>9}{p['cap_bytes'] / 2**20:>9.1f}{p['policy']:>8}{p['prefetch'] or 'off':>4}"
              f"{p['predicted_tok_s']:>11.1f}{p['measured_tok_s']:>10.1f}{100 * p['spread']:>7.0f}%{100 * p['rel_error']:>7.1f}%")
    worst = max(p["rel_error"] for p in pairs)
    within = sum(p["rel_error"] <= goal for p in pairs)
    print(f"max error {100 * worst:.1f}% over {len(pairs)} pairs (goal {100 * goal:.0f}%); {within} within the goal; "
          f"median spread of the measurements {100 * statistics.median(p['spread'] for p in pairs):.0f}%\n")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--model", default=None)
    ap.add_argument("--max-new", type=int, default=240)
    ap.add_argument("--gens", type=int, default=2, help="generations per measured run")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--links", default="1.5GB/s,3GB/s", help="emulated link speeds")
    ap.add_argument("--realistic", action="store_true", help="also part 2: 1.1 GB random model, real reads warm and cold")
    ap.add_argument("--skip-bundled", action="store_true", help="part 2 only")
    ap.add_argument("--real-tokens", type=int, default=48, help="decode tokens per realistic run")
    ap.add_argument("--dir", default=None, help="where the temporary models go (default: a new temporary directory)")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args()
    with tempfile.TemporaryDirectory(dir=a.dir) as d:
        tmp = Path(d)
        pairs, cals = ([], {}) if a.skip_bundled else bundled_pairs(a, tmp)
        measure_pairs(pairs, a.repeats, a.gens, a.max_new, a.seed)
        real, real_cal = ([], {})
        if a.realistic:
            real, real_cal = realistic_pairs(a, tmp)
            measure_pairs(real, a.repeats, 1, a.real_tokens, a.seed)
    clean = lambda rows: [{k: (str(v) if k == "model" else v) for k, v in r.items() if k != "load"} for r in rows]  # noqa: E731
    doc = {"blas_threads": 1, "host": os.uname().nodename, "calibrations": cals, "rows": clean(pairs),
           "max_rel_error": max((p["rel_error"] for p in pairs), default=None), "pairs": len(pairs)}
    if real:
        doc.update({"realistic": real_cal, "realistic_rows": clean(real), "realistic_max_rel_error": max(p["rel_error"] for p in real)})
    if a.json:
        print(json.dumps(doc, indent=2))
        return 0
    print(f"planner against measurement; {a.gens} x {a.max_new} tokens per run, median of {a.repeats} interleaved runs; "
          f"{_bench.BLAS_NOTE}; links emulated")
    for fmt, cal in cals.items():
        print(f"{fmt}: {cal['text']}")
    print()
    if pairs:
        show("bundled model, emulated links", pairs, 0.10)
    if real:
        print(f"synth: {real_cal['synth']['text']}")
        show(f"realistic sizes ({real_cal['expert_bytes'] / 2**20:.0f} MiB experts, {real_cal['total_bytes'] / 1e9:.2f} GB), "
             "real reads, pebble's routing replayed", real, 0.15)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
