#!/usr/bin/env python3
"""Decode speed under a memory cap and an emulated link: the pool against naive offloading.

One run, same prompt, seed and cap for every configuration:
  bare         every expert resident, no pool machinery at all
  resident     every expert resident, served through the pool
  whole-layer  each time a layer runs, all of its experts are paged in
  no-reuse     only the chosen experts are paged in, every time, no cache
  lru          the pool under the cap, LRU eviction
  prefetch     the pool under the cap, LRU + speculative prefetch (--prefetch N guesses)
  auto         the same with --prefetch auto (each layer guesses only while its guesses pay)
  oracle       LRU + prefetch whose guesses are the experts the layers will choose (the
               run's own routing replayed): the most any guess rule could give
  markov       the pool under the cap, markov eviction (with and without prefetch)
The cap is about a third of the expert bytes (plus dense weights, KV cache and
scratch).  The link speed is emulated (sleeping page-ins) and chosen from a
calibration run so that LRU alone spends about half of its decode time stalled.
Then LRU, LRU + prefetch and auto again with ``--busy 1,2`` CPU-bound processes of our
own running beside them, and a table of the three at other links (``--links``).

With ``--evict lru,markov`` it compares eviction policies instead, live: a cap of
``--slots-per-layer`` experts per layer, one session per run (one engine, every
``--session-prompts`` prompt generated in turn, so the pool and the policy carry over
as in a server), the link calibrated so that LRU stalls about half the time, each
policy with prefetch off and on, runs interleaved over ``--repeats``; best and median
decode tok/s per configuration, and the tokens checked against a resident session.

It imports ``_bench`` before numpy and moerun (one BLAS thread; the shared helpers).
"""

from __future__ import annotations

import argparse
import json

import _bench  # first: one BLAS thread before numpy is imported; the shared helpers

import moerun
from moerun.runtime.budget import fixed_bytes, slot_bytes
from moerun.units import fmt_bytes, parse_rate


def decode(model, prompt, a, **kw) -> dict:
    """``a.gens`` generations of one prompt in one engine (the pool carries over): ``_bench.session``."""
    return _bench.session(model, [prompt] * a.gens, a.max_new, a.seed, **kw)


def compare_policies(a, model) -> int:
    """Live decode speed of eviction policies at one cap and one emulated link (see the module docstring)."""
    import statistics

    names = [n.strip() for n in a.evict.split(",") if n.strip()]
    if "lru" not in names:
        names.insert(0, "lru")
    prompts = _bench.SESSION_PROMPTS[: a.session_prompts]
    with moerun.load(model, tokenizer=False) as eng:
        st = eng.store
        c = st.config
        d, kv, s = fixed_bytes(c, st.dense_nbytes, st.codec.scratch_bytes())
        per = slot_bytes(st.expert_nbytes)
    n = a.slots_per_layer
    slots = [n] * c.n_layers
    cap = d + kv + s + n * c.n_layers * per
    ref = _bench.session(model, prompts, a.max_new, a.seed)
    if a.link_speed:
        rate = parse_rate(a.link_speed)
    else:  # LRU at real speed, then the rate at which its page-in time equals its compute time
        cal = _bench.session(model, prompts, a.max_new, a.seed, mem_cap=cap, slots=slots)
        rate = cal["misses"] * st.expert_nbytes / max(cal["total_s"] - cal["stall_s"], 1e-6)
    configs = [(name, pf) for name in names for pf in (0, a.prefetch)]
    runs: dict = {cfg: [] for cfg in configs}
    for _ in range(a.repeats):  # interleaved, so every configuration sees the same background load
        for name, pf in configs:
            runs[(name, pf)].append(_bench.session(model, prompts, a.max_new, a.seed, mem_cap=cap, slots=slots, evict=name,
                                            prefetch=pf, lookahead=a.lookahead, link_speed=rate))
    rows = []
    for (name, pf), rs in runs.items():
        tok = [r["tok_s"] for r in rs]
        rows.append({"policy": name, "prefetch": pf, "best_tok_s": max(tok), "median_tok_s": statistics.median(tok), "tok_s": tok,
                     "hit_rate": rs[0]["hit_rate"], "misses": rs[0]["misses"],
                     "stall_share": statistics.median(r["stall_s"] / r["total_s"] for r in rs),
                     "same_tokens_as_resident": all(r["tokens"] == ref["tokens"] for r in rs)})
    base = {r["prefetch"]: r for r in rows if r["policy"] == "lru"}
    for r in rows:
        b = base[r["prefetch"]]
        r["best_vs_lru"] = r["best_tok_s"] / b["best_tok_s"]
        r["median_vs_lru"] = r["median_tok_s"] / b["median_tok_s"]
    doc = {"model": str(model), "blas_threads": 1, "prompts": prompts, "max_new": a.max_new, "seed": a.seed, "cap_bytes": cap,
           "slots": slots, "expert_bytes": st.expert_nbytes, "link_speed_bytes_s": rate, "link_emulated": True,
           "prefetch": a.prefetch, "lookahead": a.lookahead, "repeats": a.repeats, "resident_tok_s": ref["tok_s"],
           "decode_steps_per_session": ref["steps"], "results": rows,
           "note": "shared 2-vCPU machine: runs interleaved; best and median of the repeats"}
    if a.json:
        print(json.dumps(doc, indent=2))
        return 0
    print(f"model {model}; {n} slots per layer, cap {fmt_bytes(cap)}; link {rate / 1e9:.3f} GB/s (emulated, LRU stalls about half "
          f"the time); {len(prompts)} prompts x {a.max_new} tokens per session ({ref['steps']} decode steps); "
          f"{a.repeats} interleaved repeats; {_bench.BLAS_NOTE}")
    print(f"resident (no cap, no link) {ref['tok_s']:.0f} tok/s")
    print(f"{'policy':<10}{'prefetch':>9}{'best tok/s':>12}{'median tok/s':>14}{'vs lru (best/median)':>22}{'hit rate':>10}"
          f"{'stall share':>13}{'tokens same':>13}")
    for r in rows:
        print(f"{r['policy']:<10}{r['prefetch']:>9}{r['best_tok_s']:>12.0f}{r['median_tok_s']:>14.0f}"
              f"{r['best_vs_lru']:>12.2f}x/{r['median_vs_lru']:.2f}x{100 * r['hit_rate']:>9.1f}%{100 * r['stall_share']:>12.1f}%"
              f"{str(r['same_tokens_as_resident']):>13}")
    return 0


def spread(rows: list[dict]) -> dict:
    import statistics

    tok = [r["tok_s"] for r in rows]
    return {"best": max(tok), "median": statistics.median(tok), "worst": min(tok), "runs": tok,
            "spread": (max(tok) - min(tok)) / max(tok) if max(tok) else 0.0}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--model", default=None, help="model directory (default: the bundled model)")
    ap.add_argument("--prompt", default="<doc>")
    ap.add_argument("--max-new", type=int, default=240)
    ap.add_argument("--gens", type=int, default=3, help="generations per run, one engine (default 3: about 700 decode steps)")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--prefetch", type=int, default=2)
    ap.add_argument("--lookahead", type=int, default=1)
    ap.add_argument("--prefetch-from", default="attention", choices=("attention", "output"))
    ap.add_argument("--link-speed", default=None, help="fix the emulated link instead of calibrating it")
    ap.add_argument("--links", default="1GB/s,2GB/s,3GB/s,6GB/s", help="links of the per-link table ('' for none)")
    ap.add_argument("--busy", default="1,2", help="counts of CPU-bound processes of our own beside the busy rows ('' or 0: none)")
    ap.add_argument("--repeats", type=int, default=7, help="runs per configuration, interleaved; median, best and spread are kept")
    ap.add_argument("--evict", default=None, help="compare these eviction policies live instead, e.g. lru,markov")
    ap.add_argument("--slots-per-layer", type=int, default=4, help="with --evict: expert slots per layer (default 4)")
    ap.add_argument("--session-prompts", type=int, default=len(_bench.SESSION_PROMPTS), help="with --evict: prompts per session")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args()
    model = a.model or moerun.default_model_dir()
    if a.evict:
        return compare_policies(a, model)
    prompt = "" if a.prompt == "<doc>" else a.prompt

    with moerun.load(model, tokenizer=False) as eng:
        st = eng.store
        c = st.config
        d, kv, s = fixed_bytes(c, st.dense_nbytes, st.codec.scratch_bytes())
        expert_total = st.expert_total_nbytes
        per = slot_bytes(st.expert_nbytes)
    n_slots = max(c.n_layers * c.top_k, round(expert_total / 3 / per))
    n_slots = max(n_slots, c.n_experts)  # whole-layer needs one layer's worth of slots
    cap = d + kv + s + n_slots * per

    if a.link_speed:
        rate = parse_rate(a.link_speed)
    else:  # calibrate: LRU at real speed, then the rate at which page-in time equals compute time (best of 3)
        rates = []
        for _ in range(3):
            cal = decode(model, prompt, a, mem_cap=cap)
            misses = cal["stats"]["pool"]["misses"]
            compute_s = cal["decode_s"] - cal["stall_s"]
            rates.append(misses * st.expert_nbytes / max(compute_s, 1e-6))
        rate = max(rates)
    pf = {"prefetch": a.prefetch, "lookahead": a.lookahead, "prefetch_from": a.prefetch_from}
    auto = {**pf, "prefetch": "auto"}
    link = {"link_speed": rate}
    oracle = _bench.session(model, [prompt] * a.gens, a.max_new, a.seed, trace=True)["trace"]  # the routing to foresee
    configs = {
        "bare": {"bare": True},
        "resident": {},
        "resident_prefetch": dict(pf),
        "whole_layer": {"baseline": "whole-layer", **link},
        "no_reuse": {"baseline": "no-reuse", **link},
        "lru": {"mem_cap": cap, **link},
        "prefetch": {"mem_cap": cap, **pf, **link},
        "auto": {"mem_cap": cap, **auto, **link},
        "oracle": {"mem_cap": cap, **pf, **link, "oracle": oracle},
        "markov": {"mem_cap": cap, "evict": "markov", **link},
        "markov_prefetch": {"mem_cap": cap, "evict": "markov", **pf, **link},
    }
    links = [parse_rate(x) for x in a.links.split(",") if x.strip()]
    for r in links:
        configs[f"lru@{r:g}"] = {"mem_cap": cap, "link_speed": r}
        configs[f"prefetch@{r:g}"] = {"mem_cap": cap, **pf, "link_speed": r}
        configs[f"auto@{r:g}"] = {"mem_cap": cap, **auto, "link_speed": r}
    runs: dict = {k: [] for k in configs}
    busy = [int(n) for n in a.busy.split(",") if n.strip() and int(n) > 0]
    busy_runs: dict = {f"{key}+{n}": [] for n in busy for key in ("lru", "prefetch", "auto")}
    for i in range(a.repeats):  # interleaved, so a slow spell of a shared machine hits every configuration alike
        for key, kw in configs.items():
            runs[key].append(decode(model, prompt, a, **kw))
        for n in busy:
            procs = _bench.busy_processes(n)
            try:
                for key in ("lru", "prefetch", "auto"):
                    busy_runs[f"{key}+{n}"].append(decode(model, prompt, a, **configs[key]))
            finally:
                _bench.stop_busy(procs)
        _bench.log(f"round {i + 1} of {a.repeats} done")
    import statistics

    best = {k: max(v, key=lambda r: r["tok_s"]) for k, v in runs.items()}
    median = {k: statistics.median(r["tok_s"] for r in v) for k, v in runs.items()}
    same = all(r["tokens"] == best["bare"]["tokens"] for v in list(runs.values()) + list(busy_runs.values()) for r in v)
    lru_pool = best["lru"]["stats"]["pool"]
    pf_pool = best["prefetch"]["stats"]["pool"]
    doc = {
        "model": str(model),
        "blas_threads": 1,
        "prompt": prompt,
        "max_new": a.max_new,
        "seed": a.seed,
        "cap_bytes": cap,
        "slots": best["lru"]["stats"]["budget"]["slots"],
        "expert_bytes": st.expert_nbytes,
        "experts_total_bytes": expert_total,
        "link_speed_bytes_s": rate,
        "link_emulated": True,
        "prefetch": a.prefetch,
        "lookahead": a.lookahead,
        "prefetch_from": a.prefetch_from,
        "repeats_interleaved": a.repeats,
        "busy_processes": busy,
        "lru_stall_share": best["lru"]["stall_s"] / best["lru"]["total_s"],
        "prefetch_stall_share": best["prefetch"]["stall_s"] / best["prefetch"]["total_s"],
        "lru_hit_rate": lru_pool["hit_rate"],
        "prefetch_hit_rate": pf_pool["hit_rate"],
        "markov_hit_rate": best["markov"]["stats"]["pool"]["hit_rate"],
        "prefetch_accuracy": pf_pool["prefetch"]["accuracy"],
        "prefetch_declined": pf_pool["prefetch"]["declined"],
        "prefetch_hidden_s": pf_pool["prefetch"]["hidden_s"],
        "same_tokens_everywhere": same,
        "spread": {k: spread(v) for k, v in runs.items()},
    }
    doc["tok_s_is"] = "median of the interleaved runs (best and spread under spread)"
    auto_pool = best["auto"]["stats"]["pool"]["prefetch"]
    doc["auto_counters"] = {k: auto_pool[k] for k in ("loads", "used", "wasted", "skipped", "rests")}
    for key in configs:
        if "@" not in key:
            doc[f"{key}_tok_s"] = median[key]
    for key, rows in busy_runs.items():
        doc[f"{key}_busy_tok_s"] = statistics.median(r["tok_s"] for r in rows)
        doc["spread"][f"{key}_busy"] = spread(rows)
    doc["per_link"] = [
        {"link_bytes_s": r, "lru_tok_s": median[f"lru@{r:g}"], "prefetch_tok_s": median[f"prefetch@{r:g}"],
         "auto_tok_s": median[f"auto@{r:g}"],
         "lru_stall_share": best[f"lru@{r:g}"]["stall_s"] / best[f"lru@{r:g}"]["total_s"],
         "prefetch_vs_lru": median[f"prefetch@{r:g}"] / median[f"lru@{r:g}"],
         "auto_vs_lru": median[f"auto@{r:g}"] / median[f"lru@{r:g}"]}
        for r in links
    ]
    gain = doc["oracle_tok_s"] - doc["lru_tok_s"]
    doc["ratios"] = {
        "prefetch_vs_lru": doc["prefetch_tok_s"] / doc["lru_tok_s"],
        "auto_vs_lru": doc["auto_tok_s"] / doc["lru_tok_s"],
        "oracle_vs_lru": doc["oracle_tok_s"] / doc["lru_tok_s"],
        "auto_share_of_oracle_gain": (doc["auto_tok_s"] - doc["lru_tok_s"]) / gain if gain > 0 else None,
        "markov_vs_lru": doc["markov_tok_s"] / doc["lru_tok_s"],
        "markov_prefetch_vs_lru": doc["markov_prefetch_tok_s"] / doc["lru_tok_s"],
        "prefetch_vs_whole_layer": doc["prefetch_tok_s"] / doc["whole_layer_tok_s"],
        "prefetch_vs_no_reuse": doc["prefetch_tok_s"] / doc["no_reuse_tok_s"],
        "resident_vs_bare": doc["resident_tok_s"] / doc["bare_tok_s"],
        "resident_prefetch_vs_resident": doc["resident_prefetch_tok_s"] / doc["resident_tok_s"],
    }
    for n in busy:
        lru_b = doc[f"lru+{n}_busy_tok_s"]
        doc["ratios"][f"prefetch_vs_lru_with_{n}_busy"] = doc[f"prefetch+{n}_busy_tok_s"] / lru_b
        doc["ratios"][f"auto_vs_lru_with_{n}_busy"] = doc[f"auto+{n}_busy_tok_s"] / lru_b
    if a.json:
        print(json.dumps(doc, indent=2))
        return 0
    print(f"model {model}; cap {fmt_bytes(cap)} = fixed {fmt_bytes(d + kv + s)} + {n_slots} slots of {fmt_bytes(per)} "
          f"(experts total {fmt_bytes(expert_total)}); link {rate / 1e9:.3f} GB/s (emulated, LRU about half stalled); prefetch "
          f"{a.prefetch} guesses, lookahead {a.lookahead}, from {a.prefetch_from}; {a.max_new} tokens; configurations interleaved, "
          f"{a.repeats} runs of {a.gens} generations each, median shown; {_bench.BLAS_NOTE}")
    print(f"{'configuration':<18}{'median tok/s':>14}{'spread':>9}{'stall share':>13}{'hit rate':>10}")
    rows = [(k, k.replace("_", "-")) for k in configs if "@" not in k]
    for key, label in rows:
        r = best[key]
        hr = r["stats"].get("pool", {}).get("hit_rate") if "mem_cap" in configs[key] else None
        share = r["stall_s"] / r["total_s"] if r["total_s"] else 0
        print(f"{label:<18}{median[key]:>14.0f}{100 * doc['spread'][key]['spread']:>8.0f}%{100 * share:>12.1f}%"
              f"{'' if hr is None else f'{100 * hr:.1f}%':>10}")
    for key in busy_runs:
        sp = doc["spread"][f"{key}_busy"]
        name, n = key.split("+")
        print(f"{name + f' + {n} busy':<18}{doc[key + '_busy_tok_s']:>14.0f}{100 * sp['spread']:>8.0f}%   "
              f"({n} busy process{'es' if int(n) > 1 else ''} of our own beside it)")
    if links:
        print(f"{'link (emulated)':<18}{'lru tok/s':>11}{'stall':>8}{'prefetch':>10}{'vs lru':>8}{'auto':>8}{'vs lru':>8}")
        for row in doc["per_link"]:
            print(f"{row['link_bytes_s'] / 1e9:>9.1f} GB/s     {row['lru_tok_s']:>11.0f}{100 * row['lru_stall_share']:>7.0f}%"
                  f"{row['prefetch_tok_s']:>10.0f}{row['prefetch_vs_lru']:>7.2f}x{row['auto_tok_s']:>8.0f}{row['auto_vs_lru']:>7.2f}x")
    rt = doc["ratios"]
    print(f"lru+prefetch vs lru {rt['prefetch_vs_lru']:.2f}x (goal 1.15x), vs whole-layer {rt['prefetch_vs_whole_layer']:.2f}x "
          f"(goal 3.5x), vs no-reuse {rt['prefetch_vs_no_reuse']:.2f}x; markov vs lru {rt['markov_vs_lru']:.2f}x (goal 1.08x); "
          f"resident/bare {100 * rt['resident_vs_bare']:.0f}% (goal 90%); resident with prefetch on / without "
          f"{100 * rt['resident_prefetch_vs_resident']:.0f}% (goal 97%)"
          + "".join(f"; with {n} busy: prefetch vs lru {rt[f'prefetch_vs_lru_with_{n}_busy']:.2f}x, auto vs lru "
                    f"{rt[f'auto_vs_lru_with_{n}_busy']:.2f}x" for n in busy))
    share = rt["auto_share_of_oracle_gain"]
    print(f"auto vs lru {rt['auto_vs_lru']:.2f}x (goal at least 1.0x at every link and load); oracle guesses vs lru "
          f"{rt['oracle_vs_lru']:.2f}x; auto's share of the oracle's gain "
          + (f"{100 * share:.0f}% (goal 80%)" if share is not None else "- (the oracle gained nothing)")
          + f"; auto's counters {doc['auto_counters']}")
    print(f"prefetch accuracy {100 * (doc['prefetch_accuracy'] or 0):.1f}%, {doc['prefetch_declined']} guesses declined, "
          f"page-in hidden {doc['prefetch_hidden_s'] * 1e3:.1f} ms; tokens identical in every configuration: {same}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
