"""moerun plan: predicted decode tok/s for a memory budget and a link; the best split, policy and prefetch."""

from __future__ import annotations

import argparse
import sys

from moerun import policies
from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, pct, table
from moerun.planner import selfcheck
from moerun.planner.jobs import DEFAULT_TOKENS, plan
from moerun.planner.search import TIE, choose, simplicity
from moerun.units import SHARED_POOL, fmt_bytes, fmt_prefetch, fmt_tok_s

HELP = "predict decode tok/s for a memory cap and a link; recommend slots per layer, policy and prefetch"


def add_arguments(p) -> None:
    cli.add_model(p)
    p.add_argument("--mem-cap", metavar="SIZE", help="the memory budget to plan for")
    p.add_argument("--target", type=float, metavar="TOK_S", help="also find the smallest cap that reaches this decode speed")
    p.add_argument("--link-speed", metavar="RATE", help="page-in over a link of this speed, e.g. 2GB/s")
    p.add_argument("--probe", metavar="FILE", help="page-in times from 'moerun probe --save FILE'")
    p.add_argument("--regime", choices=("warm", "cold"), default=None, help="which probe figures to use, with --probe (default warm)")
    cli.add_routing(p, "routing trace to plan on (default: recorded now from the model's held-out text)")
    p.add_argument("--trace", dest="old_trace", metavar="FILE", help=argparse.SUPPRESS)  # the old spelling of --routing
    p.add_argument("--max-tokens", type=int, default=None, metavar="N",
                   help=f"tokens of held-out text to record when there is no --routing (default {DEFAULT_TOKENS})")
    p.add_argument("--shape", metavar="FILE", help="plan for a model described by a JSON shape file (needs --routing)")
    p.add_argument("--evict", default=None, metavar="P,P",
                   help=cli.LazyHelp(lambda: f"policies to consider (default: every online policy, {','.join(policies.names(online_only=True))}; "
                                             f"known: {policies.listing(online_only=True)})"))
    p.add_argument("--shared-pool", action="store_true",
                   help="also consider one pool shared by all layers (it fits caps down to top_k slots)")
    p.add_argument("--warm-from", metavar="FILE",
                   help="predict every setting with a warm start from this routing profile ('moerun profile'), and "
                        "also consider its slots per layer (the 'profile' split)")
    p.add_argument("--no-check", action="store_true",
                   help="do not run the recommendation to check its prediction (by default it runs "
                        f"{selfcheck.ROUNDS} times, about {selfcheck.RUN_S:g} s each)")
    p.add_argument("--recalibrate", action="store_true", help="measure compute times again instead of using the cache")
    cli.add_json(p)


def run(args) -> int:
    cli.routing_from_old(args, "plan", "old_trace", "--trace FILE (a trace to read)")
    prog = Progress("plan")

    def notice(line: str) -> None:  # one line on stderr, whatever stderr is and with --json too
        prog.note(f"moerun plan: {line}")

    try:
        result = plan(args.model, args.mem_cap, target=args.target, link_speed=args.link_speed, probe=args.probe,
                      regime=args.regime, routing=args.routing, max_tokens=args.max_tokens, shape=args.shape,
                      evict=args.evict, shared_pool=args.shared_pool, recalibrate=args.recalibrate, progress=prog.update,
                      notice=notice, warm_from=args.warm_from, check=not args.no_check)
    finally:
        prog.close()
    code = 0 if result.ok else 1
    if args.json:
        emit_json(result.to_json())
        return code
    _text(sys.stdout, args, result)
    return code


def _setting(pr, layers: int, experts: int) -> tuple:
    """What a setting does: the same for even and uneven splits with equal slots, for a shared pool and per-layer
    pools that both hold every expert, and for prefetch that reads no guess (the planner predicts it changes
    nothing but the guess rule's cost).  Prefetch auto is a setting of its own beside the fixed one of as many
    guesses, even where its account never rested a layer."""
    everything = sum(pr.slots) >= layers * experts if pr.shared else all(s >= experts for s in pr.slots)
    pool = "all resident" if everything else (pr.shared, tuple(pr.slots))
    return (pool, pr.policy, (pr.prefetch_setting, pr.lookahead) if pr.prefetch and pr.prefetch_loads else None)


def _rows(cands, layers: int, experts: int) -> list:
    """The settings, fastest first (as shown; the simplest first where they read the same), rows that are the same
    setting with the same prediction (within TIE) shown once, as the simplest of them."""
    ordered = sorted(cands, key=lambda c: (-float(fmt_tok_s(c[1].tok_s)), simplicity(*c)))
    kept: list = []
    for lab, pr in ordered:
        setting = _setting(pr, layers, experts)
        same = [k for k in kept if _setting(k[1], layers, experts) == setting and abs(k[1].tok_s - pr.tok_s) <= TIE * k[1].tok_s]
        if not same:
            kept.append((lab, pr))
    return kept


def _pool(lab: str, slots, shared: bool) -> str:
    """A pool in text: the shared pool, or a split of slots per layer."""
    return SHARED_POOL if shared else f"{lab} split {','.join(map(str, slots))}"


def _how(lab: str, pr, pool: bool = True) -> str:
    """A setting in text: its pool (unless ``pool`` is False), policy and prefetch."""
    how = f"--evict {pr.policy}, {fmt_prefetch(pr.prefetch_setting, pr.lookahead)}"
    return f"{_pool(lab, pr.slots, pr.shared)}, {how}" if pool else how


def _shared_line(result) -> str:
    """How the shared pool did, in one line."""
    shared = [c for c in result.candidates if c[1].shared]
    per_layer = [c for c in result.candidates if not c[1].shared]
    if not shared:
        return f"{SHARED_POOL}: no {SHARED_POOL} setting was searched"
    lab, best = choose(shared)
    if not per_layer:
        return (f"{SHARED_POOL}: the only kind of pool that fits this cap (one pool per layer needs "
                f"{fmt_bytes(result.per_layer_min_cap_bytes)}); best {_how(lab, best, pool=False)}: {fmt_tok_s(best.tok_s)} tok/s")
    plab, other = choose(per_layer)
    ratio = best.tok_s / other.tok_s - 1 if other.tok_s else 0.0
    if abs(ratio) <= TIE:
        cmp = "as fast as"
    else:
        cmp = f"{100 * abs(ratio):.1f}% {'faster' if ratio > 0 else 'slower'} than"
    return (f"{SHARED_POOL}: best {_how(lab, best, pool=False)}: {fmt_tok_s(best.tok_s)} tok/s, {cmp} the best with one pool per layer "
            f"({_how(plab, other)}: {fmt_tok_s(other.tok_s)} tok/s)")


def _auto_line(pr) -> str:
    """What prefetch auto's account did in the prediction, in one line."""
    if not pr.rests:
        return f"prefetch auto: no layer rested in the prediction (no trial of its guesses lost); {pr.prefetch_loads} guesses read"
    return (f"prefetch auto: layers rested {pr.rests} times in the prediction (a trial of their guesses lost); "
            f"{pr.skipped} guesses skipped, {pr.prefetch_loads} read")


def _check_line(ck: dict) -> str:
    """The self-check in one or two lines: measured against predicted, and the correction if one was made."""
    runs = len(ck["runs_tok_s"])
    line = (f"checked: {runs} runs of {ck['tokens_per_run']} tokens from {ck['prompt']} gave {fmt_tok_s(ck['measured_tok_s'])} "
            f"tok/s (spread {100 * ck['spread']:.0f}%; hit rate {pct(ck['measured_hit_rate'])} against {pct(ck['predicted_hit_rate'])} "
            f"predicted) against {fmt_tok_s(ck['predicted_tok_s'])} predicted: ")
    if ck["agrees"]:
        return line + "they agree within the noise"
    line += f"{100 * abs(ck['error']):.0f}% {'too fast' if ck['error'] > 0 else 'too slow'}, beyond the noise"
    if ck["correction_factor"] is None:
        return line + "; the compute costs cannot explain it, so nothing was corrected"
    return (line + f"\n  compute costs corrected by x{ck['correction_factor']:.2f} and the settings searched again (the "
            f"table and the recommendation above); the recommendation now predicts {fmt_tok_s(ck['corrected_tok_s'])} tok/s")


def _text(out, args, result) -> None:
    doc = result.to_json()
    L, c = result.layers, result.costs
    cal_note, rec, rec_label, cands = result.calibration, result.recommended, result.recommended_split, result.candidates
    out.write(f"plan for {doc['planned_for']}\n")
    if doc.get("note"):
        out.write(f"note: {doc['note']}\n")
    out.write(f"costs per token: attention etc. {sum(c.attn) * 1e6:.0f} us over {L} layers, one expert {c.expert * 1e6:.1f} us "
              f"(decoding its format {c.decode * 1e6:.1f} us), head {c.head * 1e6:.0f} us; one page-in {c.page * 1e6:.0f} us "
              f"({c.page_source})\n{cal_note}\n")
    tr = doc["trace"]
    searched = f", the first {tr['searched_tokens']} searched" if tr["searched_tokens"] < tr["tokens"] else ""
    smallest = fmt_bytes(result.min_cap_bytes)
    if result.min_cap_bytes != result.per_layer_min_cap_bytes:
        smallest += f" ({SHARED_POOL}; one pool per layer {fmt_bytes(result.per_layer_min_cap_bytes)})"
    out.write(f"routing: {tr['tokens']} tokens ({tr['source']}{searched}); fixed parts {fmt_bytes(result.fixed_bytes)}, slot "
              f"{fmt_bytes(result.slot_bytes)}, smallest cap {smallest}, all resident {fmt_bytes(result.all_resident_cap_bytes)}\n")
    w = doc.get("warm_from")
    if w:
        loads = f"; the recommended setting reads {rec.warm_loads} experts first ({rec.warm_s * 1e3:.1f} ms, once)" if rec else ""
        out.write(f"warm start from {w['file']} ({w['source']} of {w['tokens']} tokens){loads}\n")
    out.write("\n")
    if rec is not None:
        top = _rows(cands, L, result.experts)
        rows = [[SHARED_POOL if pr.shared else lab, ",".join(map(str, pr.slots)), pr.policy, fmt_prefetch(pr.prefetch_setting, pr.lookahead),
                 pct(pr.hit_rate), pct(pr.stall_share), fmt_tok_s(pr.tok_s)] for lab, pr in top[:12]]
        out.write(f"cap {fmt_bytes(doc['mem_cap_bytes'])}: {doc['slots_total']} slots; best {min(12, len(top))} of {len(top)} "
                  f"settings ({len(cands)} searched; the same setting with the same prediction shown once)\n")
        out.write(table(["split", "slots", "policy", "prefetch", "hit rate", "stall", "tok/s"], rows, "lllllrr") + "\n")
        out.write(f"recommended: {_how(rec_label, rec)}"
                  + f": {fmt_tok_s(rec.tok_s)} tok/s predicted, {pct(rec.stall_share)} stalled"
                  + f" (ties within {100 * TIE:g}% go to the simpler setting)\n")
        if rec.auto:
            out.write(_auto_line(rec) + "\n")
        if doc.get("check"):
            out.write(_check_line(doc["check"]) + "\n")
        if args.shared_pool:
            out.write(_shared_line(result) + "\n")
        out.write("\n")
        sc = doc["split_comparison"]
        if sc is not None:
            rows = [[str(layer), sc["even"]["slots"][layer], pct(sc["even"]["per_layer_hit_rate"][layer]),
                     sc["uneven"]["slots"][layer], pct(sc["uneven"]["per_layer_hit_rate"][layer])] for layer in range(L)]
            rows.append(["hits", sum(sc["even"]["slots"]), sc["even"]["hits"], sum(sc["uneven"]["slots"]), sc["uneven"]["hits"]])
            out.write(f"even against uneven split ({sc['policy']}, no prefetch):\n")
            out.write(table(["layer", "even slots", "hit rate", "uneven slots", "hit rate"], rows) + "\n\n")
    curve = doc["curve"]["points"]
    rows = [[fmt_bytes(p["cap_bytes"]), p["slots_total"], SHARED_POOL if p["split"] == "shared" else ",".join(map(str, p["slots"])),
             fmt_prefetch(p["prefetch"], p["lookahead"]), pct(p["stall_share"]), fmt_tok_s(p["tok_s"])] for p in curve]
    out.write(f"predicted decode speed against cap ({doc['curve']['policy']}):\n")
    out.write(table(["cap", "slots", "split", "prefetch", "stall", "tok/s"], rows) + "\n")
    if args.target is not None:
        t = doc["target"]
        if t["reachable"]:
            out.write(f"target {args.target:g} tok/s: smallest cap {fmt_bytes(t['smallest_cap_bytes'])} ({t['smallest_cap_bytes']} bytes)\n")
        else:
            out.write(f"target {args.target:g} tok/s is out of reach: at most {fmt_tok_s(t['best_tok_s'])} tok/s with every expert resident\n")
