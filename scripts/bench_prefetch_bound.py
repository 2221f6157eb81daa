#!/usr/bin/env python3
"""How much could any guess rule buy?  The planner on the router's guesses and on exact ones.

Records the routing of a few sampled generations on the model (fully resident: offloading never
changes routing), then predicts decode tok/s with the planner (``moerun.planner.search.predict``: the live
pool's residency and policy code, compute times calibrated on this machine) at one cap and one
emulated link, for:

  lru            no prefetch
  router NxL     the engine's rule: layer l+j's router on the state after layer l's attention
  oracle NxL     a guesser that names exactly the experts layer l+j will choose

The oracle is the ceiling for every guess rule at this prefetch point: what is left between it and
no prefetch is all that better guesses could win.  Oracles that are wrong 10% or 20% of the time
(``--wrong``) show how precise a rule must be to get near it.  The cap defaults to a third of the expert bytes,
as in bench_offload.py.

It imports ``_bench`` first, before numpy and moerun: one BLAS thread, and the helpers the
benchmarks share.
"""

from __future__ import annotations

import argparse
import json

import _bench  # first: one BLAS thread before numpy is imported; the shared helpers
import numpy as np

import moerun
from moerun.files.trace import Trace
from moerun.model.sampling import Sampling
from moerun.planner.search import calibrate, costs_from_calibration, predict
from moerun.runtime.budget import fixed_bytes, slot_bytes
from moerun.units import parse_rate, parse_size


def oracle(trace: Trace, wrong: float = 0.0, seed: int = 0) -> Trace:
    """The same trace whose guesses for layer l+j are layer l+j's chosen experts (then -1).

    With ``wrong`` > 0 each guess is replaced, with that probability, by an expert the layer
    does not choose (uniformly among them): an oracle with a given precision.
    """
    ex = trace.experts
    g = np.full_like(trace.guesses, -1)
    T, L, k = ex.shape
    E = int(trace.meta["n_experts"])
    rng = np.random.default_rng(seed)
    for j in range(1, g.shape[2] + 1):
        g[:, : L - j, j - 1, :k] = ex[:, j:, :]
    if wrong > 0:
        for t, layer, j, r in zip(*np.nonzero((g[..., :k] >= 0) & (rng.random(g[..., :k].shape) < wrong))):
            others = np.setdiff1d(np.arange(E), ex[t, layer + j + 1])
            g[t, layer, j, r] = rng.choice(others)
    return Trace(ex, trace.weights, g, dict(trace.meta), probs=trace.probs)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--model", default=None)
    ap.add_argument("--mem-cap", default=None, help="default: fixed parts + a third of the expert bytes")
    ap.add_argument("--link-speed", default="2.4GB/s", help="emulated link (default 2.4GB/s)")
    ap.add_argument("--generations", type=int, default=3)
    ap.add_argument("--max-new", type=int, default=300)
    ap.add_argument("--wrong", default="0.1,0.2", help="also oracles whose guesses are wrong this often (default 0.1,0.2)")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args()
    a.wrong = [float(x) for x in a.wrong.split(",") if x.strip()]
    model = a.model or moerun.default_model_dir()
    rate = parse_rate(a.link_speed)
    with moerun.load(model) as eng:
        st, c = eng.store, eng.config
        if a.mem_cap is None:
            d, kv, s = fixed_bytes(c, st.dense_nbytes, st.codec.scratch_bytes())
            per = slot_bytes(st.expert_nbytes)
            cap = d + kv + s + max(c.n_layers * c.top_k, round(st.expert_total_nbytes / 3 / per)) * per
        else:
            cap = parse_size(a.mem_cap)
        eng.start_trace()
        for seed in range(a.generations):
            eng.generate("", max_new=a.max_new, sampling=Sampling(temperature=0.8, seed=seed))
        trace = eng.finish_trace()
        nbytes = st.expert_nbytes
    with moerun.load(model, mem_cap=cap, tokenizer=False) as eng:
        slots = list(eng.budget.slots)
    costs = costs_from_calibration(calibrate(model), nbytes / rate, "link (emulated)")
    rows = [("lru", 0, 1, predict(trace, slots, "lru", 0, 1, costs))]
    exact = oracle(trace)
    for n, la in ((1, 1), (2, 1), (2, 2)):
        rows.append(("router", n, la, predict(trace, slots, "lru", n, la, costs)))
    for n, la in ((2, 1), (2, 2)):
        rows.append(("oracle", n, la, predict(exact, slots, "lru", n, la, costs)))
    for wrong in a.wrong:
        noisy = oracle(trace, wrong, seed=1)
        for n, la in ((2, 1), (2, 2)):
            rows.append((f"oracle {100 * wrong:.0f}% wrong", n, la, predict(noisy, slots, "lru", n, la, costs)))
    base = rows[0][3].tok_s
    doc = {
        "model": str(model), "cap_bytes": cap, "slots": slots, "link_speed_bytes_s": rate, "link_emulated": True,
        "tokens": trace.n_tokens, "loader_us": costs.loader * 1e6,
        "rows": [{"guesses": kind, "prefetch": n, "lookahead": la, "tok_s": p.tok_s, "vs_lru": p.tok_s / base,
                  "hit_rate": p.hit_rate, "stall_share": p.stall_share} for kind, n, la, p in rows],
    }
    if a.json:
        print(json.dumps(doc, indent=2))
        return 0
    print(f"model {model}; cap {cap} bytes, slots {','.join(map(str, slots))}; link {rate / 1e9:.2f} GB/s (emulated); "
          f"{trace.n_tokens} tokens of routing; predicted by the planner; {_bench.BLAS_NOTE}")
    print(f"{'guesses':<19}{'prefetch':>9}{'tok/s':>8}{'vs lru':>8}{'hit rate':>10}{'stall':>8}")
    for kind, n, la, p in rows:
        pf = f"{n}x{la}" if n else "off"
        print(f"{kind:<19}{pf:>9}{p.tok_s:>8.0f}{p.tok_s / base:>7.2f}x{100 * p.hit_rate:>9.1f}%{100 * p.stall_share:>7.1f}%")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
