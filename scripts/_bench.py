"""What every benchmark script shares: one BLAS thread, the repo on sys.path, and the helpers.

Import it first, before numpy or moerun (``import _bench`` at the top of a script): it sets
OPENBLAS_NUM_THREADS, OMP_NUM_THREADS and MKL_NUM_THREADS to 1 (unless the environment already
sets them) before numpy is loaded, because two-thread BLAS swings about 10x between runs for
these small matrices on a shared 2-core machine, and ``import moerun`` does not pin them.

Helpers: ``log`` (a line on stderr), ``session`` (one engine generating prompts in turn, the pool
carried over), ``split_docs`` (a corpus text as documents), ``hit_rates`` (replayed hit rate per
pool size over traces), ``best_of`` and ``per_call_ns`` (timers), ``memcpy_bandwidth``, ``busy_processes`` and
``stop_busy`` (CPU-bound programs beside a measurement).
"""

from __future__ import annotations

import os
import sys
import time

_THREAD_VARS = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")
if "numpy" in sys.modules:
    sys.stderr.write("_bench: numpy was imported before _bench; BLAS may not be pinned to one thread\n")
for _var in _THREAD_VARS:
    os.environ.setdefault(_var, "1")

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

if all(os.environ[v] == "1" for v in _THREAD_VARS):
    BLAS_THREADS = "1 thread (OPENBLAS/OMP/MKL_NUM_THREADS=1 set before numpy import)"
    BLAS_NOTE = "BLAS pinned to one thread for every configuration"
else:
    BLAS_THREADS = "threads from the environment (" + ", ".join(f"{v}={os.environ[v]}" for v in _THREAD_VARS) + ")"
    BLAS_NOTE = f"BLAS {BLAS_THREADS}"

# One opener per register of the corpus, and an empty document: the prompts of a benchmark session.
SESSION_PROMPTS = [
    "<doc>",
    "<doc>Field notes — ",
    "<doc>[radio, channel 4, cycle 19 day 132, 05:47]\n",
    "<doc>== log TF-14",
    "<doc>TICKET #",
    "<doc>## Daily ledger",
    "<doc>## Cart runs",
    "<doc>## Weekly yield",
]

DOC = "<doc>"  # the corpus's document marker (the bos token of the bundled models)


def log(msg: str) -> None:
    """One progress line on stderr (stdout is kept for the results)."""
    sys.stderr.write(msg + "\n")
    sys.stderr.flush()


def split_docs(text: str) -> list[str]:
    """Whole documents, each with its leading <doc> marker; lines when the text has no marker."""
    if DOC in text:
        return [DOC + d for d in text.split(DOC)[1:]]
    return text.splitlines(keepends=True)


class OracleRule:
    """A guess rule that knows the future: for each layer ahead, the experts that layer will choose, read from the
    run's own routing trace (the engine replays that trace, which changes no number: tests/model/test_routing.py).
    The upper bound of what a guess rule can give through the same engine (``session(..., oracle=trace)``)."""

    def __init__(self, eng, rule, trace):
        self.eng, self.rule = eng, rule
        self.rows = trace.experts.tolist()

    def targets(self, layer):
        return self.rule.targets(layer)

    def top(self, layer, h, n):
        row = self.rows[self.eng.routing.cursor % len(self.rows)]
        return [[e for e in row[layer + j] if e >= 0][:n] for j in range(1, self.targets(layer) + 1)]


def session(model, prompts, max_new: int, seed: int, *, trace: bool = False, oracle=None, **kw) -> dict:
    """One engine generating ``prompts`` one after another (pool and policy carry over).

    A prompt is a string, or a list of token ids (then pass ``tokenizer=False``). Sampling is at
    temperature 0.8, seeded ``seed + i`` for the i-th prompt. Returns decode tok/s and seconds,
    decode steps, the new tokens per prompt, the pool's hit rate, misses and stall seconds (the
    bare source's stall without a pool), the engine's stats, the budget's slots and, with
    ``trace=True``, the recorded trace. ``kw`` goes to ``moerun.load``.  ``oracle``: the routing trace of the same
    session (recorded with ``trace=True``): the engine replays it and guesses with ``OracleRule``.
    """
    import moerun
    from moerun.model.sampling import Sampling

    if oracle is not None:
        kw["routing"] = oracle
    with moerun.load(model, **kw) as eng:
        if oracle is not None and eng.prefetcher is not None:
            eng.prefetcher.rule = OracleRule(eng, eng.prefetcher.rule, oracle)
        if trace:
            eng.start_trace()
        steps = decode_ns = total_ns = 0
        tokens = []
        for i, prompt in enumerate(prompts):
            sampling = Sampling(temperature=0.8, seed=seed + i)
            if isinstance(prompt, str):
                gen = eng.generate(prompt, max_new=max_new, sampling=sampling)
            else:
                gen = eng.generate(prompt_ids=list(prompt), max_new=max_new, sampling=sampling)
            steps += gen.decode_steps
            decode_ns += gen.decode_ns
            total_ns += gen.decode_ns + gen.prefill_ns
            tokens.append(gen.new_ids)
        recorded = eng.finish_trace() if trace else None
        stats = eng.stats
        pool = stats.get("pool", {})
        stall = pool["stall_s"] * 1e9 if "stall_s" in pool else getattr(eng.experts, "stall_ns", 0)
        slots = list(eng.budget.slots) if eng.budget is not None else None
    return {"tok_s": steps / (decode_ns / 1e9) if decode_ns else 0.0, "decode_s": decode_ns / 1e9,
            "total_s": total_ns / 1e9, "steps": steps, "tokens": tokens, "hit_rate": pool.get("hit_rate"),
            "misses": pool.get("misses", 0), "stall_s": (stall or 0) / 1e9, "stats": stats, "slots": slots,
            "trace": recorded}


def hit_rates(traces, policy, sizes: list[int], *, shared: bool = False, fast: bool = True, quotas=None) -> dict[int, float]:
    """Overall replayed hit rate per pool size, counts summed over ``traces`` (each from an empty pool).

    ``shared=True``: one pool of ``size`` slots shared by all layers. Otherwise a pool per layer, of
    ``size`` slots each, or of ``quotas(size)`` slots (a list, one per layer) when given.
    """
    from moerun.sim.counts import replay_counts

    if hasattr(traces, "n_tokens"):
        traces = [traces]
    acc = dict.fromkeys(sizes, 0)
    miss = dict.fromkeys(sizes, 0)
    for tr in traces:
        if quotas is None or shared:
            out = replay_counts(tr, policy, sizes, fast, shared=shared)
            per_size = {c: out[c] for c in sizes}
        else:
            split = {c: quotas(c) for c in sizes}
            out = replay_counts(tr, policy, sorted({q for qs in split.values() for q in qs}), fast)
            per_size = {c: [out[q][layer] for layer, q in enumerate(qs)] for c, qs in split.items()}
        for c, counts in per_size.items():
            acc[c] += sum(x.accesses for x in counts)
            miss[c] += sum(x.misses for x in counts)
    return {c: 1 - miss[c] / acc[c] for c in sizes}


def best_of(fn, repeat: int, clock=time.perf_counter) -> tuple[float, object]:
    """The shortest of ``repeat`` timed calls of ``fn`` (in ``clock``'s unit), and the last call's result."""
    best, out = float("inf"), None
    for _ in range(repeat):
        t0 = clock()
        out = fn()
        best = min(best, clock() - t0)
    return best, out


def per_call_ns(fn, reps: int = 400, rounds: int = 9, warmup: int = 30) -> float:
    """Process CPU time per call of ``fn``, in ns: the best of ``rounds`` rounds of ``reps`` calls."""
    for _ in range(warmup):
        fn()

    def round_of_calls() -> None:
        for _ in range(reps):
            fn()

    best, _ = best_of(round_of_calls, rounds, clock=time.process_time_ns)
    return float(best / reps)


def memcpy_bandwidth(nbytes: int = 64 << 20, repeats: int = 5) -> float:
    """This machine's plain memory-copy bandwidth in bytes/s (best of a few 64 MiB copies)."""
    import numpy as np

    src = np.ones(nbytes, np.uint8)
    dst = np.empty_like(src)
    best, _ = best_of(lambda: np.copyto(dst, src), repeats)
    return nbytes / best


def busy_processes(n: int) -> list:
    """Start n plain CPU-bound busy loops (a competing program on the machine); stop them with stop_busy."""
    import subprocess

    return [subprocess.Popen([sys.executable, "-c", "while True: pass"]) for _ in range(n)]


def stop_busy(procs: list) -> None:
    for p in procs:
        p.kill()
        p.wait()
