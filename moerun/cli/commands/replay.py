"""moerun replay: run eviction policies over a routing trace; hit rates, the offline bound, baselines, prefetch."""

from __future__ import annotations

import argparse
import sys

from moerun import policies
from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, pct, table, written
from moerun.errors import BadOption
from moerun.files.fileio import check_output
from moerun.sim.jobs import replay
from moerun.sim.report import DEFAULT_POLICIES, overall
from moerun.units import SHARED_POOL, fmt_bytes, fmt_prefetch

HELP = "replay a routing trace through eviction policies: hit rate per layer and slot count, the offline bound, baselines, prefetch"


def add_arguments(p) -> None:
    cli.add_routing(p, "the routing trace to replay (.npz) from 'moerun record', 'moerun generate --trace' or another runtime")
    p.add_argument("old_trace", nargs="?", metavar="TRACE", help=argparse.SUPPRESS)  # the old spelling: the trace as the first argument
    p.add_argument(
        "--evict",
        default=",".join(DEFAULT_POLICIES),
        metavar="P,P,...",
        help=cli.LazyHelp(lambda: f"policies to compare (default {','.join(DEFAULT_POLICIES)}; known: {policies.listing()})"),
    )
    p.add_argument("--slots", metavar="N,N,...",
                   help="expert slots per layer to try, e.g. 1,2,4 or 1-8 (default: 1 up to the expert count); with --shared-pool, "
                        "sizes of the shared pool (default: 10%%, 25%%, 50%% and all of the experts)")
    p.add_argument("--shared-pool", action="store_true", help="replay one pool shared by all layers, in the live engine's order")
    p.add_argument("--prefetch", type=int, default=0, metavar="N", help="also simulate prefetch with the trace's top-N guesses per layer (0 = off)")
    p.add_argument("--lookahead", type=int, default=None, metavar="L", help="layers ahead that prefetch guesses for, with --prefetch (default 1)")
    p.add_argument("--expert-bytes", metavar="SIZE", help="bytes of one expert for the bytes-moved figures (default: from the trace)")
    p.add_argument("--seed", type=cli.seed_value, default=0, metavar="N",
                   help="seed of the time-shuffled and random-routing baselines, 0 or more (default 0)")
    p.add_argument("--no-baselines", action="store_true", help="skip the time-shuffled and random-routing baselines")
    p.add_argument("--per-layer", action="store_true", help="also show hit rates layer by layer")
    p.add_argument("--plot", metavar="FILE.png", help="draw hit rate against slots, and one layer's residency over time (needs matplotlib)")
    cli.add_force(p, "the --plot file")
    p.add_argument("--plot-layer", type=int, default=None, metavar="N", help="layer shown in the residency picture, with --plot (default 0)")
    p.add_argument("--warm-from", metavar="FILE",
                   help="fill every pool with the hottest experts of this routing profile ('moerun profile') before the "
                        "first step, as 'generate --warm-from' does (the baselines start empty)")
    p.add_argument("--generic", action="store_true", help="use only the reference path (Residency + policy objects), never a fast path")
    cli.add_json(p)


def _unit(values) -> tuple[str, int]:
    """MiB, or GiB when the largest value passes 10 GiB."""
    top = max((v for v in values if v is not None), default=0)
    return ("GiB", 2**30) if top >= 10 * 2**30 else ("MiB", 2**20)


def _size(b, factor: int) -> str:
    return "-" if b is None else f"{b / factor:.1f}"


def render(doc: dict, per_layer: bool = False) -> str:
    tr = doc["trace"]
    slots = doc["slots"]
    eb = doc["expert_bytes"]
    lines = []
    src = f", source {tr['source']}" if tr["source"] else ""
    part = " (partial: the run that wrote it stopped early)" if tr["partial"] else ""
    lines.append(
        f"trace: {tr['tokens']} tokens x {tr['layers']} layers, top-{tr['top_k']} of {tr['n_experts']} experts{src}{part}"
    )
    pre = (
        f"the first {tr['prefill_tokens']} tokens as one prefill block (loads not counted as accesses), the rest as decode steps"
        if tr["prefill_tokens"]
        else "every token as a decode step"
    )
    shared = doc["split"] == "shared"
    warm = doc.get("warm_from")
    start = f"is filled from {warm['file']} first" if warm else "starts empty"
    where = f"one {SHARED_POOL} for all layers {start}" if shared else f"each layer's quota {start}"
    lines.append(f"replay: {pre}; {tr['decode_accesses']} counted accesses; {where}")
    if eb is not None:
        lines.append(f"expert size {fmt_bytes(eb)} ({eb} bytes) for the bytes-moved columns")
    lines.append("")

    head = [f"hit rate, all layers{', ' + SHARED_POOL if shared else ''}"] + [f"{c} slot" + ("s" if c != 1 else "") for c in slots]
    rows = []
    for name in doc["policies"]:
        by = overall(doc["results"], name)
        label = f"{name} (offline bound)" if not getattr(policies.get(name), "online", True) else name
        rows.append([label] + [pct(by[c]["hit_rate"]) for c in slots])
    for label, key in (("lru, time-shuffled", "shuffled"), ("lru, random routing", "random")):
        by = overall(doc.get("baselines", []), baseline=key)
        if by:
            rows.append([label] + [pct(by[c]["hit_rate"]) for c in slots])
    lines.append(table(head, rows))
    if doc.get("baselines"):
        lines.append(f"baselines: the same decode tokens in a random order, and random top-{tr['top_k']} routing (seed {doc['baseline_seed']})")

    if eb is not None:
        lines.append("")
        unit, factor = _unit(r["bytes_moved"] for r in doc["results"])
        head = [f"paged in ({unit}), all layers"] + [str(c) for c in slots]
        rows = []
        for name in doc["policies"]:
            by = overall(doc["results"], name)
            rows.append([name] + [_size(by[c]["bytes_moved"], factor) for c in slots])
        lines.append(table(head, rows))

    if per_layer:
        lines.append("")
        layers = sorted({r["layer"] for r in doc["results"] if r["layer"] != "all"})
        head = ["policy", f"slots ({SHARED_POOL})" if shared else "slots"] + [f"layer {x}" for x in layers] + ["all"]
        rows = []
        for name in doc["policies"]:
            for c in slots:
                recs = {r["layer"]: r for r in doc["results"] if r["policy"] == name and r["slots"] == c}
                rows.append([name, str(c)] + [pct(recs[x]["hit_rate"]) for x in layers] + [pct(recs["all"]["hit_rate"])])
        lines.append(table(head, rows, "ll" + "r" * (len(layers) + 1)))

    lines += _render_prefetch(doc, shared)
    return "\n".join(lines)


def _render_prefetch(doc: dict, shared: bool) -> list[str]:
    """The prefetch recall table and, with --prefetch, the prefetch replay's table."""
    lines: list[str] = []
    rec = doc.get("prefetch_recall") or []
    if rec:
        lines.append("")
        las = sorted({r["lookahead"] for r in rec})
        ns = sorted({r["guesses"] for r in rec})
        by = {(r["lookahead"], r["guesses"]): r for r in rec}
        head = ["prefetch recall"] + [f"{j} layer{'s' if j > 1 else ''} ahead" for j in las] + ["chance"]
        rows = [[f"top {n} guess{'es' if n > 1 else ''}"] + [pct(by[(j, n)]["recall"]) for j in las] + [pct(by[(las[0], n)]["chance"])] for n in ns]
        lines.append(table(head, rows))
        lines.append("recall: share of a layer's chosen experts among the guesses made j layers earlier for the same token")

    pf = doc.get("prefetch_results")
    if pf is not None:
        lines.append("")
        n, la = doc["prefetch"], doc["lookahead"]
        lines.append(
            f"prefetch simulated ({fmt_prefetch(n, la)}): the trace's top {n} guesses for up to {la} layer{'s' if la > 1 else ''} "
            "ahead, loaded at once (no link delay), pinned as the live pool pins them"
        )
        unit, factor = _unit(r["bytes_moved"] for r in pf)
        head = ["policy", f"slots ({SHARED_POOL})" if shared else "slots", "hit rate", "with prefetch", "prefetched hits", "guess loads", "wasted", f"{unit} moved"]
        rows = []
        for name in doc["policies"]:
            base = overall(doc["results"], name)
            got = overall(pf, name)
            for c in doc["slots"]:
                if c not in got:
                    continue
                g = got[c]
                rows.append(
                    [name, str(c), pct(base[c]["hit_rate"]), pct(g["hit_rate"]), g["prefetch_hits"], g["prefetch_loads"], g["wasted"], _size(g["bytes_moved"], factor)]
                )
        lines.append(table(head, rows, "ll" + "r" * 6))
        skipped = [n for n in doc["policies"] if not getattr(policies.get(n), "online", True)]
        if skipped:
            lines.append(f"({', '.join(skipped)} reads the future and is not simulated with prefetch)")
    return lines


def run(args) -> int:
    cli.routing_from_old(args, "replay", "old_trace", "the trace as a bare argument ('moerun replay FILE')")
    if args.routing is None:
        raise BadOption("no routing trace given: add --routing FILE")
    cli.refuse_without(args, "plot_layer", "plot", "--plot FILE")
    if args.plot and args.warm_from:
        raise BadOption("--plot draws pools that start empty; it does not draw a warm start yet: drop --plot or --warm-from")
    plot_layer = args.plot_layer or 0
    traces = []

    def check_plot(trace) -> None:  # the trace is read: the --plot options are checked before any replaying
        traces.append(trace)
        if plot_layer < 0 or plot_layer >= trace.n_layers:
            raise BadOption(f"--plot-layer must be 0..{trace.n_layers - 1} for this trace")
        if args.plot:
            from moerun.cli.plot import require_matplotlib

            check_output(args.plot, args.force, [args.routing], "--plot")
            require_matplotlib()

    prog = Progress("replay")
    try:
        result = replay(args.routing, args.evict, args.slots, shared_pool=args.shared_pool, prefetch=args.prefetch,
                        lookahead=args.lookahead, expert_bytes=args.expert_bytes, seed=args.seed,
                        baselines=not args.no_baselines, generic=args.generic, warm_from=args.warm_from,
                        progress=lambda i, n, label: prog.update(i, label), on_trace=check_plot)
    finally:
        prog.close()
    if args.plot:
        from moerun.cli.plot import plot_replay

        result.plot = plot_replay(args.plot, traces[0], result.to_json(), plot_layer, force=args.force, inputs=[args.routing])
    doc = result.to_json()
    if args.json:
        emit_json(doc)
    else:
        sys.stdout.write(render(doc, args.per_layer) + "\n")
    if args.plot:
        written("replay", "plot", args.plot)
    return 0
