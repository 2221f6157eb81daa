#!/usr/bin/env python3
"""Warm starts from a routing profile against cold starts, live, on both bundled models.

One generation per run: a prompt of ``--prompt-tokens`` tokens of the model's held-out text, then ``--max-new``
tokens greedily, with per-layer quotas under two caps (a third and two thirds of the way from the smallest cap to
all resident), LRU, no prefetch, over an emulated link of ``--link`` (labelled emulated: the page cache would make
a read nearly free here).  Three starts, interleaved, ``--repeats`` runs each (the order rotates every round):

- cold: the pool starts empty (the engine as it was);
- warm, other text: filled from a profile of held-out text the run never sees (``--other-tokens`` tokens from
  ``--other-at``);
- warm, same text: filled from a profile of the run's own text (the prompt and what a cold run generated).

Per start and cap: the decode hit rate; the experts read before the first token (the fill) and by the prompt's
prefill; the fill's time; the time to the first token (prefill, the fill included); decode tok/s; and end-to-end
tok/s (new tokens over prefill plus decode time).  Medians, with min-max over the runs, and the ratio of medians
warm/cold.  Every run's tokens are checked against the cold run's (a warm start must not change the output).

Then, in replay (no timing): the first ``--replay-tokens`` tokens of the held-out text recorded teacher-forced
(every token a decode step, so the prefill block of a prompt does not sweep the pool first), replayed for lru and
the optimum at the same quotas, cold, warm from the other text's profile, and warm from this text's own.

Usage: python scripts/bench_warm.py [--repeats N] [--max-new N] [--link RATE] [--json]
It imports ``_bench`` first: one BLAS thread, and the helpers the benchmarks share.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import tempfile
from pathlib import Path

import _bench  # first: one BLAS thread before numpy is imported; the shared helpers

import moerun
from moerun.cli.report import table
from moerun.runtime.budget import minimum_cap

ROOT = Path(__file__).resolve().parent.parent
MODELS = ("pebble", "scree")
STARTS = ("cold", "warm, other text", "warm, same text")


def caps(model: Path) -> list[int]:
    with moerun.load(model, tokenizer=False) as eng:
        st = eng.store
        lo, hi = minimum_cap(st.config, st.dense_nbytes, st.expert_nbytes, "even"), eng.budget.total
    return [lo + (hi - lo) // 3, lo + 2 * (hi - lo) // 3]


def one_run(model: Path, prompt: list[int], max_new: int, cap: int, link: str, warm: Path | None) -> dict:
    with moerun.load(model, mem_cap=cap, link_speed=link, warm_from=warm) as eng:
        gen = eng.generate(prompt_ids=prompt, max_new=max_new)
        pool = eng.stats["pool"]
    return {"tokens": gen.new_ids, "hit_rate": pool["hit_rate"], "warm_loads": pool["warm_loads"], "warm_s": pool["warm_s"],
            "prefill_loads": pool["prefill_loads"], "first_token_s": gen.prefill_ns / 1e9, "decode_tok_s": gen.decode_tok_s,
            "end_to_end_tok_s": len(gen.new_ids) / ((gen.prefill_ns + gen.decode_ns) / 1e9)}


def med(runs: list[dict], key: str) -> tuple[float, float, float]:
    xs = [r[key] for r in runs]
    return statistics.median(xs), min(xs), max(xs)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--prompt-tokens", type=int, default=4)
    ap.add_argument("--replay-tokens", type=int, default=1000)
    ap.add_argument("--max-new", type=int, default=48)
    ap.add_argument("--other-at", type=int, default=3000)
    ap.add_argument("--other-tokens", type=int, default=1500)
    ap.add_argument("--link", default="1GB/s")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    out = {"link_emulated": args.link, "repeats": args.repeats, "max_new": args.max_new, "models": {}}
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        for name in MODELS:
            model = ROOT / "tiny_models" / name
            with moerun.load(model) as eng:
                tok = eng.tokenizer
                ids = tok.encode((model / "heldout.txt").read_text())  # opened by the bos token
            prompt = list(ids[: args.prompt_tokens])
            other = work / f"{name}_other.txt"
            other.write_text(tok.decode(list(ids[args.other_at : args.other_at + args.other_tokens])))
            moerun.profile(work / f"{name}_other.json", model, other)
            cap_list = caps(model)
            ref = one_run(model, prompt, args.max_new, cap_list[0], args.link, None)["tokens"]
            same = work / f"{name}_same.txt"
            same.write_text(tok.decode(prompt + ref))
            moerun.profile(work / f"{name}_same.json", model, same)
            profiles = {"cold": None, "warm, other text": work / f"{name}_other.json", "warm, same text": work / f"{name}_same.json"}
            runs = {(cap, s): [] for cap in cap_list for s in STARTS}
            for r in range(args.repeats):
                order = [(cap, s) for cap in cap_list for s in STARTS]
                k = r % len(order)
                for cap, s in order[k:] + order[:k]:
                    _bench.log(f"{name} cap {cap} {s} run {r + 1}")
                    got = one_run(model, prompt, args.max_new, cap, args.link, profiles[s])
                    if got["tokens"] != ref:
                        raise SystemExit(f"{name} {s}: the tokens differ from the cold run's")
                    runs[(cap, s)].append(got)
            out["models"][name] = {f"{cap}|{s}": v for (cap, s), v in runs.items()}
            rows = []
            for cap in cap_list:
                base = {k: med(runs[(cap, "cold")], k)[0] for k in ("decode_tok_s", "end_to_end_tok_s", "first_token_s")}
                for s in STARTS:
                    rr = runs[(cap, s)]
                    hr, fill_n = rr[0]["hit_rate"], rr[0]["warm_loads"]

                    def cell(key, fmt, scale=1.0, rr=rr):
                        m, lo, hi = med(rr, key)
                        return f"{fmt.format(m * scale)} ({fmt.format(lo * scale)}-{fmt.format(hi * scale)})"

                    rows.append([f"{cap / 2**20:.1f} MiB", s, f"{100 * hr:.1f}%", fill_n, rr[0]["prefill_loads"],
                                 cell("warm_s", "{:.2f}", 1e3), cell("first_token_s", "{:.2f}", 1e3),
                                 f"{med(rr, 'first_token_s')[0] / base['first_token_s']:.2f}",
                                 cell("decode_tok_s", "{:.0f}"), f"{med(rr, 'decode_tok_s')[0] / base['decode_tok_s']:.3f}",
                                 cell("end_to_end_tok_s", "{:.0f}"), f"{med(rr, 'end_to_end_tok_s')[0] / base['end_to_end_tok_s']:.3f}"])
            trace = work / f"{name}_text.npz"
            moerun.record(trace, model, max_tokens=args.replay_tokens)
            moerun.profile(work / f"{name}_text.json", model, from_trace=trace)
            with moerun.load(model, mem_cap=cap_list[0]) as e0, moerun.load(model, mem_cap=cap_list[1]) as e1:
                quotas = sorted({*e0.budget.slots, *e1.budget.slots})
            warm_of = {"cold": None, "warm, other text": work / f"{name}_other.json", "warm, same text": work / f"{name}_text.json"}
            rep = {s: moerun.replay(trace, "lru,optimal", quotas, baselines=False, warm_from=w).to_json() for s, w in warm_of.items()}
            rep_rows = []
            for pol in ("lru", "optimal"):
                for s in STARTS:
                    by = {r["slots"]: r for r in rep[s]["results"] if r["layer"] == "all" and r["policy"] == pol}
                    rep_rows.append([pol, s] + [f"{100 * by[q]['hit_rate']:.1f}%" for q in quotas])
            out["models"][name]["replay"] = {s: d["results"] for s, d in rep.items()}
            if not args.json:
                print(f"\n{name}: replay of {args.replay_tokens} held-out tokens (teacher-forced, every token a decode step)")
                print(table(["policy", "start"] + [f"{q} slots/layer" for q in quotas], rep_rows))
            if not args.json:
                print(f"\n{name}: prompt {len(prompt)} tokens, {args.max_new} new (greedy), lru, per-layer quotas, link "
                      f"{args.link} (emulated); medians of {args.repeats} interleaved runs (min-max)")
                print(table(["cap", "start", "decode hit rate", "filled", "prefill reads", "fill ms", "first token ms",
                             "x cold", "decode tok/s", "x cold", "end-to-end tok/s", "x cold"], rows))
    if args.json:
        json.dump(out, sys.stdout, default=lambda o: o.tolist() if hasattr(o, "tolist") else str(o))
        print()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
