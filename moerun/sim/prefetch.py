"""Prefetch in replay: how often the trace's guesses name the experts chosen later, and speculative loads replayed."""

from __future__ import annotations

from dataclasses import dataclass

from moerun.errors import BadOption, BadTrace
from moerun.files.trace import Trace
from moerun.policies import Policy
from moerun.runtime.residency import NoVictim, Residency
from moerun.sim.counts import Counts
from moerun.sim.steps import LayerPlan, layer_plans, plan_policy, shared_plan, walk

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

    Guesses are placed where the live pool places them, and loaded at once, as if the link had no
    delay: a guess already resident is skipped, one that finds no evictable slot or that the policy
    declines (``Policy.admits``) is dropped, and a guess never evicts another guess of its round.

    - Per-layer quotas: before each decode step of layer m, the guesses made for layer m at the
      prefetch points of layers m-lookahead .. m-1 of the same token, furthest lookahead first,
      each layer's in rank order (layer m's quota is not touched in between, so this is when they
      were made, as far as that quota can tell).
    - ``shared`` (one pool of ``capacity`` slots for all layers): right after the step of layer l
      (its prefetch point), the guesses made there for layers l+1 .. l+lookahead, nearest first,
      with layer l's chosen experts pinned too, as in ``ExpertPool.prefetch``.  A guess's loads and
      waste count for the layer it was made for.
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
        E = plan.shared_experts
        layers, tokens, counted, keys, starts = plan.layers.tolist(), plan.token.tolist(), plan.counted.tolist(), plan.keys.tolist(), plan.starts.tolist()

        def shared_rounds(s: int):
            src = layers[s] - 1  # the step before is layer src's of the same token
            if counted[s] and src >= 0:
                t, pinned = tokens[s], keys[starts[s - 1] : starts[s]]
                for j in range(1, min(lookahead, L - 1 - src) + 1):
                    ks = [(src + j) * E + e for e in gl[t][src][j - 1] if e >= 0]
                    yield ks, set(ks).union(pinned)

        return _prefetch_walk(plan, policy_cls, capacity, shared_rounds, L, E)
    out = []
    for m, plan in enumerate(plans if plans is not None else layer_plans(trace)):
        counted, tokens = plan.counted.tolist(), plan.token.tolist()

        def rounds(s: int, m=m, counted=counted, tokens=tokens):
            if counted[s]:
                t = tokens[s]
                for j in range(min(lookahead, m), 0, -1):
                    ks = [e for e in gl[t][m - j][j - 1] if e >= 0]
                    yield ks, set(ks)

        out.append(_prefetch_walk(plan, policy_cls, capacity, rounds, L, trace.n_experts)[m])
    return out


def _prefetch_walk(plan: LayerPlan, policy_cls: type[Policy], capacity: int, rounds, n_layers: int, n_experts: int) -> list[PrefetchCounts]:
    """``walk`` with the guess rounds ``rounds(s)`` (``(keys, protected)`` pairs) placed before step s."""
    res = Residency(capacity, plan_policy(policy_cls, plan))
    policy = res.policy
    out = [PrefetchCounts() for _ in range(n_layers)]
    E, layer = plan.shared_experts, plan.layer
    # key -> the layer it counts for (a per-layer plan's guesses may name experts its trace never chose)
    owner = [k // E for k in range(plan.n_keys)] if E else [layer] * max(plan.n_keys, n_experts)
    fresh: set = set()  # loaded by a guess, not used yet

    def place(s: int) -> None:
        for ks, protect in rounds(s):
            for key in ks:
                pc = out[owner[key]]
                pc.guesses += 1
                if key in res:
                    continue
                try:
                    victim = res.victim(protect)
                except NoVictim:
                    continue
                if victim is not None and not policy.admits(key, victim, res.now):
                    continue
                _, victim = res.place(key, victim)
                pc.loads += 1
                fresh.add(key)
                if victim in fresh:
                    fresh.discard(victim)
                    out[owner[victim]].wasted += 1

    keys, counted = plan.keys.tolist(), plan.counted.tolist()
    for s, a, b, served in walk(plan, res, place):
        c = counted[s]
        for x, (hit, _, victim) in zip(keys[a:b], served):
            pc = out[owner[x]]
            if c:
                pc.accesses += 1
            if hit:
                if x in fresh:
                    fresh.discard(x)
                    if c:
                        pc.prefetch_hits += 1
            else:
                if c:
                    pc.misses += 1
                else:
                    pc.prefill_loads += 1
                if victim in fresh:
                    fresh.discard(victim)
                    out[owner[victim]].wasted += 1
    for key in fresh:
        out[owner[key]].wasted += 1
    return out
