"""The planner: from a memory budget and a link to predicted decode tokens per second.

A decode step is simulated token by token along a routing trace, with the
same residency bookkeeping and policies as the live pool (``Residency``) and
measured costs:

- ``attn[l]``: the compute of layer l outside its experts (attention, norms,
  routing, the pool's bookkeeping), per token;
- ``expert``: one expert on one token;
- ``head``: final norm, output projection and sampling, per token;
- ``page``: one expert page-in (from ``--link-speed``, or a ``probe --save``
  file), on one link shared by every reader.

Per layer: attention runs, then the layer's chosen experts are accessed in
ascending id.  Without prefetch a miss is read by the compute thread after it
has computed the resident experts.  With prefetch every read goes to the
reader (one at a time): the layer's misses, and the guesses it uses that have
not started, come first; then, at the prefetch point, the next layers' guesses
(from the trace) take their slots at once and queue behind; a queued guess
whose layer has started without it is skipped and its slot given back.  The
layer computes what it has while its reads arrive.  The step's time is the
compute plus every wait.  With prefetch off this reduces to
``sum(attn) + L*k*expert + head + misses*page`` per token.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from . import policies
from .errors import BadInput, BadOption, BadTrace, ImpossibleBudget
from .fileio import write_text_atomic
from .replay import layer_plans, plan_policy, prefill_tokens, replay_counts
from .residency import NoVictim, Residency
from .trace import Trace

CALIBRATION_SCHEMA = "moerun-calibration/4"
CALIBRATION_LINK = 2e9  # bytes/s of the emulated link used to measure the cost of a blocking read
SHAPE_KEYS = ("layers", "experts", "top_k", "expert_bytes", "dense_bytes", "expert_us", "dense_layer_us")


@dataclass
class Costs:
    """Seconds per operation (see the module docstring)."""

    attn: list[float]
    expert: float
    head: float
    page: float
    page_source: str = ""
    wait: float = 0.0  # added to every blocking wait on a read: wake-up and miss bookkeeping, measured
    loader: float = 0.0  # compute-thread time lost per read handed to the reader process, measured

    def to_json(self) -> dict:
        return {
            "attn_us": [a * 1e6 for a in self.attn],
            "expert_us": self.expert * 1e6,
            "head_us": self.head * 1e6,
            "page_us": self.page * 1e6,
            "page_source": self.page_source,
            "wait_us": self.wait * 1e6,
            "loader_us": self.loader * 1e6,
        }


@dataclass
class Prediction:
    slots: list[int]
    policy: str
    prefetch: int
    lookahead: int
    tok_s: float
    step_s: float
    stall_s: float  # per token
    accesses: int
    misses: int
    prefetch_loads: int = 0
    per_layer_hit_rate: list[float] = field(default_factory=list)

    @property
    def hit_rate(self) -> float:
        return 1 - self.misses / self.accesses if self.accesses else 0.0

    @property
    def stall_share(self) -> float:
        return self.stall_s / self.step_s if self.step_s else 0.0

    def to_json(self) -> dict:
        d = asdict(self)
        d["hit_rate"] = self.hit_rate
        d["stall_share"] = self.stall_share
        return d


# ---------------------------------------------------------------------------- the time model


def predict(trace: Trace, slots: list[int], policy: str, prefetch: int, lookahead: int, costs: Costs) -> Prediction:
    """Simulate decode along ``trace`` (prefill tokens only warm the pool) and predict tok/s."""
    L = trace.n_layers
    if len(slots) != L:
        raise BadOption(f"{len(slots)} slot counts for a trace of {L} layers")
    if len(costs.attn) != L:
        raise BadOption(f"{len(costs.attn)} per-layer costs for a trace of {L} layers")
    if prefetch and trace.guesses is None:
        raise BadTrace("this trace holds no guesses, so prefetch cannot be planned (record one with 'moerun record')")
    if prefetch and (lookahead > trace.guesses.shape[2] or prefetch > trace.guesses.shape[3]):
        raise BadOption(
            f"the trace holds {trace.guesses.shape[3]} guesses for {trace.guesses.shape[2]} layers ahead; "
            f"cannot plan --prefetch {prefetch} --lookahead {lookahead}"
        )
    cls = policies.get(policy)
    P = prefill_tokens(trace)
    ex = trace.experts.tolist()
    plans = layer_plans(trace)
    res = [Residency(max(s, 1), plan_policy(cls, plans[layer])) for layer, s in enumerate(slots)]
    # prefill: each layer's distinct experts once, ascending, pinned alone (as the pool does)
    for layer in range(L):
        for e in sorted({e for t in range(P) for e in ex[t][layer] if e >= 0}):
            res[layer].access(e, (e,))
    g = trace.guesses.tolist() if prefetch else None
    probs = trace.probs
    signals = [type(r.policy).routed is not policies.Policy.routed for r in res]
    ready_at: list[dict] = [{} for _ in range(L)]  # key -> time its read finishes
    link_free = 0.0
    # requests the reader has not started: [submitted, layer, expert, target progress, urgent]
    pending: list[list] = []
    now = 0.0
    stall = 0.0
    accesses = misses = loads = 0
    layer_acc = [0] * L
    layer_miss = [0] * L
    T = trace.n_tokens

    def drop(req) -> None:
        """A guess the reader skips: its slot is given back."""
        pending.remove(req)
        res[req[1]].remove(req[2])

    def serve(until: float, progress: int, need: bool = False) -> None:
        """The reader: urgent requests first, then guesses in order; a guess whose layer has started
        without it is skipped.  Serves what starts before ``until`` (and, with ``need``, every urgent one)."""
        nonlocal link_free, loads
        while pending:
            t0 = max(link_free, min(r[0] for r in pending))
            if t0 > until and not (need and any(r[4] for r in pending)):
                return
            avail = [r for r in pending if r[0] <= t0]
            req = next((r for r in avail if r[4]), None)
            if req is None:
                req = avail[0]
                if req[3] <= progress:
                    drop(req)
                    continue
                loads += 1
            pending.remove(req)
            link_free = t0 + costs.page
            ready_at[req[1]][req[2]] = link_free

    def outstanding(layer: int, t: float) -> set:
        started = {x for x, r in ready_at[layer].items() if r > t}
        return started | {r[2] for r in pending if r[1] == layer}

    t_begin = 0.0
    background = 0  # reads handed to the reader this token
    loads_before = 0
    for t in range(P, T):
        if t == P:
            t_begin = now
        for layer in range(L):
            step = t * L + layer
            now += costs.attn[layer]
            chosen = sorted(e for e in ex[t][layer] if e >= 0)
            if signals[layer]:  # the per-step signal the live pool gives a policy (Policy.routed)
                res[layer].policy.routed(layer, chosen, probs[t, layer] if probs is not None else None, res[layer].now)
            if prefetch:
                serve(now, step - 1)
                for req in [r for r in pending if r[1] == layer and not r[4] and r[2] not in chosen]:
                    drop(req)  # guesses for this layer it does not use: skipped when the reader reaches them
            busy = outstanding(layer, now) if prefetch else {x for x, r in ready_at[layer].items() if r > now}
            pinned = frozenset(chosen)
            waiting = []  # (time the expert's bytes are there)
            n_ready = 0
            demand = []
            for e in chosen:
                while True:
                    try:
                        res[layer].busy = busy - {e}
                        hit, _, _ = res[layer].access(e, pinned if len(chosen) <= slots[layer] else (e,))
                        break
                    except NoVictim:  # every other slot is being read: wait for the first to finish
                        serve(now, step, need=True)
                        known = [ready_at[layer][x] for x in busy if ready_at[layer].get(x, 0.0) > now]
                        if not known:  # only reads the reader has not started: let it work through its queue
                            serve(float("inf"), step)
                            known = [ready_at[layer][x] for x in busy if ready_at[layer].get(x, 0.0) > now] or [now]
                        r = min(known)
                        stall += max(0.0, r - now)
                        now = max(now, r)
                        busy = outstanding(layer, now) if prefetch else {x for x in busy if ready_at[layer][x] > now}
                accesses += 1
                layer_acc[layer] += 1
                if hit:
                    req = next((r for r in pending if r[1] == layer and r[2] == e), None)
                    if req is not None:  # a guess not started yet: the reader now serves it first
                        req[4] = True
                        loads += 1
                        demand.append(e)
                        continue
                    r = ready_at[layer].get(e, 0.0)
                    if r > now:
                        waiting.append(r)
                    else:
                        n_ready += 1
                else:
                    misses += 1
                    layer_miss[layer] += 1
                    demand.append(e)
                    if prefetch:
                        pending.append([now, layer, e, step, True])
                        background += 1
            if prefetch:
                # the prefetch point: the next layers' guesses take their slots now, behind this layer's reads
                for j in range(1, lookahead + 1):
                    tl = layer + j
                    if tl >= L:
                        break
                    guesses = [e for e in g[t][layer][j - 1][:prefetch] if e >= 0]
                    protect = frozenset(guesses)
                    for e in guesses:
                        if e in res[tl]:
                            continue
                        try:
                            res[tl].busy = outstanding(tl, now)
                            res[tl].insert(e, protect)
                        except NoVictim:
                            continue
                        pending.append([now, tl, e, t * L + tl, False])
                serve(now, step, need=True)
                waiting += [ready_at[layer][e] for e in demand]
            now += n_ready * costs.expert  # resident experts first
            for r in sorted(waiting):
                if r > now:
                    stall += r + costs.wait - now
                    now = r + costs.wait
                now += costs.expert
            for e in demand if not prefetch else ():  # read here, one after another, on the shared link
                start = max(link_free, now)
                link_free = start + costs.page
                stall += link_free + costs.wait - now
                now = link_free + costs.wait + costs.expert
                ready_at[layer][e] = link_free
        now += costs.head + costs.loader * (background + loads - loads_before)
        background = 0
        loads_before = loads
    n = T - P
    total = now - t_begin
    step_s = total / n if n else 0.0
    return Prediction(
        list(slots), policy, prefetch, lookahead if prefetch else 0,
        1 / step_s if step_s else 0.0, step_s, stall / n if n else 0.0, accesses, misses, loads,
        [1 - m / a if a else 0.0 for m, a in zip(layer_miss, layer_acc)],
    )


# ---------------------------------------------------------------------------- budgets


def hit_curves(trace: Trace, policy: str, max_slots: int) -> list[list[int]]:
    """Misses per layer for 1..max_slots slots (index s-1), from replay."""
    caps = list(range(1, max_slots + 1))
    counts = replay_counts(trace, policy, caps)
    return [[counts[c][layer].misses for c in caps] for layer in range(trace.n_layers)]


def best_split(curves: list[list[int]], total: int, low: int, high: int) -> list[int]:
    """Slots per layer (each in low..high, summing to at most ``total``) with the fewest misses.

    Exact, by dynamic programming over the layers' miss curves; where every
    curve is convex this is what greedily giving each next slot to the layer
    that gains most would find.
    """
    L = len(curves)
    if total < L * low:
        raise ImpossibleBudget(f"{total} slots cannot give each of {L} layers {low}")
    INF = float("inf")
    best = {0: (0, [])}  # slots used -> (misses, split)
    for layer in range(L):
        nxt: dict[int, tuple] = {}
        for used, (m, split) in best.items():
            for s in range(low, high + 1):
                u = used + s
                if u > total:
                    break
                cand = (m + curves[layer][s - 1], split + [s])
                if cand[0] < nxt.get(u, (INF,))[0]:
                    nxt[u] = cand
        best = nxt
    return min(best.values(), key=lambda v: (v[0], sum(v[1])))[1]


def even_split(total: int, L: int, high: int) -> list[int]:
    base, extra = divmod(min(total, L * high), L)
    return [min(high, base + (1 if i < extra else 0)) for i in range(L)]


# ---------------------------------------------------------------------------- measured inputs


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


def _cache_dir() -> Path:
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "moerun"


def _model_key(model_dir: Path) -> str:
    st = (model_dir / "model.safetensors").stat()
    raw = f"{model_dir.resolve()}|{st.st_size}|{st.st_mtime_ns}|{np.__version__}|{os.uname().nodename}"
    return hashlib.blake2b(raw.encode(), digest_size=8).hexdigest()


def calibrate(model_dir, tokens: int = 96, repeats: int = 3, recalibrate: bool = False, cache: bool = True) -> dict:
    """Measure attn[l], expert and head on this machine (cached per model file and host).

    A fully resident decode with the event recorder gives each layer's compute
    per token; one expert's time is measured alone on the model's own weights;
    the rest of a step is the head.  The fastest of ``repeats`` runs is kept.
    """
    from .config import ModelConfig
    from .engine import load
    from .model import expert
    from .sampling import Sampling

    model_dir = Path(model_dir)
    path = _cache_dir() / f"calibration-{_model_key(model_dir)}.json"
    if cache and not recalibrate:
        doc = _cached_calibration(path, ModelConfig.load(model_dir).n_layers)
        if doc is not None:
            return doc
    best = None
    for _ in range(repeats):
        with load(model_dir) as eng:
            eng.start_trace()
            gen = eng.generate("", max_new=tokens + 1, sampling=Sampling(temperature=0.8, seed=0))
            tr = eng.finish_trace()
            comp = tr.events["compute_ns"][tr.meta["prefill_tokens"]:]
            step = gen.decode_ns / 1e9 / gen.decode_steps
            layer_s = comp.mean(axis=0) / 1e9
            u = np.random.default_rng(0).standard_normal((1, eng.config.d_model)).astype(np.float32)
            w = eng.experts.codec.weights(eng.experts.slots[0].bound)
            ts = []
            for _ in range(200):
                t0 = time.perf_counter_ns()
                np.float32(0.5) * expert(u, *w)
                ts.append(time.perf_counter_ns() - t0)
            e_s = float(np.median(ts)) / 1e9
        if best is None or step < best["step_s"]:
            best = {"step_s": step, "layer_s": layer_s.tolist(), "expert_s": e_s, "top_k": eng.config.top_k}
    # what a blocking read costs beyond its transfer time: run at the smallest cap over an emulated link
    from .budget import minimum_cap

    store = eng.store
    cap = minimum_cap(store.config, store.dense_nbytes, store.expert_nbytes, "even", store.codec.scratch_bytes())
    rate = CALIBRATION_LINK
    page = store.expert_nbytes / rate
    over = []
    for _ in range(repeats):
        with load(model_dir, mem_cap=cap, link_speed=rate) as eng:
            gen = eng.generate("", max_new=tokens + 1, sampling=Sampling(temperature=0.8, seed=0))
            misses = eng.stats["pool"]["misses"] / gen.decode_steps
            step = gen.decode_ns / 1e9 / gen.decode_steps
            if misses > 0:
                over.append((step - best["step_s"] - misses * page) / misses)
    wait_s = max(0.0, min(over)) if over else 0.0
    k = best["top_k"]
    attn = [max(0.0, ls - k * best["expert_s"]) for ls in best["layer_s"]]
    head = max(0.0, best["step_s"] - sum(best["layer_s"]))
    # what each background read costs the compute thread: the same run with prefetch, against the model
    base = Costs(attn, best["expert_s"], head, page, "calibration", wait_s)
    per_read = []
    for _ in range(repeats):
        with load(model_dir, mem_cap=cap, link_speed=rate, prefetch=2) as eng:
            eng.start_trace()
            gen = eng.generate("", max_new=tokens + 1, sampling=Sampling(temperature=0.8, seed=0))
            trace = eng.finish_trace()
            slots = list(eng.budget.slots)
        step = gen.decode_ns / 1e9 / gen.decode_steps
        pred = predict(trace, slots, "lru", 2, 1, base)
        reads = (pred.prefetch_loads + pred.misses) / max(1, gen.decode_steps)
        if reads > 0:
            per_read.append((step - pred.step_s) / reads)
    doc = {
        "schema": CALIBRATION_SCHEMA,
        "model_dir": str(model_dir.resolve()),
        "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "attn_s": attn,
        "expert_s": best["expert_s"],
        "head_s": head,
        "resident_step_s": best["step_s"],
        "wait_s": wait_s,
        "loader_s": max(0.0, min(per_read)) if per_read else 0.0,
        "note": "measured on this machine, fully resident, one decode thread",
    }
    if cache:
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            write_text_atomic(path, json.dumps(doc, indent=2))
        except OSError:
            pass
    return doc


MAX_LAYERS = 1 << 16
MAX_EXPERTS = 1 << 20
MAX_BYTES = 1 << 60
MAX_US = 1e12  # microseconds: eleven days per operation


def _cached_calibration(path: Path, n_layers: int) -> dict | None:
    """A cached calibration that is whole and sane, or None (then it is measured again and the file replaced).

    The cache is ours but lives in the user's directory: a file that parses yet holds negative, infinite or
    missing figures, or the figures of another layer count, is not trusted.
    """
    from .fileio import read_json_file
    from .units import finite_number

    if not path.exists():
        return None
    try:
        doc = read_json_file(path, BadInput, "calibration cache")
    except BadInput:
        return None
    if not isinstance(doc, dict) or doc.get("schema") != CALIBRATION_SCHEMA:
        return None
    attn = doc.get("attn_s")
    if not isinstance(attn, list) or len(attn) != n_layers or not all(finite_number(a, 0.0, 1.0) for a in attn):
        return None
    if not finite_number(doc.get("expert_s"), 1e-12, 1.0) or not finite_number(doc.get("resident_step_s"), 1e-12, 10.0):
        return None
    if not finite_number(doc.get("head_s"), 0.0, 1.0) or not all(finite_number(doc.get(k, 0.0), 0.0, 1.0) for k in ("wait_s", "loader_s")):
        return None
    doc["cached"] = str(path)
    return doc


def load_shape(path: str | os.PathLike) -> dict:
    """A small JSON describing a model too big to run here; validated, one clear error otherwise."""
    from .fileio import read_json_file
    from .units import finite_number, whole_number

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
    for key in ("expert_us", "dense_layer_us", "head_us"):
        if not finite_number(doc.get(key, 0), 0.0, MAX_US):
            raise BadInput(f"{p}: {key} must be a number of microseconds from 0 to {MAX_US:g}, got {doc.get(key)!r:.40}")
    if doc["expert_us"] <= 0:
        raise BadInput(f"{p}: expert_us must be greater than zero")
    if doc["top_k"] > doc["experts"]:
        raise BadInput(f"{p}: top_k ({doc['top_k']}) exceeds experts ({doc['experts']}): the shape contradicts itself")
    return doc


def check_decode_steps(trace: Trace, where: str) -> None:
    """The planner predicts decode speed: a trace whose tokens are all prefill has nothing to simulate."""
    P = prefill_tokens(trace)
    if trace.n_tokens - P < 1:
        raise BadTrace(
            f"{where}: no decode steps (all {trace.n_tokens} tokens are prefill), so there is no decode speed to "
            "predict; record a trace with 'moerun record' or 'moerun generate --max-new N --trace FILE'"
        )


def costs_from_calibration(cal: dict, page: float, page_source: str) -> Costs:
    return Costs(list(cal["attn_s"]), cal["expert_s"], cal["head_s"], page, page_source, cal.get("wait_s", 0.0), cal.get("loader_s", 0.0))


def costs_from_shape(shape: dict, page: float, page_source: str) -> Costs:
    return Costs([shape["dense_layer_us"] / 1e6] * shape["layers"], shape["expert_us"] / 1e6, shape.get("head_us", 0) / 1e6, page, page_source)


def check_trace_shape(trace: Trace, layers: int, experts: int, top_k: int, where: str) -> None:
    if trace.n_layers != layers or trace.top_k != top_k:
        raise BadInput(
            f"the trace has {trace.n_layers} layers and top_k {trace.top_k}, but {where} has {layers} and {top_k}"
        )
    if trace.n_experts > experts:
        raise BadInput(f"the trace names expert ids up to {trace.n_experts - 1}, but {where} has {experts} experts")
