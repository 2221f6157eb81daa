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
changes, or when the cache is not wholly valid and plausible (``check_cache``: every field of the
type and range it is written with, descriptive fields included, and each cost above a floor that no
CPU beats for the model's shapes, ``Floors``).
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import time
from dataclasses import dataclass
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
MIN_RUNS, MAX_RUNS = 3, 9  # a timing's runs (settle)

# Floors of plausible costs (``Floors``, ``check_cache``).  A cost is at least the time to read the bytes it
# must touch at BANDWIDTH, and at least one numpy call made from Python (CALL_S).
BANDWIDTH = 10e12  # bytes/s: ten times the fastest memory a CPU reads today, 1-2 TB/s (HBM2e on Intel's Xeon Max,
#                    vendor figures); the factor ten leaves room for caches (common practice, no source)
CALL_S = 20e-9  # s: one call into numpy from Python; CPython's function call alone takes tens of ns on the
#                 fastest cores (common practice, no source)
MIN_STORED_BITS = 2  # the fewest bits per weight any stored expert format has (2-bit quantization)


@dataclass(frozen=True)
class Floors:
    """The least time (s) each cost can take on any CPU for a model's shapes: the bytes the operation must touch
    at ``BANDWIDTH``, and at least one numpy call (``CALL_S``).  Dense weights are float32 in memory; an expert is
    computed from float32 matrices whatever its stored format; its stored bytes are at least ``MIN_STORED_BITS`` per
    weight."""

    attn: tuple[float, ...]  # per routed layer: attention, norms, router and the shared expert (and dense layers before it)
    head: float  # final norm and output projection
    expert: float  # one expert's three float32 matrices
    copy: float  # one expert's stored bytes
    guess: float  # the guess rule: one layer's norm-scaled router (none on a one-layer model)
    step_experts: int  # experts computed per decode step: top_k in every layer

    @property
    def step(self) -> float:
        """A fully resident decode step: every layer, its experts and the head."""
        return sum(self.attn) + self.head + self.step_experts * self.expert

    @classmethod
    def for_config(cls, c: ModelConfig) -> Floors:
        def at_least(nbytes: float) -> float:
            return max(CALL_S, nbytes / BANDWIDTH)

        shapes = c.dense_shapes()
        elements = lambda names: sum(int(np.prod(shapes[n])) for n in names)  # noqa: E731
        # a routed layer's dense tensors, and those of the dense layers (a model quantized from an open checkpoint)
        # between it and the routed layer before it; the dense layers after the last routed one count with it
        routed = c.routed_blocks()
        spans = [range(routed[i - 1] + 1 if i else 0, b + 1) for i, b in enumerate(routed)]
        spans[-1] = range(spans[-1].start, c.n_blocks)
        attn = tuple(at_least(4 * elements([n for n in shapes if n.split(".")[0] == "layers" and int(n.split(".")[1]) in blocks]))
                     for blocks in spans)
        head = at_least(4 * elements(["final_norm", "embed" if c.tied_embeddings else "lm_head"]))
        weights = sum(a * b for a, b in c.expert_shapes().values())
        guess = at_least(4 * c.d_model * c.n_experts) if c.n_layers > 1 else 0.0
        return cls(attn, head, at_least(4 * weights), at_least(weights * MIN_STORED_BITS / 8), guess,
                   c.n_layers * c.top_k)


# ---------------------------------------------------------------------------- repeated timing


def settle(fn, min_runs: int = MIN_RUNS, max_runs: int = MAX_RUNS, limit_s: float = TIME_LIMIT_S) -> tuple[float, float, int]:
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
    return max(0.0, float(np.median(late)) / 1e9)


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
        floor = Floors.for_config(eng.config)
        eng.start_trace()  # routing for the policies' timing
        eng.generate(prompt_ids=[0], max_new=tokens + 1, sampling=Sampling(temperature=0.8, seed=1))
        trace = eng.finish_trace()
    say("how late a sleep wakes")
    wait_s = _sleep_lateness()
    say("each policy's bookkeeping per access")
    pool_s, pol = _policy_costs(model_dir, trace, policies.names(online_only=True))
    say("how often the reader is late with a guess")
    late = _late_share(model_dir, tokens)
    others = max(0.0, _others_cpu_s() - others0)  # (processes that ended meanwhile take their CPU time with them)
    wall = time.monotonic() - t0
    # attention and head are differences of timings: noise can take them below what they can cost, so they are
    # kept at their floors (a calibration holds only plausible figures, check_cache)
    attn = [max(f, ls - k * ec["expert_s"]) for f, ls in zip(floor.attn, layer_s)]
    head = max(floor.head, step - sum(layer_s))
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
        "host": host_name(),
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


def host_name() -> str:
    """This machine's name as a calibration records it: printable text (a name that is not is escaped)."""
    name = os.uname().nodename
    return name if name.isprintable() else ascii(name)[1:-1]


def calibrate(model_dir, tokens: int = 96, recalibrate: bool = False, cache: bool = True, progress=None,
              notice=None) -> dict:
    """The model's costs on this machine, measured now or taken from the cache (see the module docstring).

    ``notice(text)`` is told, in one line, why a cache file that is there is measured again."""
    model_dir = Path(model_dir)
    path = cache_dir() / f"calibration-{model_key(model_dir)}.json"
    if cache and not recalibrate:
        doc, why = cached(path, ModelConfig.load(model_dir), model_dir)
        if doc is not None:
            return doc
        if why is not None and notice is not None:
            notice(f"the cached calibration {path} {why}; measuring again")
    doc = measure(model_dir, tokens, progress)
    if cache:
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            write_text_atomic(path, json.dumps(doc, indent=2))
        except OSError:
            pass
    return doc


def cached(path: Path, config: ModelConfig, model_dir: Path) -> tuple[dict | None, str | None]:
    """A cached calibration that is wholly valid and plausible: ``(doc, None)``; ``(None, why)`` when the file is
    there but is not (then it is measured again and the file replaced); ``(None, None)`` when there is none.

    The cache is ours but lives in the user's directory: nothing in it is trusted before ``check_cache``.
    """
    try:
        if not path.exists():
            return None, None
        doc = read_json_file(path, BadInput, "calibration cache")
    except (BadInput, OSError, ValueError):  # ValueError: a path the file system cannot name
        return None, "cannot be read as JSON"
    why = check_cache(doc, config, model_dir)
    if why is not None:
        return None, why
    doc["cached"] = str(path)
    return doc, None


_CREATED = re.compile(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}Z")
MAX_TEXT = 2000  # characters of one descriptive text (a flag, the note, a path)
MAX_FLAGS = 16


def _text(v) -> bool:
    """Printable text that UTF-8 encodes (no lone surrogate, no control character), of a sane length."""
    return isinstance(v, str) and len(v) <= MAX_TEXT and v.isprintable()


def check_cache(doc, config: ModelConfig, model_dir: Path) -> str | None:
    """None when ``doc`` is a calibration of this model on this machine that is wholly valid and plausible; else
    why not, in a few words.

    Valid: exactly the fields ``measure`` writes, each of its type and range.  Plausible: each cost at or above
    its floor for the model's shapes (``Floors``) and below a ceiling (a second per layer, a second per expert,
    ten per operation or token: common practice, no source); the resident step at least the floors of what it
    computes.  Never raises."""
    if not isinstance(doc, dict):
        return "is not a JSON object"
    if doc.get("schema") != SCHEMA:
        return f"is not of schema {SCHEMA}"
    fields = {"schema", "model_dir", "created", "created_unix", "host", "cpus", "load_average", "others_cpu_s",
              "seconds", "moerun", "attn_s", "head_s", "resident_step_s", "step_spread", "step_runs", "expert_s",
              "decode_s", "copy_s", "guess_s", "wait_s", "policy_s", "pool_s", "late_share", "place_s", "flags", "note"}
    missing = sorted(fields - doc.keys())
    if missing:
        return f"holds no {', '.join(missing)}"
    extra = sorted(k for k in doc if k not in fields)
    if extra:
        return f"holds fields moerun does not write ({', '.join(map(ascii, extra))[:200]})"
    # what it was measured for
    for key, want in (("model_dir", str(Path(model_dir).resolve())), ("host", host_name()), ("moerun", __version__)):
        if doc[key] != want:
            return f"names another {key.replace('_', ' ')} ({ascii(doc[key])[:80]})"
    if not _text(doc["created"]) or not _CREATED.fullmatch(doc["created"]):
        return "has a creation date that is not a UTC time as YYYY-MM-DDThh:mm:ssZ"
    if not finite_number(doc["created_unix"], 0.0, time.time() + 86400):  # a clock set back by up to a day
        return "has a creation time that is not a number of seconds up to now"
    if not whole_number(doc["cpus"], 1, 1 << 20):
        return "has a CPU count that is not a whole number from 1"
    if not whole_number(doc["step_runs"], MIN_RUNS, MAX_RUNS):
        return f"has a run count that is not a whole number from {MIN_RUNS} to {MAX_RUNS}"
    for key in ("load_average", "others_cpu_s", "seconds", "step_spread"):
        if not finite_number(doc[key], 0.0, 1e9):
            return f"has a {key} that is not a finite number from 0"
    flags = doc["flags"]
    if not isinstance(flags, list) or len(flags) > MAX_FLAGS or not all(_text(f) for f in flags):
        return "has flags that are not a list of printable texts"
    if not _text(doc["note"]):
        return "has a note that is not printable text"
    # the costs: types and ceilings
    attn = doc["attn_s"]
    if not isinstance(attn, list) or len(attn) != config.n_layers:
        return f"holds attn_s that is not a list of {config.n_layers} numbers (one per layer)"
    ceilings = {"expert_s": 1.0, "resident_step_s": 10.0, "late_share": 1.0}
    for key in ("head_s", "resident_step_s", "expert_s", "decode_s", "copy_s", "guess_s", "wait_s", "pool_s",
                "late_share", "place_s"):
        if not finite_number(doc[key], 0.0, ceilings.get(key, 10.0)):
            return f"holds {key} {ascii(doc[key])[:40]}, not a number of seconds from 0 to {ceilings.get(key, 10.0):g}"
    if not all(finite_number(a, 0.0, 1.0) for a in attn):
        return "holds attn_s figures that are not numbers of seconds from 0 to 1"
    pol = doc["policy_s"]
    if not isinstance(pol, dict) or not all(_text(k) and k and finite_number(v, 0.0, 1.0) for k, v in pol.items()):
        return "holds policy_s that is not policy names with numbers of seconds from 0 to 1"
    if doc["place_s"] != PLACE_S:
        return f"holds place_s {doc['place_s']!r}, not moerun's {PLACE_S!r}"
    # plausible: no CPU is faster than the floors
    floor = Floors.for_config(config)
    lows = [(f"attn_s of layer {i}", a, f) for i, (a, f) in enumerate(zip(attn, floor.attn))]
    lows += [("head_s", doc["head_s"], floor.head), ("expert_s", doc["expert_s"], floor.expert),
             ("copy_s", doc["copy_s"], floor.copy), ("guess_s", doc["guess_s"], floor.guess),
             ("pool_s", doc["pool_s"], CALL_S), ("resident_step_s", doc["resident_step_s"], floor.step)]
    for what, v, f in lows:
        if v < f:
            return f"holds {what} {v:.3g} s, below the {f:.3g} s no CPU beats for this model"
    return None


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
    secs = r["p50_s"] * expert_bytes / block["bytes"]
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
