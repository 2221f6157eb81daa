"""moerun plan: predicted decode tok/s for a memory budget and a link; the best split, policy and prefetch."""

from __future__ import annotations

import math
import sys
from pathlib import Path

from .. import cli, policies
from ..budget import fixed_bytes, slot_bytes
from ..engine import default_model_dir
from ..errors import BadInput, BadOption, ImpossibleBudget
from ..plan import (
    best_split,
    calibrate,
    check_decode_steps,
    check_trace_shape,
    costs_from_calibration,
    costs_from_shape,
    even_split,
    hit_curves,
    load_shape,
    page_seconds,
    predict,
)
from ..replay import parse_policies
from ..report import Progress, emit_json, pct, table
from ..trace import read_trace
from ..units import fmt_bytes, fmt_exact, parse_rate, parse_size

HELP = "predict decode tok/s for a memory cap and a link; recommend slots per layer, policy and prefetch"

PREFETCH_CANDIDATES = [(0, 1), (1, 1), (2, 1), (2, 2), (3, 1)]
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
    p.add_argument("--recalibrate", action="store_true", help="measure compute times again instead of using the cache")
    cli.add_json(p)


def _record(model_dir: Path, tokens: int):
    from ..commands.record import windows
    from ..engine import load
    from ..tokenizer import read_text_file

    held = model_dir / "heldout.txt"
    if not held.exists():
        raise BadInput(f"{model_dir} has no heldout.txt; give a routing trace with --trace FILE")
    with load(model_dir) as eng:
        ids = eng.tokenizer.encode_array(read_text_file(held), tokens).tolist()
        eng.start_trace()
        for w in windows(ids, eng.config.max_seq_len, eng.config.bos_token_id):
            eng.logits(w)
        return eng.finish_trace(extra={"source": "record", "text": str(held), "prefill_tokens": 0})


def run(args) -> int:
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
    regime = args.regime or "warm"
    names = parse_policies(args.evict) if args.evict is not None else policies.names(online_only=True)
    rate = parse_rate(args.link_speed, "link speed") if args.link_speed else None
    probe = None
    if args.probe:
        from ..probe import load_probe

        probe = load_probe(args.probe)
    prog = Progress("plan", enabled=None if not args.json else False)
    note = None
    if args.shape:
        if not args.trace:
            raise BadOption("--shape needs --trace FILE: routing of that model, in the trace import format")
        shape = load_shape(args.shape)
        trace = read_trace(args.trace, n_experts=shape["experts"])
        check_trace_shape(trace, shape["layers"], shape["experts"], shape["top_k"], f"shape file {args.shape}")
        L, E, k = shape["layers"], shape["experts"], shape["top_k"]
        expert_nbytes = shape["expert_bytes"]
        fixed = shape["dense_bytes"] + shape.get("kv_cache_bytes", 0) + shape.get("scratch_bytes", 0)
        page, page_src = page_seconds(expert_nbytes, rate, probe, regime)
        costs = costs_from_shape(shape, page, page_src)
        what = f"shape {args.shape}"
        cal_note = "compute times from the shape file"
    else:
        from ..store import ModelStore

        model_dir = Path(args.model) if args.model else default_model_dir()
        store = ModelStore.open(model_dir)
        c = store.config
        L, E, k = c.n_layers, c.n_experts, c.top_k
        expert_nbytes = store.expert_nbytes
        fixed = sum(fixed_bytes(c, store.dense_nbytes, store.codec.scratch_bytes()))
        store.close()
        if c.extra.get("synthetic"):
            note = "random weights: routing is meaningless"
        prog.update(0, "calibrating")
        cal = calibrate(model_dir, recalibrate=args.recalibrate)
        prog.update(1, "routing trace")
        if args.trace:
            trace = read_trace(args.trace, n_experts=E)
            check_trace_shape(trace, L, E, k, f"model {model_dir}")
        else:
            trace = _record(model_dir, tokens)
        page, page_src = page_seconds(expert_nbytes, rate, probe, regime)
        costs = costs_from_calibration(cal, page, page_src)
        what = f"model {model_dir}"
        cal_note = "compute times measured on this machine" + (f" (cached: {cal['cached']})" if cal.get("cached") else "")
    slot = slot_bytes(expert_nbytes)
    min_cap = fixed + L * k * slot
    full_cap = fixed + L * E * slot
    check_decode_steps(trace, args.trace or "the recorded trace")
    for n in names:
        if not getattr(policies.get(n), "online", True):
            raise BadOption(f"policy {n!r} reads the future; plan considers online policies only")
    has_guesses = trace.guesses is not None
    pf_cands = [pc for pc in PREFETCH_CANDIDATES if pc[0] == 0 or has_guesses]
    prog.update(2, "hit curves")
    curves = {n: hit_curves(trace, n, E) for n in names}

    def candidates(total_slots: int, policy_names, prefetches):
        out = []
        even = even_split(total_slots, L, E)
        for n in policy_names:
            splits = {"even": even, "uneven": best_split(curves[n], total_slots, k, E)}
            for label, sl in splits.items():
                for pf, la in prefetches:
                    pr = predict(trace, sl, n, pf, la, costs)
                    out.append((label, pr))
        return out

    doc: dict = {
        "planned_for": what,
        "costs": costs.to_json(),
        "calibration": cal_note,
        "trace": {"tokens": trace.n_tokens, "source": trace.meta.get("source", "import"), "file": args.trace},
        "fixed_bytes": fixed,
        "slot_bytes": slot,
        "min_cap_bytes": min_cap,
        "all_resident_cap_bytes": full_cap,
    }
    if note:
        doc["note"] = note
    rec = None
    cands = []
    if args.mem_cap is not None:
        cap = parse_size(args.mem_cap, "memory cap")
        if cap < min_cap:
            raise ImpossibleBudget(
                f"memory cap {fmt_exact(cap)} is too small: fixed parts take {fmt_bytes(fixed)} and each of {L} layers needs "
                f"{k} slots of {fmt_bytes(slot)}; the smallest cap that works is {fmt_exact(min_cap)}"
            )
        total = min((cap - fixed) // slot, L * E)
        prog.update(3, "candidates")
        cands = candidates(total, names, pf_cands)
        rec_label, rec = max(cands, key=lambda c: c[1].tok_s)
        doc["mem_cap_bytes"] = cap
        doc["slots_total"] = total
        doc["candidates"] = [{"split": lab, **pr.to_json()} for lab, pr in cands]
        doc["recommended"] = {"split": rec_label, **rec.to_json()}
        even_lru = next(pr for lab, pr in cands if lab == "even" and pr.policy == rec.policy and pr.prefetch == 0)
        uneven_lru = next(pr for lab, pr in cands if lab == "uneven" and pr.policy == rec.policy and pr.prefetch == 0)
        doc["split_comparison"] = {
            "policy": rec.policy,
            "even": {"slots": even_lru.slots, "per_layer_hit_rate": even_lru.per_layer_hit_rate, "hits": even_lru.accesses - even_lru.misses, "tok_s": even_lru.tok_s},
            "uneven": {"slots": uneven_lru.slots, "per_layer_hit_rate": uneven_lru.per_layer_hit_rate, "hits": uneven_lru.accesses - uneven_lru.misses, "tok_s": uneven_lru.tok_s},
        }
    # tok/s against cap: one more slot per layer each step; a bigger cap can always leave slots unused,
    # so the curve keeps the best figure seen so far
    prog.update(4, "curve")
    curve_policy = rec.policy if rec else "lru"
    curve_pf = [(rec.prefetch, rec.lookahead or 1)] if rec else pf_cands
    curve = []
    best_so_far = None
    for total in range(L * k, L * E + 1, L):  # one more slot per layer at a time
        prs = [pr for _, pr in candidates(total, [curve_policy], curve_pf)]
        pr = max(prs, key=lambda p: p.tok_s)
        if best_so_far is None or pr.tok_s > best_so_far.tok_s:
            best_so_far = pr
        cap_here = fixed + total * slot
        curve.append({"cap_bytes": cap_here, "slots_total": total, "tok_s": best_so_far.tok_s, "slots": best_so_far.slots,
                      "prefetch": best_so_far.prefetch, "stall_share": best_so_far.stall_share})
    doc["curve"] = {"policy": curve_policy, "points": curve}
    code = 0
    if args.target is not None:
        i = next((i for i, p in enumerate(curve) if p["tok_s"] >= args.target), None)
        hit = curve[i] if i is not None else None
        if i:  # the curve steps several slots at a time: look at the totals in between, one slot at a time
            for total in range(curve[i - 1]["slots_total"] + 1, hit["slots_total"]):
                if max(pr.tok_s for _, pr in candidates(total, [curve_policy], curve_pf)) >= args.target:
                    hit = {"cap_bytes": fixed + total * slot}
                    break
        doc["target"] = {"tok_s": args.target, "smallest_cap_bytes": hit["cap_bytes"] if hit else None,
                         "reachable": hit is not None, "best_tok_s": curve[-1]["tok_s"]}
        if hit is None:
            code = 1
    prog.close()
    if args.json:
        emit_json(doc)
        return code
    out = sys.stdout
    out.write(f"plan for {what}\n")
    if note:
        out.write(f"note: {note}\n")
    out.write(f"costs per token: attention etc. {sum(costs.attn) * 1e6:.0f} us over {L} layers, one expert {costs.expert * 1e6:.1f} us, "
              f"head {costs.head * 1e6:.0f} us; one page-in {costs.page * 1e6:.0f} us ({costs.page_source}); {cal_note}\n")
    out.write(f"routing: {trace.n_tokens} tokens ({doc['trace']['source']}); fixed parts {fmt_bytes(fixed)}, slot {fmt_bytes(slot)}, "
              f"smallest cap {fmt_bytes(min_cap)}, all resident {fmt_bytes(full_cap)}\n\n")
    if rec is not None:
        top = sorted(cands, key=lambda c: -c[1].tok_s)
        rows = []
        for lab, pr in top[:12]:
            rows.append([lab, ",".join(map(str, pr.slots)), pr.policy, f"{pr.prefetch}x{pr.lookahead}" if pr.prefetch else "off",
                         pct(pr.hit_rate), pct(pr.stall_share), f"{pr.tok_s:.0f}"])
        out.write(f"cap {fmt_bytes(doc['mem_cap_bytes'])}: {doc['slots_total']} slots; best {min(12, len(top))} of {len(top)} settings\n")
        out.write(table(["split", "slots", "policy", "prefetch", "hit rate", "stall", "tok/s"], rows, "lllllrr") + "\n")
        out.write(f"recommended: {rec_label} split {','.join(map(str, rec.slots))}, --evict {rec.policy}, "
                  + (f"--prefetch {rec.prefetch} --lookahead {rec.lookahead}" if rec.prefetch else "no prefetch")
                  + f": {rec.tok_s:.0f} tok/s predicted, {pct(rec.stall_share)} stalled\n\n")
        sc = doc["split_comparison"]
        rows = [[str(layer), sc["even"]["slots"][layer], pct(sc["even"]["per_layer_hit_rate"][layer]),
                 sc["uneven"]["slots"][layer], pct(sc["uneven"]["per_layer_hit_rate"][layer])] for layer in range(L)]
        rows.append(["hits", sum(sc["even"]["slots"]), sc["even"]["hits"], sum(sc["uneven"]["slots"]), sc["uneven"]["hits"]])
        out.write(f"even against uneven split ({sc['policy']}, no prefetch):\n")
        out.write(table(["layer", "even slots", "hit rate", "uneven slots", "hit rate"], rows) + "\n\n")
    rows = [[fmt_bytes(p["cap_bytes"]), p["slots_total"], ",".join(map(str, p["slots"])),
             f"{p['prefetch']}" if p["prefetch"] else "off", pct(p["stall_share"]), f"{p['tok_s']:.0f}"] for p in curve]
    out.write(f"predicted decode speed against cap ({curve_policy}):\n")
    out.write(table(["cap", "slots", "split", "prefetch", "stall", "tok/s"], rows) + "\n")
    if args.target is not None:
        t = doc["target"]
        if t["reachable"]:
            out.write(f"target {args.target:g} tok/s: smallest cap {fmt_bytes(t['smallest_cap_bytes'])} ({t['smallest_cap_bytes']} bytes)\n")
        else:
            out.write(f"target {args.target:g} tok/s is out of reach: at most {t['best_tok_s']:.0f} tok/s with every expert resident\n")
    return code


