#!/usr/bin/env python3
"""Batch-1 decode: the numpy engine against a torch eager model holding the same weights.

Same prompt, same greedy decoding, one run.  Fairness: the torch side uses a KV
cache, inference mode and computes only the chosen experts; both sides use one
thread (BLAS and torch intra-op pinned to 1).  Also printed: the bandwidth
bound (weight bytes a decode step must read, divided by this machine's
measured memory-copy bandwidth) and each engine's share of it.

It imports ``_bench`` first, before numpy and moerun: one BLAS thread, and the helpers the
benchmarks share.
"""

from __future__ import annotations

import argparse
import json
import time

import _bench  # first: one BLAS thread before numpy is imported; the shared helpers

import moerun
from moerun.model.sampling import Sampling


def active_bytes_per_token(store) -> int:
    """Weight bytes one decode step reads: attention, norms, routers, the output projection, top_k experts per layer."""
    import math

    c = store.config
    shapes = c.dense_shapes()  # float32 in memory

    def nbytes(name):
        return 4 * math.prod(shapes[name])

    per_layer = sum(nbytes(f"layers.0.{n}") for n in ("attn_norm", "moe_norm", "attn.wq", "attn.wk", "attn.wv", "attn.wo", "router"))
    head = nbytes("embed") if c.tied_embeddings else nbytes("lm_head")
    row = c.d_model * 4
    return c.n_layers * (per_layer + c.top_k * store.expert_nbytes) + head + nbytes("final_norm") + row


def numpy_decode(model, prompt_ids, n, repeats, **kw):
    best = 0.0
    tokens = None
    with moerun.load(model, **kw) as eng:
        for _ in range(repeats):
            g = eng.generate(prompt_ids=prompt_ids, max_new=n + 1, sampling=Sampling(temperature=0))
            best = max(best, g.decode_tok_s)
            tokens = g.new_ids
    return best, tokens


def torch_decode(model, prompt_ids, n, repeats):
    import torch

    from moerun.checks.torch_twin import TorchMoE

    torch.set_num_threads(1)
    tm = TorchMoE.from_model_dir(model)
    best = 0.0
    tokens = None
    for _ in range(repeats):
        with torch.inference_mode():
            logits = tm.prefill(prompt_ids)
            out = [int(torch.argmax(logits))]
            t0 = time.perf_counter()
            for _ in range(n):
                logits = tm.decode_step(out[-1])
                out.append(int(torch.argmax(logits)))
            dt = time.perf_counter() - t0
        best = max(best, n / dt)
        tokens = out
    return best, tokens, torch.__version__


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--model", default=None)
    ap.add_argument("--prompt", default="Cycle 19, day 4.")
    ap.add_argument("--tokens", type=int, default=200, help="decode steps to time")
    ap.add_argument("--repeats", type=int, default=3, help="runs per engine; the best is kept")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args()
    model = a.model or moerun.default_model_dir()
    with moerun.load(model) as eng:
        ids = eng.tokenizer.encode(a.prompt)
        active = active_bytes_per_token(eng.store)
        n = min(a.tokens, eng.config.max_seq_len - len(ids) - 1)
    bw = _bench.memcpy_bandwidth()
    bound = bw / active
    np_tok_s, np_tokens = numpy_decode(model, ids, n, a.repeats)
    bare_tok_s, _ = numpy_decode(model, ids, n, a.repeats, bare=True)
    doc = {
        "model": str(model),
        "blas_threads": 1,
        "decode_steps": n,
        "numpy_tok_s": np_tok_s,
        "numpy_bare_tok_s": bare_tok_s,
        "torch_tok_s": None,
        "ratio_numpy_over_torch": None,
        "active_weight_bytes_per_token": active,
        "memcpy_bytes_s": bw,
        "bandwidth_bound_tok_s": bound,
        "numpy_share_of_bound": np_tok_s / bound,
    }
    try:
        t_tok_s, t_tokens, tv = torch_decode(model, ids, n, a.repeats)
        doc.update(torch_tok_s=t_tok_s, torch_version=tv, ratio_numpy_over_torch=np_tok_s / t_tok_s,
                   torch_share_of_bound=t_tok_s / bound, same_greedy_tokens=t_tokens[: len(np_tokens)] == np_tokens[: len(t_tokens)])
    except ImportError:
        doc["torch_note"] = "torch is not installed: pip install -e '.[train]' to compare"
    if a.json:
        print(json.dumps(doc, indent=2))
        return 0
    print(f"batch-1 decode, {n} steps, greedy; {_bench.BLAS_NOTE} (torch intra-op too)")
    print(f"numpy engine (through the pool, all resident) {np_tok_s:8.0f} tok/s   ({100 * doc['numpy_share_of_bound']:.1f}% of bound)")
    print(f"numpy engine (bare, no pool)                  {bare_tok_s:8.0f} tok/s")
    if doc["torch_tok_s"]:
        print(f"torch {doc['torch_version']} eager, KV cache, chosen experts   {doc['torch_tok_s']:8.0f} tok/s   "
              f"({100 * doc['torch_share_of_bound']:.1f}% of bound)")
        print(f"numpy / torch = {doc['ratio_numpy_over_torch']:.2f}x (goal 1.5x); same greedy tokens: {doc['same_greedy_tokens']}")
    else:
        print(doc["torch_note"])
    print(f"bandwidth bound: {active / 2**20:.2f} MiB of weights per token / {bw / 1e9:.1f} GB/s memcpy = {bound:,.0f} tok/s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
