"""``moerun.plan``: predicted decode tok/s for a memory budget and a link; the best split, policy and prefetch.

The result's ``to_json()`` is what ``moerun plan --json`` prints; errors are ``moerun.errors``; progress
and notices go to the callbacks given, never to a stream.
"""

from __future__ import annotations

import math
import os
import time
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

from moerun import policies
from moerun.errors import BadInput, BadOption, ImpossibleBudget
from moerun.files.bundled import resolve_model
from moerun.files.ckpt_config import is_open_checkpoint
from moerun.files.config import RANDOM_NOTE
from moerun.files.trace import Trace, read_trace
from moerun.planner import selfcheck
from moerun.planner.calibration import calibrate, costs_from_calibration, costs_from_shape, describe, load_shape, page_seconds
from moerun.planner.search import Space, check_decode_steps, check_trace_shape, choose, minimum_cap, prefetch_candidates
from moerun.planner.selfcheck import PlanCheck
from moerun.planner.shape_costs import checkpoint_shape, measure_shape, model_shape
from moerun.planner.timeline import Costs, Prediction
from moerun.runtime.budget import fixed_bytes, slot_bytes
from moerun.runtime.memwatch import fits_whole
from moerun.sim.report import parse_policies
from moerun.units import fmt_bytes, fmt_exact, parse_rate, parse_size

DEFAULT_TOKENS = 2048


@dataclass
class PlanResult:
    """The plan: costs, the settings searched at ``mem_cap`` with the recommended one, the curve of predicted
    speed against cap, and the smallest cap for a target speed.  Fields without a value were not asked for."""

    planned_for: str
    costs: Costs
    calibration: str  # where the compute times came from, and the calibration's age and spread
    calibration_flags: list
    calibration_age_s: float | None
    calibration_spread: float | None
    trace: dict
    fixed_bytes: int
    slot_bytes: int
    min_cap_bytes: int  # the smallest cap searched (a shared pool's with shared_pool)
    per_layer_min_cap_bytes: int  # the smallest cap of one pool per layer
    all_resident_cap_bytes: int
    curve: dict  # {"policy": ..., "points": [{cap_bytes, slots_total, slots, split, prefetch, lookahead, stall_share, tok_s}]}
    layers: int  # (not in the document: the model's layers and experts per layer, for the text)
    experts: int
    note: str | None = None
    mem_cap_bytes: int | None = None
    slots_total: int | None = None
    candidates: list[tuple[str, Prediction]] | None = None  # (split label, prediction), every setting searched
    recommended_split: str | None = None
    recommended: Prediction | None = None
    split_comparison: dict | None = None  # None when only a shared pool fits the cap
    target: dict | None = None  # {"tok_s", "smallest_cap_bytes", "reachable", "best_tok_s"}
    warm_from: dict | None = None  # the routing profile every setting starts warm from (None: cold starts)
    check: PlanCheck | None = None  # the recommendation run here, predicted against measured (``--no-check``: None)

    @property
    def ok(self) -> bool:
        """False when a target was given and no cap reaches it (the command's exit code 1)."""
        return self.target is None or self.target["reachable"]

    def to_json(self) -> dict:
        doc: dict = {
            "planned_for": self.planned_for,
            "costs": costs_json(self.costs),
            "calibration": self.calibration,
            "calibration_flags": self.calibration_flags,
            "calibration_age_s": self.calibration_age_s,
            "calibration_spread": self.calibration_spread,
            "trace": self.trace,
            "fixed_bytes": self.fixed_bytes,
            "slot_bytes": self.slot_bytes,
            "min_cap_bytes": self.min_cap_bytes,
            "per_layer_min_cap_bytes": self.per_layer_min_cap_bytes,
            "all_resident_cap_bytes": self.all_resident_cap_bytes,
        }
        if self.warm_from is not None:
            doc["warm_from"] = self.warm_from
        if self.check is not None:
            doc["check"] = self.check.to_json()
        if self.note:
            doc["note"] = self.note
        if self.recommended is not None:
            doc["mem_cap_bytes"] = self.mem_cap_bytes
            doc["slots_total"] = self.slots_total
            doc["candidates"] = [prediction_json(lab, pr) for lab, pr in self.candidates]
            doc["recommended"] = prediction_json(self.recommended_split, self.recommended)
            doc["split_comparison"] = self.split_comparison
        doc["curve"] = self.curve
        if self.target is not None:
            doc["target"] = self.target
        return doc


def _seconds(value, factor: float):
    """A duration (or a list or mapping of them) in ``1 / factor`` seconds, as seconds."""
    if isinstance(value, dict):
        return {k: v / factor for k, v in value.items()}
    if isinstance(value, list):
        return [v / factor for v in value]
    return value / factor


def costs_json(costs: Costs) -> dict:
    """The time model's costs with every duration in seconds, as every JSON document gives durations
    (docs/guide/api.md, "Units"): ``attn_s``, ``expert_s``, ..., ``policy_s_per_access``.  (Costs.to_json
    writes microseconds; the plan's document converts them here.)"""
    doc: dict = {}
    for key, value in costs.to_json().items():
        if key.endswith("_us_per_access"):
            doc[key.removesuffix("_us_per_access") + "_s_per_access"] = _seconds(value, 1e6)
        elif key.endswith("_us"):
            doc[key.removesuffix("_us") + "_s"] = _seconds(value, 1e6)
        else:
            doc[key] = value
    return doc


def prediction_json(split: str, pr: Prediction) -> dict:
    """One setting's prediction as every document writes a setting: the pool as ``split`` ("even", "uneven" or
    "shared"; no ``shared`` flag beside it) and prefetch as the engine's options write it (``prefetch``, 0 for
    none or "auto" for prefetch auto, and ``lookahead``, 1 when there is no prefetch).  Prefetch auto's account
    adds ``skipped`` and ``rests`` (0 for the other settings)."""
    doc = {"split": split, **pr.to_json()}
    doc.pop("shared", None)
    if not doc["prefetch"]:
        doc["lookahead"] = 1
    return doc


def _curve(space: Space, policy: str, prefetches) -> tuple[list[dict], list[tuple[str, Prediction]]]:
    """``space.curve``'s points, and the setting (split label, prediction) behind each point, so that a point can
    name its pool and its whole prefetch setting (the points themselves carry neither the split label nor the
    lookahead).  The setting is the one Space.curve keeps: the fastest seen so far, asking ``space.best``."""
    seen: dict = {}
    ask = space.best

    def best(total, *args, **kwargs):
        seen[total] = ask(total, *args, **kwargs)
        return seen[total]

    space.best = best
    try:
        points = space.curve(policy, prefetches)
    finally:
        del space.best
    settings, kept = [], None
    for p in points:
        lab, pr = seen[p["slots_total"]]
        if kept is None or pr.tok_s > kept[1].tok_s:
            kept = (lab, pr)
        settings.append(kept)
    return points, settings


def _point(point: dict, label: str, pr: Prediction) -> dict:
    """A curve point with its pool as ``split`` and its prefetch setting whole."""
    out = {k: v for k, v in point.items() if k != "shared"}
    out["split"] = label
    out["prefetch"] = pr.prefetch_setting
    out["lookahead"] = pr.lookahead if pr.prefetch else 1
    return out


def _record(model_dir: Path, tokens: int, mem_cap: int | None = None) -> Trace:
    from moerun.model.tokenizer import read_text_file
    from moerun.runtime.options import load
    from moerun.sim.jobs import windows

    held = model_dir / "heldout.txt"
    if not held.exists():
        raise BadInput(f"{model_dir} has no heldout.txt; give a routing trace with --routing FILE")
    with load(model_dir, mem_cap=mem_cap) as eng:  # routing is the same under any cap (offloaded == resident)
        ids = eng.tokenizer.encode_array(read_text_file(held), tokens).tolist()
        eng.start_trace()
        for w in windows(ids, eng.config.max_seq_len, eng.config.bos_token_id):
            eng.logits(w)
        return eng.finish_trace(extra={"source": "record", "text": str(held), "prefill_tokens": 0})


def _inputs(model_dir, mem_cap, target, link_speed, probe, regime, trace, max_tokens, shape, evict, shared_pool,
            warm_from=None) -> dict:
    """Every input checked before any work: options, probe, shape, model, trace, cap (then calibration)."""
    if link_speed is not None and probe is not None:
        raise BadOption("--link-speed and --probe contradict each other (both say how fast a page-in is); give one")
    if regime is not None and probe is None:
        raise BadOption("--regime has no effect without --probe FILE (the regime picks its warm or cold figures); "
                        "drop it or add --probe")
    if max_tokens is not None and trace is not None:
        raise BadOption("--max-tokens and --routing contradict each other (--max-tokens says how much to record when "
                        "there is no --routing); give one")
    if mem_cap is None and target is None:
        raise BadOption("give --mem-cap SIZE (and/or --target TOK_S)")
    if target is not None and not (target > 0 and math.isfinite(target)):
        raise BadOption(f"--target must be a positive speed in tok/s, got {target}")
    tokens = DEFAULT_TOKENS if max_tokens is None else max_tokens
    if tokens < 16:
        raise BadOption(f"--max-tokens must be at least 16, got {tokens}")
    if evict is None:
        names = policies.names(online_only=True)
    else:
        names = parse_policies(evict if isinstance(evict, str) else ",".join(evict))
    for n in names:
        if not getattr(policies.get(n), "online", True):
            raise BadOption(f"policy {n!r} reads the future; plan considers online policies only")
    rate = parse_rate(link_speed, "link speed") if link_speed else None
    cap = parse_size(mem_cap, "memory cap") if mem_cap is not None else None
    probe_doc = None
    if probe:
        from moerun.prober.saved import load_probe

        probe_doc = load_probe(probe)
    if shape:
        if not trace:
            raise BadOption("--shape needs --routing FILE: routing of that model, in the trace import format")
        sh = load_shape(shape)
        model = {"L": sh["layers"], "E": sh["experts"], "k": sh["top_k"], "expert_bytes": sh["expert_bytes"],
                 "fixed": sh["dense_bytes"] + sh.get("kv_cache_bytes", 0) + sh.get("scratch_bytes", 0),
                 "shape": sh, "what": f"shape {shape}", "note": None}
    elif model_dir and is_open_checkpoint(resolve_model(model_dir)):
        model_dir = resolve_model(model_dir)
        if not trace:
            raise BadInput(f"{model_dir} is an open checkpoint: give a routing trace of it with --routing FILE "
                           f"(moerun record --model {model_dir} --text FILE --trace FILE --mem-cap SIZE makes one)")
        sh, c = checkpoint_shape(model_dir)
        model = {"L": sh["layers"], "E": sh["experts"], "k": sh["top_k"], "expert_bytes": sh["expert_bytes"],
                 "fixed": sh["dense_bytes"] + sh["kv_cache_bytes"] + sh["scratch_bytes"], "checkpoint": (sh, c), "dir": model_dir,
                 "what": f"open checkpoint {model_dir}", "note": RANDOM_NOTE if sh["random_weights"] else None}
    else:
        from moerun.files.store import ModelStore

        model_dir = resolve_model(model_dir or None)
        store = ModelStore.open(model_dir)
        c = store.config
        model = {"L": c.n_layers, "E": c.n_experts, "k": c.top_k, "expert_bytes": store.expert_nbytes,
                 "fixed": sum(fixed_bytes(c, store.dense_nbytes, store.codec.scratch_bytes())), "dir": model_dir,
                 "d_model": c.d_model,
                 "what": f"model {model_dir}", "note": RANDOM_NOTE if c.extra.get("synthetic") else None}
        # too large to run whole: timed at its shape and on a few of its experts, its routing recorded under a cap
        model["whole"] = fits_whole(model["fixed"] + c.n_layers * c.n_experts * slot_bytes(store.slot_nbytes))
        store.close()
        if not trace and not (model_dir / "heldout.txt").exists():
            raise BadInput(f"{model_dir} has no heldout.txt; give a routing trace with --routing FILE")
    warm = None
    if warm_from is not None:
        from moerun.files.profile import read_profile

        warm = read_profile(warm_from)
        warm.check_model(model["L"], model["E"], model["k"], model.get("d_model"), model["what"])
    routing = None
    if trace:
        routing = read_trace(trace, n_experts=model["E"])
        check_trace_shape(routing, model["L"], model["E"], model["k"], model["what"])
        check_decode_steps(routing, trace)
    slot = slot_bytes(model["expert_bytes"])
    per_layer = minimum_cap(model["fixed"], slot, model["L"], model["k"])
    shared = minimum_cap(model["fixed"], slot, model["L"], model["k"], shared=True)
    if cap is not None and cap < (shared if shared_pool else per_layer):
        fixed = f"memory cap {fmt_exact(cap)} is too small: fixed parts take {fmt_bytes(model['fixed'])} and "
        if shared_pool:
            raise ImpossibleBudget(f"{fixed}one pool shared by all layers needs {model['k']} slots of {fmt_bytes(slot)}; "
                                   f"the smallest cap that works is {fmt_exact(shared)}")
        raise ImpossibleBudget(
            f"{fixed}each of {model['L']} layers needs {model['k']} slots of {fmt_bytes(slot)}; the smallest cap that "
            f"works is {fmt_exact(per_layer)}" + (f" (with --shared-pool, {fmt_exact(shared)})" if shared < per_layer else "")
        )
    page = page_seconds(model["expert_bytes"], rate, probe_doc, regime or "warm")
    return {"names": names, "cap": cap, "tokens": tokens, "model": model, "trace": routing, "slot": slot, "page": page,
            "emulated": rate is not None, "warm": warm, "rate": rate,
            "cold": probe_doc is not None and regime == "cold"}


def _space(inp: dict, shared_pool: bool, recalibrate: bool, step: Callable[[int, str], None],
           notice: Callable[[str], None] | None) -> tuple[Space, str, dict | None]:
    m = inp["model"]
    page, page_src = inp["page"]
    cal = None
    if "shape" in m:
        costs = costs_from_shape(m["shape"], page, page_src, inp["emulated"])
        cal_note = "compute times from the shape file"
    elif "checkpoint" in m:
        sh, c = m["checkpoint"]
        step(0, "timing one layer at the checkpoint's shape")
        timed = measure_shape(c, c.dtype)
        costs = costs_from_shape({**sh, **timed}, page, page_src, inp["emulated"])
        cal_note = f"compute times from {timed['measured']}, now"
    elif not m["whole"]:
        step(0, "timing one layer at the model's shape (too large to run whole here)")
        timed = model_shape(m["dir"])
        costs = costs_from_shape(timed, page, page_src, inp["emulated"])
        cal_note = f"compute times from {timed['measured']}, now (the model is too large to run whole here)"
    else:
        cal = calibrate(m["dir"], recalibrate=recalibrate, progress=lambda what: step(0, f"calibrating: {what}"),
                        notice=notice)
        costs = costs_from_calibration(cal, page, page_src, inp["emulated"])
        cal_note = describe(cal)
    trace = inp["trace"]
    if trace is None:
        step(1, "recording a routing trace from the held-out text")
        small = m["fixed"] + m["L"] * m["k"] * inp["slot"]  # the smallest cap: room enough to record routing
        trace = _record(m["dir"], inp["tokens"], None if m["whole"] else max(small, inp["cap"] or 0))
        check_decode_steps(trace, "the recorded trace")
    step(2, "hit curves")
    pf = prefetch_candidates(trace)
    warm = inp.get("warm")
    space = Space(trace, costs, m["L"], m["E"], m["k"], m["fixed"], inp["slot"], inp["names"], pf, bool(shared_pool),
                  profile=warm.counts if warm is not None else None)
    return space, cal_note, cal


def _self_check(inp: dict, space: Space, total: int, label: str, rec: Prediction, cands: list, warm_from,
                step: Callable[[int, str], None]) -> tuple:
    """Run the recommendation here (``moerun.planner.selfcheck``); when it disagrees with its prediction beyond the
    runs' noise, correct the compute costs and search again.  Returns the check and the (new) choice."""
    m = inp["model"]
    prompt, what = selfcheck.prompt_ids(m["dir"])
    extra = {"warm_from": warm_from} if warm_from is not None else {}
    chk = selfcheck.measure(m["dir"], rec, inp["cap"], prompt, inp["rate"], inp["cold"],
                            progress=lambda i, n: step(3, f"checking the recommendation: run {i + 1} of {n}"), **extra)
    chk.prompt = what
    if not chk.agrees:
        factor = selfcheck.compute_factor(rec, chk.measured_tok_s)
        if factor is not None:
            step(3, "settings for the cap, with the corrected costs")
            space.set_costs(selfcheck.scaled_costs(space.costs, factor))
            cands = space.candidates(total)
            label, rec = choose(cands)
            chk.factor, chk.corrected_tok_s = factor, rec.tok_s
    return chk, label, rec, cands


def plan(model_dir: str | os.PathLike | None = None, mem_cap: int | str | None = None, *, target: float | None = None,
         link_speed: float | str | None = None, probe: str | os.PathLike | None = None, regime: str | None = None,
         routing: str | os.PathLike | None = None, max_tokens: int | None = None, shape: str | os.PathLike | None = None,
         evict: str | Sequence[str] | None = None, shared_pool: bool = False, recalibrate: bool = False,
         progress: Callable[[int, str], None] | None = None, notice: Callable[[str], None] | None = None,
         trace: str | os.PathLike | None = None, warm_from=None, check: bool = True) -> PlanResult:
    """Predict decode speed for ``mem_cap`` and recommend slots per layer, policy and prefetch (``moerun plan``).

    Page-in costs come from ``link_speed`` (emulated link) or a saved ``probe`` file (its ``regime``, "warm"
    or "cold"); routing from a ``routing`` trace file (the command's ``--routing``), or recorded now from the
    model's held-out text (its first ``max_tokens`` tokens, default 2048); ``shape`` plans for a model described
    by a JSON shape file (with ``routing``).  ``trace``: the old name of ``routing`` (a DeprecationWarning).  ``evict``: the policies to consider (default every online one); ``shared_pool`` also
    considers one pool for all layers; ``target``: also find the smallest cap reaching this tok/s.
    ``warm_from``: a routing profile (path or Profile, ``moerun profile``): every setting is predicted with a warm
    start from it (``Decisions.warm``), and its counts give one more split of slots per layer ("profile").
    ``check``: run the recommendation here, the way generate would, and compare (``moerun.planner.selfcheck``);
    when the two disagree beyond the runs' noise, the compute costs are corrected and the search made again.
    ``progress(step, what)`` as the work advances (steps 0 to 5); ``notice(line)`` when something the user
    should know happens on the way (a cached calibration that is not valid, measured again).
    """
    def step(i: int, what: str) -> None:
        if progress is not None:
            progress(i, what)

    if trace is not None:
        if routing is not None:
            raise BadOption("the trace to read was given twice (trace= and routing=); give it once, as routing=")
        warnings.warn("moerun.plan(trace=...) is deprecated and goes in the next release; write routing=...",
                      DeprecationWarning, stacklevel=2)
        routing = trace
    trace = routing
    inp = _inputs(model_dir, mem_cap, target, link_speed, probe, regime, trace, max_tokens, shape, evict, shared_pool,
                  warm_from)
    space, cal_note, cal = _space(inp, shared_pool, recalibrate, step, notice)
    m = inp["model"]
    result = PlanResult(
        planned_for=m["what"],
        costs=space.costs,
        calibration=cal_note,
        calibration_flags=cal["flags"] if cal else [],
        calibration_age_s=time.time() - cal["created_unix"] if cal else None,
        calibration_spread=cal["step_spread"] if cal else None,
        trace={"tokens": inp["trace"].n_tokens if inp["trace"] is not None else space.trace.n_tokens,
               "searched_tokens": space.trace.n_tokens, "source": space.trace.meta.get("source", "import"),
               "file": str(trace) if isinstance(trace, os.PathLike) else trace},
        fixed_bytes=space.fixed,
        slot_bytes=space.slot,
        min_cap_bytes=space.min_cap,
        per_layer_min_cap_bytes=space.per_layer_min_cap,
        all_resident_cap_bytes=space.full_cap,
        curve={},
        layers=space.layers,
        experts=space.experts,
        note=m["note"],
    )
    if inp["warm"] is not None:
        from moerun.sim.report import warm_json

        result.warm_from = warm_json(inp["warm"])
    rec = None
    if inp["cap"] is not None:
        step(3, "settings for the cap")
        total = space.slots_for(inp["cap"])
        cands = space.candidates(total)
        rec_label, rec = choose(cands)
        if check and "dir" in m:
            chk, rec_label, rec, cands = _self_check(inp, space, total, rec_label, rec, cands, warm_from, step)
            result.check = chk
            result.costs = space.costs
        result.mem_cap_bytes = inp["cap"]
        result.slots_total = total
        result.candidates = cands
        result.recommended_split = rec_label
        result.recommended = rec
        if total >= space.layers * space.top_k:  # per-layer pools fit (below, only a shared pool does)
            pick = {lab: next(pr for la, pr in cands if la == lab and pr.policy == rec.policy and pr.prefetch == 0)
                    for lab in ("even", "uneven")}
            result.split_comparison = {"policy": rec.policy, **{
                lab: {"slots": pr.slots, "per_layer_hit_rate": pr.per_layer_hit_rate, "hits": pr.accesses - pr.misses,
                      "tok_s": pr.tok_s}
                for lab, pr in pick.items()}}
    step(4, "speed against cap")
    curve_policy = rec.policy if rec else "lru"
    curve_pf = [(rec.prefetch_setting, rec.lookahead or 1)] if rec else space.prefetches
    curve, settings = _curve(space, curve_policy, curve_pf)
    result.curve = {"policy": curve_policy, "points": [_point(p, *s) for p, s in zip(curve, settings)]}
    if target is not None:
        step(5, "the smallest cap for the target")
        smallest = space.smallest_cap(target, curve_policy, curve_pf, curve)
        result.target = {"tok_s": target, "smallest_cap_bytes": smallest, "reachable": smallest is not None,
                         "best_tok_s": curve[-1]["tok_s"]}
    return result
