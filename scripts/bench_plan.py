#!/usr/bin/env python3
"""The planner's predictions against measured decode speed on the bundled model, in one run.

1. Calibrate compute times (fresh, not cached).
2. Generate once fully resident with a trace: the routing every capped run will follow
   (offloading never changes numbers, so every run below routes exactly the same).
3. For each cap and each emulated link speed: predict decode tok/s from that trace, then
   measure it (best of --repeats runs, same prompt and seed), with prefetch off and on.
Prints each pair and max_rel_error; the goal is at most 20%.
"""

from __future__ import annotations

import argparse
import json

import _bench

import moerun
from moerun.budget import fixed_bytes, slot_bytes
from moerun.plan import calibrate, costs_from_calibration, page_seconds, predict
from moerun.sampling import Sampling


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--model", default=None)
    ap.add_argument("--max-new", type=int, default=160)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--links", default="1GB/s,3GB/s", help="emulated link speeds")
    ap.add_argument("--prefetch", type=int, default=2, help="guesses for the prefetch rows (0 = skip them)")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args()
    model = a.model or moerun.default_model_dir()
    sampling = Sampling(temperature=0.8, seed=a.seed)
    cal = calibrate(model, recalibrate=True, cache=False)
    with moerun.load(model) as eng:
        c = eng.config
        eng.start_trace()
        eng.generate("", max_new=a.max_new, sampling=sampling)
        trace = eng.finish_trace()
        st = eng.store
        fixed = sum(fixed_bytes(c, st.dense_nbytes, st.codec.scratch_bytes()))
        slot = slot_bytes(st.expert_nbytes)
        expert_nbytes = st.expert_nbytes
    totals = [c.n_layers * s for s in (2, 3, 4, 6)]  # slots in all: 4 caps
    rows = []
    for link in [moerun.units.parse_rate(x) for x in a.links.split(",")]:
        page, src = page_seconds(expert_nbytes, link_speed=link)
        costs = costs_from_calibration(cal, page, src)
        for total in totals:
            cap = fixed + total * slot
            for pf in ((0, a.prefetch) if a.prefetch else (0,)):
                with moerun.load(model, mem_cap=cap, tokenizer=False) as probe_eng:
                    slots = list(probe_eng.budget.slots)
                pred = predict(trace, slots, "lru", pf, 1, costs)
                best = 0.0
                for _ in range(a.repeats):
                    with moerun.load(model, mem_cap=cap, link_speed=link, prefetch=pf) as eng:
                        g = eng.generate("", max_new=a.max_new, sampling=sampling)
                        best = max(best, g.decode_tok_s)
                rows.append({"link_bytes_s": link, "link_emulated": True, "cap_bytes": cap, "slots": slots, "prefetch": pf,
                             "predicted_tok_s": pred.tok_s, "measured_tok_s": best,
                             "rel_error": abs(pred.tok_s - best) / best, "predicted_hit_rate": pred.hit_rate})
    doc = {"model": str(model), "blas_threads": 1, "calibration": {k: cal[k] for k in ("attn_s", "expert_s", "head_s", "wait_s", "loader_s")},
           "trace_tokens": trace.n_tokens, "rows": rows, "max_rel_error": max(r["rel_error"] for r in rows)}
    if a.json:
        print(json.dumps(doc, indent=2))
        return 0
    print(f"planner against measurement, {a.max_new} tokens, best of {a.repeats}; {_bench.BLAS_NOTE}; links emulated")
    print(f"{'link':>9} {'cap MiB':>8} {'slots':>9} {'prefetch':>8} {'predicted':>10} {'measured':>9} {'error':>7}")
    for r in rows:
        print(f"{r['link_bytes_s'] / 1e9:>5.1f} GB/s {r['cap_bytes'] / 2**20:>8.1f} {','.join(map(str, r['slots'])):>9} "
              f"{r['prefetch'] or 'off':>8} {r['predicted_tok_s']:>10.0f} {r['measured_tok_s']:>9.0f} {100 * r['rel_error']:>6.1f}%")
    print(f"max_rel_error {100 * doc['max_rel_error']:.1f}% (goal 20%)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
