"""moerun plan: predicted decode tok/s for a memory budget and a link; the best split, policy and prefetch."""

from __future__ import annotations

import math
import sys
import time
from pathlib import Path

from moerun import policies
from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, pct, table
from moerun.errors import BadInput, BadOption, ImpossibleBudget
from moerun.files.trace import read_trace
from moerun.model.config import RANDOM_NOTE
from moerun.planner.calibration import calibrate, costs_from_calibration, costs_from_shape, describe, load_shape, page_seconds
from moerun.planner.search import PREFETCH_CANDIDATES, Space, check_decode_steps, check_trace_shape
from moerun.runtime.budget import fixed_bytes, slot_bytes
from moerun.runtime.engine import default_model_dir
from moerun.sim.report import parse_policies
from moerun.units import fmt_bytes, fmt_exact, parse_rate, parse_size

HELP = "predict decode tok/s for a memory cap and a link; recommend slots per layer, policy and prefetch"

DEFAULT_TOKENS = 2048


def add_arguments(p) -> None:
    cli.add_model(p)
    p.add_argument("--mem-cap", metavar="SIZE", help="the memory budget to plan for")
    p.add_argument("--target", type=float, metavar="TOK_S", help="also find the smallest cap that reaches this decode speed")
    p.add_argument("--link-speed", metavar="RATE", help="page-in over a link of this speed, e.g. 2GB/s")
    p.add_argument("--probe", metavar="FILE", help="page-in times from 'moerun probe --save FILE'")
    p.add_argument("--regime", choices=("warm", "cold"), default=None, help="which probe figures to use, with --probe (default warm)")
    p.add_argument("--trace", metavar="FILE", help="routing trace (default: recorded now from the model's held-out text)")
    p.add_argument("--max-tokens", type=int, default=None, metavar="N",
                   help=f"tokens of held-out text to record when there is no --trace (default {DEFAULT_TOKENS})")
    p.add_argument("--shape", metavar="FILE", help="plan for a model described by a JSON shape file (needs --trace)")
    p.add_argument("--evict", default=None, metavar="P,P",
                   help=f"policies to consider (default: every online policy, {','.join(policies.names(online_only=True))})")
    p.add_argument("--shared-pool", action="store_true", help="also consider one pool shared by all layers")
    p.add_argument("--recalibrate", action="store_true", help="measure compute times again instead of using the cache")
    cli.add_json(p)


def _record(model_dir: Path, tokens: int):
    from moerun.model.tokenizer import read_text_file
    from moerun.runtime.options import load
    from moerun.sim.jobs import windows

    held = model_dir / "heldout.txt"
    if not held.exists():
        raise BadInput(f"{model_dir} has no heldout.txt; give a routing trace with --trace FILE")
    with load(model_dir) as eng:
        ids = eng.tokenizer.encode_array(read_text_file(held), tokens).tolist()
        eng.start_trace()
        for w in windows(ids, eng.config.max_seq_len, eng.config.bos_token_id):
            eng.logits(w)
        return eng.finish_trace(extra={"source": "record", "text": str(held), "prefill_tokens": 0})


def _inputs(args):
    """Every input checked before any work: options, probe, shape, model, trace, cap (then calibration)."""
    cli.refuse_together(args, "link_speed", "probe", "both say how fast a page-in is")
    cli.refuse_without(args, "regime", "probe", "--probe FILE (the regime picks its warm or cold figures)")
    cli.refuse_together(args, "max_tokens", "trace", "--max-tokens says how much to record when there is no --trace")
    if args.mem_cap is None and args.target is None:
        raise BadOption("give --mem-cap SIZE (and/or --target TOK_S)")
    if args.target is not None and not (args.target > 0 and math.isfinite(args.target)):
        raise BadOption(f"--target must be a positive speed in tok/s, got {args.target}")
    tokens = DEFAULT_TOKENS if args.max_tokens is None else args.max_tokens
    if tokens < 16:
        raise BadOption(f"--max-tokens must be at least 16, got {tokens}")
    names = parse_policies(args.evict) if args.evict is not None else policies.names(online_only=True)
    for n in names:
        if not getattr(policies.get(n), "online", True):
            raise BadOption(f"policy {n!r} reads the future; plan considers online policies only")
    rate = parse_rate(args.link_speed, "link speed") if args.link_speed else None
    cap = parse_size(args.mem_cap, "memory cap") if args.mem_cap is not None else None
    probe = None
    if args.probe:
        from moerun.prober.pagein import load_probe

        probe = load_probe(args.probe)
    if args.shape:
        if not args.trace:
            raise BadOption("--shape needs --trace FILE: routing of that model, in the trace import format")
        shape = load_shape(args.shape)
        model = {"L": shape["layers"], "E": shape["experts"], "k": shape["top_k"], "expert_bytes": shape["expert_bytes"],
                 "fixed": shape["dense_bytes"] + shape.get("kv_cache_bytes", 0) + shape.get("scratch_bytes", 0),
                 "shape": shape, "what": f"shape {args.shape}", "note": None}
    else:
        from moerun.files.store import ModelStore

        model_dir = Path(args.model) if args.model else default_model_dir()
        store = ModelStore.open(model_dir)
        c = store.config
        model = {"L": c.n_layers, "E": c.n_experts, "k": c.top_k, "expert_bytes": store.expert_nbytes,
                 "fixed": sum(fixed_bytes(c, store.dense_nbytes, store.codec.scratch_bytes())), "dir": model_dir,
                 "what": f"model {model_dir}", "note": RANDOM_NOTE if c.extra.get("synthetic") else None}
        store.close()
        if not args.trace and not (model_dir / "heldout.txt").exists():
            raise BadInput(f"{model_dir} has no heldout.txt; give a routing trace with --trace FILE")
    trace = None
    if args.trace:
        trace = read_trace(args.trace, n_experts=model["E"])
        check_trace_shape(trace, model["L"], model["E"], model["k"], model["what"])
        check_decode_steps(trace, args.trace)
    slot = slot_bytes(model["expert_bytes"])
    min_cap = model["fixed"] + model["L"] * model["k"] * slot
    if cap is not None and cap < min_cap:
        raise ImpossibleBudget(
            f"memory cap {fmt_exact(cap)} is too small: fixed parts take {fmt_bytes(model['fixed'])} and each of {model['L']} "
            f"layers needs {model['k']} slots of {fmt_bytes(slot)}; the smallest cap that works is {fmt_exact(min_cap)}"
        )
    page = page_seconds(model["expert_bytes"], rate, probe, args.regime or "warm")
    return {"names": names, "cap": cap, "tokens": tokens, "model": model, "trace": trace, "slot": slot, "page": page,
            "emulated": rate is not None}


def _space(args, inp, prog) -> tuple[Space, str, dict | None]:
    m = inp["model"]
    page, page_src = inp["page"]
    cal = None
    if "shape" in m:
        costs = costs_from_shape(m["shape"], page, page_src, inp["emulated"])
        cal_note = "compute times from the shape file"
    else:
        cal = calibrate(m["dir"], recalibrate=args.recalibrate, progress=lambda what: prog.update(0, f"calibrating: {what}"))
        costs = costs_from_calibration(cal, page, page_src, inp["emulated"])
        cal_note = describe(cal)
    trace = inp["trace"]
    if trace is None:
        prog.update(1, "recording a routing trace from the held-out text")
        trace = _record(m["dir"], inp["tokens"])
        check_decode_steps(trace, "the recorded trace")
    prog.update(2, "hit curves")
    pf = [pc for pc in PREFETCH_CANDIDATES if pc[0] == 0 or trace.guesses is not None]
    space = Space(trace, costs, m["L"], m["E"], m["k"], m["fixed"], inp["slot"], inp["names"], pf, bool(args.shared_pool))
    return space, cal_note, cal


def run(args) -> int:
    inp = _inputs(args)
    prog = Progress("plan", enabled=None if not args.json else False)
    space, cal_note, cal = _space(args, inp, prog)
    m = inp["model"]
    doc: dict = {
        "planned_for": m["what"],
        "costs": space.costs.to_json(),
        "calibration": cal_note,
        "calibration_flags": cal["flags"] if cal else [],
        "calibration_age_s": time.time() - cal["created_unix"] if cal else None,
        "calibration_spread": cal["step_spread"] if cal else None,
        "trace": {"tokens": inp["trace"].n_tokens if inp["trace"] is not None else space.trace.n_tokens,
                  "searched_tokens": space.trace.n_tokens, "source": space.trace.meta.get("source", "import"), "file": args.trace},
        "fixed_bytes": space.fixed,
        "slot_bytes": space.slot,
        "min_cap_bytes": space.min_cap,
        "all_resident_cap_bytes": space.full_cap,
    }
    if m["note"]:
        doc["note"] = m["note"]
    rec = rec_label = cands = None
    if inp["cap"] is not None:
        prog.update(3, "settings for the cap")
        rec_label, rec, cands = _for_cap(space, inp["cap"], doc)
    prog.update(4, "speed against cap")
    curve_policy = rec.policy if rec else "lru"
    curve_pf = [(rec.prefetch, rec.lookahead or 1)] if rec else space.prefetches
    curve = space.curve(curve_policy, curve_pf)
    doc["curve"] = {"policy": curve_policy, "points": curve}
    code = 0
    if args.target is not None:
        prog.update(5, "the smallest cap for the target")
        smallest = space.smallest_cap(args.target, curve_policy, curve_pf, curve)
        doc["target"] = {"tok_s": args.target, "smallest_cap_bytes": smallest, "reachable": smallest is not None,
                         "best_tok_s": curve[-1]["tok_s"]}
        code = 0 if smallest is not None else 1
    prog.close()
    if args.json:
        emit_json(doc)
        return code
    _text(sys.stdout, args, space, doc, cal_note, rec, rec_label, cands)
    return code


def _for_cap(space: Space, cap: int, doc: dict):
    total = space.slots_for(cap)
    cands = space.candidates(total)
    rec_label, rec = max(cands, key=lambda c: c[1].tok_s)
    doc["mem_cap_bytes"] = cap
    doc["slots_total"] = total
    doc["candidates"] = [{"split": lab, **pr.to_json()} for lab, pr in cands]
    doc["recommended"] = {"split": rec_label, **rec.to_json()}
    pick = {lab: next(pr for la, pr in cands if la == lab and pr.policy == rec.policy and pr.prefetch == 0) for lab in ("even", "uneven")}
    doc["split_comparison"] = {"policy": rec.policy, **{
        lab: {"slots": pr.slots, "per_layer_hit_rate": pr.per_layer_hit_rate, "hits": pr.accesses - pr.misses, "tok_s": pr.tok_s}
        for lab, pr in pick.items()}}
    return rec_label, rec, cands


def _text(out, args, space: Space, doc: dict, cal_note: str, rec, rec_label, cands) -> None:
    L, c = space.layers, space.costs
    out.write(f"plan for {doc['planned_for']}\n")
    if doc.get("note"):
        out.write(f"note: {doc['note']}\n")
    out.write(f"costs per token: attention etc. {sum(c.attn) * 1e6:.0f} us over {L} layers, one expert {c.expert * 1e6:.1f} us "
              f"(decoding its format {c.decode * 1e6:.1f} us), head {c.head * 1e6:.0f} us; one page-in {c.page * 1e6:.0f} us "
              f"({c.page_source})\n{cal_note}\n")
    tr = doc["trace"]
    searched = f", the first {tr['searched_tokens']} searched" if tr["searched_tokens"] < tr["tokens"] else ""
    out.write(f"routing: {tr['tokens']} tokens ({tr['source']}{searched}); fixed parts {fmt_bytes(space.fixed)}, slot "
              f"{fmt_bytes(space.slot)}, smallest cap {fmt_bytes(space.min_cap)}, all resident {fmt_bytes(space.full_cap)}\n\n")
    if rec is not None:
        top = sorted(cands, key=lambda x: -x[1].tok_s)
        rows = [[lab, ",".join(map(str, pr.slots)), pr.policy, f"{pr.prefetch}x{pr.lookahead}" if pr.prefetch else "off",
                 pct(pr.hit_rate), pct(pr.stall_share), f"{pr.tok_s:.0f}"] for lab, pr in top[:12]]
        out.write(f"cap {fmt_bytes(doc['mem_cap_bytes'])}: {doc['slots_total']} slots; best {min(12, len(top))} of {len(top)} settings\n")
        out.write(table(["split", "slots", "policy", "prefetch", "hit rate", "stall", "tok/s"], rows, "lllllrr") + "\n")
        how = "one shared pool" if rec.shared else f"{rec_label} split {','.join(map(str, rec.slots))}"
        out.write(f"recommended: {how}, --evict {rec.policy}, "
                  + (f"--prefetch {rec.prefetch} --lookahead {rec.lookahead}" if rec.prefetch else "no prefetch")
                  + f": {rec.tok_s:.0f} tok/s predicted, {pct(rec.stall_share)} stalled\n\n")
        sc = doc["split_comparison"]
        rows = [[str(layer), sc["even"]["slots"][layer], pct(sc["even"]["per_layer_hit_rate"][layer]),
                 sc["uneven"]["slots"][layer], pct(sc["uneven"]["per_layer_hit_rate"][layer])] for layer in range(L)]
        rows.append(["hits", sum(sc["even"]["slots"]), sc["even"]["hits"], sum(sc["uneven"]["slots"]), sc["uneven"]["hits"]])
        out.write(f"even against uneven split ({sc['policy']}, no prefetch):\n")
        out.write(table(["layer", "even slots", "hit rate", "uneven slots", "hit rate"], rows) + "\n\n")
    curve = doc["curve"]["points"]
    rows = [[fmt_bytes(p["cap_bytes"]), p["slots_total"], "shared" if p["shared"] else ",".join(map(str, p["slots"])),
             f"{p['prefetch']}" if p["prefetch"] else "off", pct(p["stall_share"]), f"{p['tok_s']:.0f}"] for p in curve]
    out.write(f"predicted decode speed against cap ({doc['curve']['policy']}):\n")
    out.write(table(["cap", "slots", "split", "prefetch", "stall", "tok/s"], rows) + "\n")
    if args.target is not None:
        t = doc["target"]
        if t["reachable"]:
            out.write(f"target {args.target:g} tok/s: smallest cap {fmt_bytes(t['smallest_cap_bytes'])} ({t['smallest_cap_bytes']} bytes)\n")
        else:
            out.write(f"target {args.target:g} tok/s is out of reach: at most {t['best_tok_s']:.0f} tok/s with every expert resident\n")
