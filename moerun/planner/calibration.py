"""Measuring the planner's costs on this machine, with their noise, and keeping them.

Each cost of ``moerun.planner.timeline.Costs`` is timed here on the model itself: the compute of every
layer outside its experts and the head (a fully resident decode with the event recorder), one
expert with its stored format's decoding, the decoding alone, a copy of one expert's bytes, the
guess rule at one prefetch point, how late a sleep wakes, each policy's bookkeeping per access
(the live pool driven without reads), and how often the reader is late with a guess (a capped
run with prefetch over an emulated link).

Noise: every timing is repeated until its best three runs agree within ``SPREAD`` (or a time
limit), and the spread is kept.  The calibration records when, where (host, CPUs) and under what
load (the load average, and other processes' CPU use while it ran) it was taken; ``flags`` says
when it should not be trusted: a large spread, or other work on the machine.  It is cached per
model file (size and time), host, numpy and moerun version, and measured again when any of them
changes or the cache holds anything but sane numbers.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from pathlib import Path

import numpy as np

from moerun import policies
from moerun._version import __version__
from moerun.errors import BadInput, BadOption
from moerun.files.config import ModelConfig
from moerun.files.fileio import read_json_file, write_text_atomic
from moerun.files.store import ModelStore
from moerun.model.sampling import Sampling
from moerun.model.transformer import expert
from moerun.planner.timeline import Costs
from moerun.runtime.budget import minimum_cap, plan_budget
from moerun.runtime.clock import fine_timer
from moerun.runtime.options import load
from moerun.runtime.pool import ExpertPool
from moerun.runtime.prefetch import GuessRule
from moerun.units import finite_number, whole_number

SCHEMA = "moerun-calibration/6"
CAL_LINK = 1.5e9  # bytes/s of the emulated link of the run that measures how often the reader is late
SPREAD = 0.05  # best three runs within 5%
MAX_SPREAD = 0.10  # above this a calibration is flagged as noisy
BUSY_LOAD = 0.5  # load average per CPU above which other work is flagged
TIME_LIMIT_S = 20.0  # per timing, at most
PLACE_S = 60e-6  # one guess read's cost beyond copies (moerun.runtime.pool.ExpertPool.place_ns, docs/design/prefetch.md)
SHAPE_KEYS = ("layers", "experts", "top_k", "expert_bytes", "dense_bytes", "expert_us", "dense_layer_us")
MAX_LAYERS = 1 << 16
MAX_EXPERTS = 1 << 20
MAX_BYTES = 1 << 60
MAX_US = 1e12  # microseconds: eleven days per operation


# ---------------------------------------------------------------------------- repeated timing


def settle(fn, min_runs: int = 3, max_runs: int = 9, limit_s: float = TIME_LIMIT_S) -> tuple[float, float, int]:
    """Run ``fn`` (returning seconds) until its best three results agree within SPREAD, or max_runs or
    limit_s is reached: (best, spread of the best three, runs)."""
    got: list[float] = []
    t0 = time.monotonic()
    while True:
        got.append(float(fn()))
        best3 = sorted(got)[:3]
        if len(got) >= min_runs:
            spread = (best3[-1] - best3[0]) / best3[0] if best3[0] > 0 else 0.0
            if spread <= SPREAD or len(got) >= max_runs or time.monotonic() - t0 > limit_s:
                return best3[0], spread, len(got)


def micro(fn, number: int = 200) -> float:
    """Median seconds of one call of ``fn`` over ``number`` calls."""
    ts = []
    for _ in range(number):
        t0 = time.perf_counter_ns()
        fn()
        ts.append(time.perf_counter_ns() - t0)
    return float(np.median(ts)) / 1e9


def _others_cpu_s() -> float:
    """CPU seconds used so far by every process but this one and its own prefetch readers (psutil)."""
    import psutil

    me = os.getpid()
    total = 0.0
    for p in psutil.process_iter(["pid", "ppid"]):
        try:
            if p.info["pid"] == me or (p.info["ppid"] == me and any(a.endswith("reader_child.py") for a in p.cmdline())):
                continue
            t = p.cpu_times()
            total += t.user + t.system
        except psutil.Error:
            pass
    return total


# ---------------------------------------------------------------------------- the measurements


def _resident_decode(model_dir, tokens: int):
    """(step s, layer_s list, head s) of one fully resident decode."""
    with load(model_dir, tokenizer=False) as eng:
        eng.start_trace()
        gen = eng.generate(prompt_ids=[0], max_new=tokens + 1, sampling=Sampling(temperature=0.8, seed=0))
        tr = eng.finish_trace()
    comp = tr.events["compute_ns"][tr.meta["prefill_tokens"]:]
    step = gen.decode_ns / 1e9 / gen.decode_steps
    layer_s = (comp.mean(axis=0) / 1e9).tolist()
    return step, layer_s


def _expert_costs(eng) -> dict:
    """One expert with its format's decoding, the decoding alone, one copy of its bytes, the guess rule."""
    pool = eng.pool
    slot = pool.slots[0]
    codec = eng.store.codec
    u = np.random.default_rng(0).standard_normal((1, eng.config.d_model)).astype(np.float32)
    ring = [s.bound for s in pool.slots]  # every expert in turn, as decode meets them (not one kept hot in the caches)
    turn = [0]

    def next_bound():
        turn[0] = (turn[0] + 1) % len(ring)
        return ring[turn[0]]

    out = {
        "expert_s": settle(lambda: micro(lambda: np.float32(0.5) * expert(u, *codec.weights(next_bound()))))[0],
        "decode_s": settle(lambda: micro(lambda: codec.weights(next_bound())))[0],
        "copy_s": settle(lambda: micro(lambda: eng.store.copy_in(0, 0, slot.buf), 50))[0],
    }
    rule = GuessRule(eng.model, 1)
    out["guess_s"] = settle(lambda: micro(lambda: rule.top(0, u, 2)))[0]
    return out


def _sleep_lateness() -> float:
    fine_timer()
    late = []
    for _ in range(100):
        t0 = time.monotonic_ns()
        time.sleep(100e-6)
        late.append(time.monotonic_ns() - t0 - 100_000)
    return float(np.median(late)) / 1e9


def _policy_costs(model_dir, trace, names) -> dict:
    """Each policy's bookkeeping per access over LRU's: the live pool driven by recorded routing, no reads."""
    store = ModelStore.open(model_dir)
    try:
        store.copy_in = lambda layer, expert, dst: 0
        c = store.config
        slots = [min(c.n_experts, c.top_k + 1)] * c.n_layers
        budget = plan_budget(c, store.dense_nbytes, store.expert_nbytes, 1 << 60, slots)
        P = trace.meta.get("prefill_tokens", 0)
        ex = trace.experts[P:].astype(np.int64)
        probs = trace.probs[P:] if trace.probs is not None else np.zeros((*ex.shape[:2], c.n_experts), np.float32)
        w = np.full((1, c.top_k), 1.0 / c.top_k, np.float32)

        def drive(name):
            pool = ExpertPool(store, budget, name)
            t0 = time.thread_time()
            for step in range(ex.shape[0]):
                pool.begin_step(step)
                for layer in range(c.n_layers):
                    chosen = ex[step, layer][None, :]
                    pool.begin_layer(layer)
                    pool.routed(layer, chosen, w, probs[step, layer][None, :])
                    ids = chosen[0].tolist()
                    for j in pool.compute_order(layer, ids):
                        pool.weights(layer, ids[j])
                    pool.end_layer(layer)
            return (time.thread_time() - t0) / max(1, ex.size)

        base = settle(lambda: drive("lru"), max_runs=5)[0]
        out = {n: max(0.0, settle(lambda n=n: drive(n), max_runs=5)[0] - base) for n in names if n != "lru"}
        return base, out
    finally:
        store.close()


def _late_share(model_dir, tokens: int) -> float:
    """Share of used guesses the compute thread copied itself, in a capped run with prefetch."""
    store = ModelStore.open(model_dir)
    c = store.config
    cap = minimum_cap(c, store.dense_nbytes, store.expert_nbytes, "even", store.codec.scratch_bytes())
    store.close()
    with load(model_dir, tokenizer=False, mem_cap=cap, link_speed=CAL_LINK, prefetch=2) as eng:
        eng.generate(prompt_ids=[0], max_new=tokens + 1, sampling=Sampling(temperature=0.8, seed=0))
        pf = eng.stats["pool"]["prefetch"]
    return min(1.0, pf["copied_here"] / pf["used"]) if pf["used"] else 0.0


def measure(model_dir, tokens: int = 96, progress=None) -> dict:
    """Every cost of the model on this machine (see the module docstring); ``progress(what)`` is told each step."""
    say = progress or (lambda what: None)
    model_dir = Path(model_dir)
    others0, load0, t0 = _others_cpu_s(), os.getloadavg()[0], time.monotonic()
    say("resident decode: compute per layer and head")
    runs = []

    def one():
        runs.append(_resident_decode(model_dir, tokens))
        return runs[-1][0]

    step, step_spread, n_runs = settle(one)
    layer_s = min(runs, key=lambda r: r[0])[1]
    say("one expert, its decoding, a copy, the guess rule")
    with load(model_dir, tokenizer=False) as eng:
        ec = _expert_costs(eng)
        k = eng.config.top_k
        eng.start_trace()  # routing for the policies' timing
        eng.generate(prompt_ids=[0], max_new=tokens + 1, sampling=Sampling(temperature=0.8, seed=1))
        trace = eng.finish_trace()
    say("how late a sleep wakes")
    wait_s = _sleep_lateness()
    say("each policy's bookkeeping per access")
    pool_s, pol = _policy_costs(model_dir, trace, policies.names(online_only=True))
    say("how often the reader is late with a guess")
    late = _late_share(model_dir, tokens)
    others = _others_cpu_s() - others0
    wall = time.monotonic() - t0
    attn = [max(0.0, ls - k * ec["expert_s"]) for ls in layer_s]
    head = max(0.0, step - sum(layer_s))
    ncpu = os.cpu_count() or 1
    flags = []
    if step_spread > MAX_SPREAD:
        flags.append(f"noisy: the best resident decodes differed by {100 * step_spread:.0f}%")
    if load0 - 1 > BUSY_LOAD * ncpu or others > 0.25 * wall:  # the load average counts this process too
        flags.append(f"other work ran: load average {load0:.2f} on {ncpu} CPUs, other processes used {others:.1f} s of CPU "
                     f"in {wall:.1f} s")
    return {
        "schema": SCHEMA,
        "model_dir": str(model_dir.resolve()),
        "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "created_unix": time.time(),
        "host": os.uname().nodename,
        "cpus": ncpu,
        "load_average": load0,
        "others_cpu_s": others,
        "seconds": wall,
        "moerun": __version__,
        "attn_s": attn,
        "head_s": head,
        "resident_step_s": step,
        "step_spread": step_spread,
        "step_runs": n_runs,
        **ec,
        "wait_s": wait_s,
        "policy_s": pol,
        "pool_s": pool_s,
        "late_share": late,
        "place_s": PLACE_S,
        "flags": flags,
        "note": "measured on this machine, fully resident, one decode thread",
    }


# ---------------------------------------------------------------------------- the cache


def cache_dir() -> Path:
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "moerun"


def model_key(model_dir: Path) -> str:
    """What a calibration depends on: the model file, the host, numpy and moerun."""
    st = (Path(model_dir) / "model.safetensors").stat()
    raw = f"{Path(model_dir).resolve()}|{st.st_size}|{st.st_mtime_ns}|{np.__version__}|{__version__}|{SCHEMA}|{os.uname().nodename}"
    return hashlib.blake2b(raw.encode(), digest_size=8).hexdigest()


def calibrate(model_dir, tokens: int = 96, recalibrate: bool = False, cache: bool = True, progress=None) -> dict:
    """The model's costs on this machine, measured now or taken from the cache (see the module docstring)."""
    model_dir = Path(model_dir)
    path = cache_dir() / f"calibration-{model_key(model_dir)}.json"
    if cache and not recalibrate:
        doc = cached(path, ModelConfig.load(model_dir).n_layers)
        if doc is not None:
            return doc
    doc = measure(model_dir, tokens, progress)
    if cache:
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            write_text_atomic(path, json.dumps(doc, indent=2))
        except OSError:
            pass
    return doc


def cached(path: Path, n_layers: int) -> dict | None:
    """A cached calibration that is whole and sane, or None (then it is measured again and the file replaced).

    The cache is ours but lives in the user's directory: a file that parses yet holds negative, infinite or
    missing figures, or the figures of another layer count, is not trusted.
    """
    if not path.exists():
        return None
    try:
        doc = read_json_file(path, BadInput, "calibration cache")
    except BadInput:
        return None
    if not isinstance(doc, dict) or doc.get("schema") != SCHEMA:
        return None
    attn = doc.get("attn_s")
    if not isinstance(attn, list) or len(attn) != n_layers or not all(finite_number(a, 0.0, 1.0) for a in attn):
        return None
    if not finite_number(doc.get("expert_s"), 1e-12, 1.0) or not finite_number(doc.get("resident_step_s"), 1e-12, 10.0):
        return None
    for key in ("head_s", "wait_s", "decode_s", "copy_s", "guess_s", "place_s", "late_share", "step_spread", "pool_s"):
        if not finite_number(doc.get(key), 0.0, 10.0):
            return None
    pol = doc.get("policy_s")
    if not isinstance(pol, dict) or not all(isinstance(k, str) and finite_number(v, 0.0, 1.0) for k, v in pol.items()):
        return None
    if not isinstance(doc.get("flags"), list) or not finite_number(doc.get("created_unix"), 0.0, 1e11):
        return None
    doc["cached"] = str(path)
    return doc


def describe(cal: dict) -> str:
    """When, how noisy, and under what load a calibration was taken, for people."""
    age = max(0.0, time.time() - cal["created_unix"])
    when = f"{age / 60:.0f} min" if age < 7200 else f"{age / 3600:.0f} h" if age < 172800 else f"{age / 86400:.0f} days"
    src = "cached" if cal.get("cached") else "measured now"
    text = (f"calibration {src}, {when} old ({cal['created']}, host {cal['host']}), resident decode spread "
            f"{100 * cal['step_spread']:.1f}% over {cal['step_runs']} runs")
    if cal["flags"]:
        text += "; NOT TRUSTED: " + "; ".join(cal["flags"]) + " (run again with --recalibrate on a quiet machine)"
    return text


# ---------------------------------------------------------------------------- costs for the time model


def page_seconds(expert_bytes: int, link_speed: float | None = None, probe: dict | None = None, regime: str = "warm") -> tuple[float, str]:
    """One expert's page-in time from a link speed or a saved probe (nearest block size, scaled by bytes)."""
    if link_speed is not None:
        return expert_bytes / link_speed, f"link {link_speed / 1e9:.3g} GB/s (emulated)"
    if probe is None:
        raise BadOption("give --link-speed RATE or --probe FILE (written by 'moerun probe --save')")
    usable = [b for b in probe["blocks"] if b.get(regime, {}).get("runs")]
    if not usable:
        raise BadInput(f"the probe file has no measured {regime} figures")
    block = min(usable, key=lambda b: abs(np.log(b["bytes"] / expert_bytes)))
    r = block[regime]
    secs = r["p50_ms"] / 1e3 * expert_bytes / block["bytes"]
    note = "" if r.get("verified", True) else " (unverified)"
    return secs, f"probe {regime} p50 of {block['label']}{note}, scaled to {expert_bytes} B"


def costs_from_calibration(cal: dict, page: float, page_source: str, emulated: bool = True) -> Costs:
    return Costs(list(cal["attn_s"]), cal["expert_s"], cal["head_s"], page, page_source, cal["wait_s"], emulated,
                 cal["copy_s"], cal["decode_s"], cal["guess_s"], cal["place_s"], cal["late_share"], dict(cal["policy_s"]),
                 cal["pool_s"])


def costs_from_shape(shape: dict, page: float, page_source: str, emulated: bool = True) -> Costs:
    us = 1e-6
    return Costs([shape["dense_layer_us"] * us] * shape["layers"], (shape["expert_us"] + shape.get("decode_us", 0)) * us,
                 shape.get("head_us", 0) * us, page, page_source, shape.get("wait_us", 0) * us, emulated,
                 shape.get("copy_us", 0) * us, shape.get("decode_us", 0) * us, shape.get("guess_us", 0) * us,
                 shape.get("place_us", PLACE_S / us) * us, shape.get("late_share", 0.0))


def load_shape(path: str | os.PathLike) -> dict:
    """A small JSON describing a model too big to run here; validated, one clear error otherwise."""
    p = Path(path)
    doc = read_json_file(p, BadInput, "shape file", missing=f"{p}: no such shape file", file_error=BadOption)
    if not isinstance(doc, dict):
        raise BadInput(f"{p}: a shape file is a JSON object with {', '.join(SHAPE_KEYS)}")
    missing = [k for k in SHAPE_KEYS if k not in doc]
    if missing:
        raise BadInput(f"{p}: missing {', '.join(missing)}")
    for key, hi in (("layers", MAX_LAYERS), ("experts", MAX_EXPERTS), ("top_k", MAX_EXPERTS), ("expert_bytes", MAX_BYTES)):
        if not whole_number(doc[key], 1, hi):
            raise BadInput(f"{p}: {key} must be a whole number from 1 to {hi}, got {doc[key]!r:.40}")
    for key in ("dense_bytes", "kv_cache_bytes", "scratch_bytes"):
        if not whole_number(doc.get(key, 0), 0, MAX_BYTES):
            raise BadInput(f"{p}: {key} must be a whole number of bytes from 0 to {MAX_BYTES}, got {doc.get(key)!r:.40}")
    for key in ("expert_us", "dense_layer_us", "head_us", "decode_us", "copy_us", "guess_us", "place_us", "wait_us"):
        if not finite_number(doc.get(key, 0), 0.0, MAX_US):
            raise BadInput(f"{p}: {key} must be a number of microseconds from 0 to {MAX_US:g}, got {doc.get(key)!r:.40}")
    if not finite_number(doc.get("late_share", 0), 0.0, 1.0):
        raise BadInput(f"{p}: late_share must be a number from 0 to 1, got {doc.get('late_share')!r:.40}")
    if doc["expert_us"] <= 0:
        raise BadInput(f"{p}: expert_us must be greater than zero")
    if doc["top_k"] > doc["experts"]:
        raise BadInput(f"{p}: top_k ({doc['top_k']}) exceeds experts ({doc['experts']}): the shape contradicts itself")
    return doc
