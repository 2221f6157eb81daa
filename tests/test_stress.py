"""Stress: many short generations in one process, each with its own engine, settings and prefetch reader.

Every round opens an engine with random settings (cap between the smallest that works and fully
resident, even or shared pool or an explicit slot list, eviction policy, prefetch guesses, lookahead,
prefetch point, page-in mechanism, sometimes an emulated link) and random 0-1 ms delays injected before
prefetch reads, generates a few tokens, and closes.  After each round:

- the tokens and every step's logits equal the fully resident engine's, bit for bit (docs/design/architecture.md,
  invariants: offloading never changes numbers);
- the thread count is back to where it was before the round, and so are this process's child processes
  (psutil): a prefetch engine's reader process is gone once the engine is closed (invariants: prefetch is
  advisory and stops with its engine); a round with prefetch must show the reader while it runs, so the
  count is known to see readers at all;

and across rounds the resident set stays flat: RSS after the last round is within a small bound of RSS
after the fifth (earlier rounds warm the allocator and numpy's caches), so nothing an engine allocates
(its pool, KV cache, prefetch queue, recorder) outlives it.  The default run takes a few seconds; the
``slow`` variant runs ten times as many rounds on a larger model.
"""

from __future__ import annotations

import gc
import random
import threading

import numpy as np
import psutil
import pytest

import moerun
from moerun import policies
from moerun.model.sampling import Sampling
from moerun.runtime.budget import minimum_cap

pytestmark = pytest.mark.usefixtures("every_guess_read")  # the prefetch machinery runs whatever guesses cost

ONLINE_POLICIES = [name for name in policies.names() if getattr(policies.get(name), "online", True)]
PROMPTS = [[0, 5, 9, 200, 31], [0, 77], [0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12], [0, 140, 140, 140]]
SEEDS = [0, 11]
MAX_NEW = 14
# Measured (2 vCPU VM, 2026-12-01, default test, fresh process, 3 runs): RSS after round 40 minus RSS
# after round 5 was 0.0 MiB each time; keeping each round's expert pool alive (a deliberate leak) made
# it 8.2 MiB.  3 MiB leaves room for allocator arenas and page-granular heap growth inside a long
# pytest process while still catching a leaked pool, KV cache or engine per round.
RSS_BOUND_BYTES = 3 << 20


def _bits(a) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float32).view(np.uint32)


def _caps(model_dir) -> dict:
    with moerun.load(model_dir, tokenizer=False) as eng:
        s = eng.store
        low = {split: minimum_cap(s.config, s.dense_nbytes, s.expert_nbytes, split, s.codec.scratch_bytes()) for split in ("even", "shared")}
        return {"low": low, "full": eng.budget.total, "layers": s.config.n_layers, "experts": s.config.n_experts,
                "top_k": s.config.top_k}


def _references(model_dir) -> dict:
    refs = {}
    with moerun.load(model_dir, tokenizer=False) as eng:
        for i, prompt in enumerate(PROMPTS):
            for seed in SEEDS:
                gen = eng.generate(prompt_ids=prompt, max_new=MAX_NEW, sampling=Sampling(0.9, 0.95, seed), keep_logits=True)
                refs[i, seed] = (gen.new_ids, np.stack(gen.logits))
    return refs


def _random_settings(rng: random.Random, caps: dict) -> dict:
    kind = rng.choice(["even", "shared", "slots"])
    kw: dict = {
        "evict": rng.choice(ONLINE_POLICIES),
        "prefetch": rng.choice([0, 1, 2, 3]),
        "lookahead": rng.randint(1, 3),
        "prefetch_from": rng.choice(["attention", "output"]),
        "mechanism": rng.choice(["pread", "pread", "mmap"]),
        "link_speed": rng.choice([None, None, None, 2e9]),
    }
    if kind == "slots":
        kw["slots"] = [rng.randint(caps["top_k"], caps["experts"]) for _ in range(caps["layers"])]
        kw["mem_cap"] = caps["full"]
    else:
        kw["split"] = kind
        low = caps["low"][kind]
        kw["mem_cap"] = rng.choice([low, low, int(low + rng.random() * (caps["full"] - low))])
    return kw


def _children(proc: psutil.Process) -> set[int]:
    """Pids of this process's live descendants (a zombie, exited but not reaped, counts: it is a leak too)."""
    try:
        return {c.pid for c in proc.children(recursive=True)}
    except psutil.NoSuchProcess:  # a child that ended while being listed
        return {c.pid for c in proc.children(recursive=True)}


def _stress(model_dir, rounds: int, seed: int) -> None:
    caps = _caps(model_dir)
    refs = _references(model_dir)
    rng = random.Random(seed)
    proc = psutil.Process()
    gc.collect()
    threads_before = threading.active_count()
    children_before = _children(proc)
    readers_seen = 0
    rss: list[int] = []
    for i in range(rounds):
        kw = _random_settings(rng, caps)
        p, s = rng.randrange(len(PROMPTS)), rng.choice(SEEDS)
        n = rng.randint(1, MAX_NEW)
        delays = random.Random(rng.random())
        eng = moerun.load(model_dir, tokenizer=False, **kw)
        try:
            if eng.prefetcher is not None:  # random 0-1 ms delays before the reader process's reads
                eng.prefetcher.reader.set_faults(jitter_us=1000, seed=delays.randrange(2**31))
                assert eng.prefetcher.reader.proc.pid in _children(proc), f"round {i}: the reader is not a child process"
                readers_seen += 1
            gen = eng.generate(prompt_ids=PROMPTS[p], max_new=n, sampling=Sampling(0.9, 0.95, s), keep_logits=True)
        finally:
            eng.close()
        tokens, logits = refs[p, s]
        where = f"round {i}: {kw}, prompt {p}, seed {s}, {n} tokens"
        assert gen.new_ids == tokens[:n], where
        assert np.array_equal(_bits(np.stack(gen.logits)), _bits(logits[:n])), where
        assert threading.active_count() == threads_before, f"{where}: threads {threading.enumerate()}"
        assert _children(proc) == children_before, f"{where}: child processes left: {_children(proc) - children_before}"
        del eng, gen
        gc.collect()
        rss.append(proc.memory_info().rss)
    assert readers_seen > 0, "no round ran with prefetch: the reader-process count was never put to the test"
    growth = rss[-1] - rss[4]
    assert growth <= RSS_BOUND_BYTES, f"RSS grew by {growth / 2**20:.1f} MiB from round 5 to round {rounds}: {rss}"


def test_forty_engines_with_random_settings_equal_resident_and_leak_no_thread_or_memory(synth_models):
    model = synth_models(seed=21, layers=3, experts=8, top_k=2)
    _stress(model, rounds=40, seed=1)


@pytest.mark.slow
def test_four_hundred_engines_with_random_settings_equal_resident_and_leak_no_thread_or_memory(synth_models):
    model = synth_models(seed=22, layers=4, experts=12, top_k=2, d_model=64, d_expert=128, n_heads=4, n_kv_heads=2, head_dim=16)
    _stress(model, rounds=400, seed=2)
