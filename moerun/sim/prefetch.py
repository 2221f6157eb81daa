"""Prefetch in replay: how often the trace's guesses name the experts chosen later, and speculative loads replayed."""

from __future__ import annotations

from dataclasses import dataclass

from moerun.errors import BadOption, BadTrace
from moerun.files.trace import Trace
from moerun.policies import Policy
from moerun.runtime.decisions import Decisions, Placed
from moerun.sim.counts import Counts
from moerun.sim.steps import LayerPlan, layer_plans, plan_decisions, shared_plan, walk

RECALL_GUESSES = 4
RECALL_LOOKAHEAD = 3


def prefetch_recall(trace: Trace, max_guesses: int = RECALL_GUESSES, max_lookahead: int = RECALL_LOOKAHEAD) -> list[dict]:
    """Share of each layer's chosen experts found among the top-n guesses made j layers earlier."""
    g = trace.guesses
    if g is None:
        return []
    E = trace.n_experts
    experts = trace.experts
    out = []
    for j in range(1, min(max_lookahead, g.shape[2], trace.n_layers - 1) + 1):  # j layers ahead must exist
        for n in range(1, min(max_guesses, g.shape[3]) + 1):
            found = chosen = 0
            per_layer = []
            for m in range(j, trace.n_layers):
                ch = experts[:, m, :]
                gs = g[:, m - j, j - 1, :n]
                valid = ch >= 0
                hit = (ch[:, :, None] == gs[:, None, :]).any(axis=-1) & valid
                f, c = int(hit.sum()), int(valid.sum())
                found += f
                chosen += c
                per_layer.append({"layer": m, "recall": f / c if c else None})
            out.append(
                {
                    "lookahead": j,
                    "guesses": n,
                    "recall": found / chosen if chosen else None,
                    "chance": min(1.0, n / E) if E else None,
                    "chosen": chosen,
                    "per_layer": per_layer,
                }
            )
    return out


@dataclass
class PrefetchCounts(Counts):
    prefetch_hits: int = 0  # hits on an expert a guess brought in and nothing used since
    guesses: int = 0  # guesses made
    loads: int = 0  # guesses that needed a load
    wasted: int = 0  # loaded guesses evicted, or left at the end, without any use

    def __add__(self, other):
        return PrefetchCounts(
            *(getattr(self, f) + getattr(other, f) for f in ("accesses", "misses", "prefill_loads", "prefetch_hits", "guesses", "loads", "wasted"))
        )


def simulate_prefetch(
    trace: Trace,
    policy_cls: type[Policy],
    capacity: int,
    n_guesses: int,
    lookahead: int,
    plans: list[LayerPlan] | None = None,
    shared: bool = False,
) -> list[PrefetchCounts]:
    """Replay with speculative loads, by the generic path, one ``PrefetchCounts`` per layer.

    The live pool's decision core (``moerun.runtime.decisions``) places the guesses; their loads take no
    time, so every guess pays and none is dropped (its load is over before its layer routes).

    - Per-layer quotas: before each decode step of layer m, the guesses made for layer m at the
      prefetch points of layers m-lookahead .. m-1 of the same token, furthest lookahead first,
      each layer's in rank order (layer m's quota is not touched in between, so this is when they
      were made, as far as that quota can tell).
    - ``shared`` (one pool of ``capacity`` slots for all layers): right after the step of layer l
      (its prefetch point, with layer l's chosen experts pinned), the guesses made there for layers
      l+1 .. l+lookahead, nearest first.  A guess's loads and waste count for the layer it was made for.
    """
    g = trace.guesses
    if g is None:
        raise BadTrace("this trace holds no guesses, so prefetch cannot be simulated")
    if not 1 <= lookahead <= g.shape[2]:
        raise BadOption(f"--lookahead must be 1..{g.shape[2]} for this trace (it holds guesses for {g.shape[2]} layers ahead)")
    if not 1 <= n_guesses <= g.shape[3]:
        raise BadOption(f"--prefetch must be 1..{g.shape[3]} for this trace (it holds {g.shape[3]} guesses per layer)")
    if not getattr(policy_cls, "online", True):
        raise BadOption(f"policy {policy_cls.name!r} reads the future; prefetch is simulated for online policies only")
    gl = g[:, :, :, :n_guesses].tolist()
    L = trace.n_layers
    if shared:
        plan = plans[0] if plans else shared_plan(trace)
        layers, tokens, counted = plan.layers.tolist(), plan.token.tolist(), plan.counted.tolist()

        def shared_rounds(s: int):  # after step s: its layer's prefetch point
            src = layers[s]
            if counted[s]:
                t = tokens[s]
                for j in range(1, min(lookahead, L - 1 - src) + 1):
                    yield src + j, [e for e in gl[t][src][j - 1] if e >= 0]

        return _prefetch_walk(plan, plan_decisions(plan, policy_cls, capacity), None, shared_rounds, L, plan.shared_experts)
    out = []
    for m, plan in enumerate(plans if plans is not None else layer_plans(trace)):
        counted, tokens = plan.counted.tolist(), plan.token.tolist()

        def rounds(s: int, m=m, counted=counted, tokens=tokens):  # before step s of layer m
            if counted[s]:
                t = tokens[s]
                for j in range(min(lookahead, m), 0, -1):
                    yield m, [e for e in gl[t][m - j][j - 1] if e >= 0]

        core = plan_decisions(plan, policy_cls, capacity)
        out.append(_prefetch_walk(plan, core, rounds, None, L, trace.n_experts)[m])
    return out


def _prefetch_walk(plan: LayerPlan, core: Decisions, before, after, n_layers: int, n_experts: int) -> list[PrefetchCounts]:
    """``walk`` with guess rounds (``(target layer, expert ids)`` pairs) placed ``before`` or ``after`` steps."""
    out = [PrefetchCounts() for _ in range(n_layers)]
    E, layer = plan.shared_experts, plan.layer
    # key -> the layer it counts for (a per-layer plan's guesses may name experts its trace never chose)
    owner = [k // E for k in range(plan.n_keys)] if E else [layer] * max(plan.n_keys, n_experts)

    def place(rounds, s: int) -> None:
        for target, ids in rounds(s):
            for o in core.place(target, ids):
                pc = out[owner[o.key]]
                pc.guesses += 1
                if type(o) is Placed:
                    pc.loads += 1
                    if o.wasted:
                        out[owner[o.victim]].wasted += 1

    keys, counted = plan.keys.tolist(), plan.counted.tolist()
    for s, a, b, served in walk(plan, core, before and (lambda s: place(before, s)), after and (lambda s: place(after, s))):
        c = counted[s]
        used, wasted = core.used, core.wasted
        for x, (hit, _, victim) in zip(keys[a:b], served):
            pc = out[owner[x]]
            if c:
                pc.accesses += 1
            if hit:
                if c and x in used:
                    pc.prefetch_hits += 1
            else:
                if c:
                    pc.misses += 1
                else:
                    pc.prefill_loads += 1
                if victim in wasted:
                    out[owner[victim]].wasted += 1
    for key in core.fresh(plan.layer):
        out[owner[key]].wasted += 1
    return out
