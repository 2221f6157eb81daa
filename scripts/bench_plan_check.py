#!/usr/bin/env python3
"""The planner's recommendation run on text it did not route, against its prediction before and after the
self-check's correction (issue 24: "within 15% of the prediction" at three cap/link pairs).

For each pair, ``moerun.plan`` on pebble (routing recorded from the first 2,048 held-out tokens) chooses a setting
and checks it (``moerun.planner.selfcheck``: 3 runs from the first 32 held-out tokens, the compute costs corrected
beyond the noise). Then the chosen settings are run ``--rounds`` times, pairs interleaved, each run a fresh engine
generating ``--tokens`` tokens from a prompt taken from held-out text the plan never routed (token 10,000 on, a
new window each round). Printed per pair: the prediction before the check, after it, the median measured speed
with its spread, and both errors.

It imports ``_bench`` first (one BLAS thread).
"""

from __future__ import annotations

import argparse
import json
import statistics

import _bench  # first: one BLAS thread before numpy is imported

import moerun
from moerun.files.bundled import resolve_model
from moerun.files.config import ModelConfig
from moerun.model.tokenizer import Tokenizer, read_text_file
from moerun.planner import selfcheck

PAIRS = [("13MiB", 1e9), ("15MiB", 2e9), ("17MiB", 4e9)]
OTHER_TEXT_FROM = 10_000  # held-out tokens before this are never routed by the plan (it records the first 2,048)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=5)
    ap.add_argument("--tokens", type=int, default=256)
    ap.add_argument("--json", metavar="FILE")
    a = ap.parse_args()
    d = resolve_model("pebble")
    c = ModelConfig.load(d)
    ids = Tokenizer.load(d, c.vocab_size, c.bos_token_id).encode_array(read_text_file(d / "heldout.txt")).tolist()
    prompts = [ids[OTHER_TEXT_FROM + 1000 * r: OTHER_TEXT_FROM + 1000 * r + 32] for r in range(a.rounds)]
    plans = []
    for cap, link in PAIRS:
        _bench.log(f"plan at {cap}, {link / 1e9:g} GB/s ...")
        r = moerun.plan("pebble", mem_cap=cap, link_speed=link)
        ck = r.check
        plans.append({"cap": cap, "link": link, "rec": r.recommended, "cap_bytes": r.mem_cap_bytes,
                      "before": ck.predicted_tok_s, "after": r.recommended.tok_s, "check": ck.to_json()})
    runs = {i: [] for i in range(len(plans))}
    for rnd in range(a.rounds):
        for i, p in enumerate(plans):
            kw = selfcheck.engine_kwargs(p["rec"], p["cap_bytes"], p["link"], False)
            tok_s, _ = selfcheck.run_once(d, kw, prompts[rnd], a.tokens, seed=100 + rnd)
            runs[i].append(tok_s)
        _bench.log(f"round {rnd + 1} of {a.rounds}")
    out = []
    print("cap     link     setting                                before  after  measured (spread)  err before  err after")
    for i, p in enumerate(plans):
        med = statistics.median(runs[i])
        spread = (max(runs[i]) - min(runs[i])) / med
        rec = p["rec"]
        how = f"{'shared' if rec.shared else ','.join(map(str, rec.slots))} {rec.policy} pf{rec.prefetch}"
        eb, ea = p["before"] / med - 1, p["after"] / med - 1
        print(f"{p['cap']:7} {p['link'] / 1e9:g} GB/s  {how:38} {p['before']:6.0f} {p['after']:6.0f}  {med:6.0f} ({100 * spread:.0f}%)"
              f"       {100 * eb:+6.1f}%    {100 * ea:+6.1f}%")
        out.append({"cap": p["cap"], "link": p["link"], "setting": how, "predicted_before_tok_s": p["before"],
                    "predicted_after_tok_s": p["after"], "runs_tok_s": runs[i], "median_tok_s": med, "spread": spread,
                    "error_before": eb, "error_after": ea, "check": p["check"]})
    if a.json:
        with open(a.json, "w") as f:
            json.dump(out, f, indent=2)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
