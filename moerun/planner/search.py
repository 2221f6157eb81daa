"""The planner: from a memory budget and a link to predicted decode tokens per second.

``moerun.planner.timeline`` simulates decode along a routing trace for one setting (slots per layer or a
shared pool, policy, prefetch) with costs measured by ``moerun.planner.calibration``.  This module
searches the settings a user chooses from: how to split a number of slots between the layers
(evenly, or by the layers' miss curves), which policy, how much prefetch (a fixed number of guesses, or
``--prefetch auto``: ``AUTO``); the best setting for a cap, decode speed against cap, and the smallest cap
that reaches a target speed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from moerun import policies
from moerun.errors import BadInput, BadTrace, ImpossibleBudget
from moerun.files.trace import Trace
from moerun.planner.calibration import (  # noqa: F401  (the planner's public names, kept here)
    calibrate,
    costs_from_calibration,
    costs_from_shape,
    load_shape,
    page_seconds,
)
from moerun.planner.timeline import Costs, Prediction, predict, step_misses  # noqa: F401
from moerun.policies import LRU
from moerun.runtime.decisions import hottest
from moerun.runtime.guesses import AUTO_GUESSES
from moerun.runtime.link import CHUNK
from moerun.sim.counts import replay_counts
from moerun.sim.fast import FAST_PATHS, layer_misses
from moerun.sim.steps import layer_plans, prefill_tokens, shared_plan, warm_plans

PREFETCH_CANDIDATES = [(0, 1), (1, 1), (2, 1), (2, 2), (3, 1)]
AUTO = "auto"  # a prefetch candidate ``(AUTO, lookahead)``: --prefetch auto, AUTO_GUESSES guesses (at most the experts)
AUTO_CANDIDATE = (AUTO, 1)
PREFETCH_POLICIES = 2  # prefetch is simulated for the policies that do best without it
SEARCH_TOKENS = 2048  # decode tokens each prefetch setting is simulated over in the search
REPLAY_TOKENS = 6144  # decode tokens of the trace the search replays (the first ones): a long trace plans in seconds
# Settings whose predicted speeds are within TIE (relative) of the best are ties, and the simplest of them is
# chosen (``simplicity``): so a prefetch setting, an uneven split or another policy is recommended only for a
# predicted gain of at least 0.5%.  Three significant digits (what ``moerun plan`` shows) resolve 0.1% to 1% of
# a speed; the costs the prediction rests on are measured to 5% (calibration.SPREAD).  The figure itself: common
# practice, no source.
TIE = 0.005
SPLITS = ("even", "shared", "uneven", "profile")  # simplest first: no option, one flag, a slot count per layer


def hit_curves(trace: Trace, policy: str, max_slots: int) -> list[list[int]]:
    """Misses per layer for 1..max_slots slots (index s-1), from replay."""
    caps = list(range(1, max_slots + 1))
    counts = replay_counts(trace, policy, caps)
    return [[counts[c][layer].misses for c in caps] for layer in range(trace.n_layers)]


def best_split(curves: list[list[int]], total: int, low: int, high: int) -> list[int]:
    """Slots per layer (each in low..high, summing to at most ``total``) with the fewest misses.

    Exact, by dynamic programming over the layers' miss curves, one array operation per slot count and
    layer; where every curve is convex this is what greedily giving each next slot to the layer that
    gains most would find.  Ties go as they always did: within a layer to the most slots for it, then
    overall to the fewest slots in all (tests/planner/test_plan.py checks it against the plain loop).
    """
    L = len(curves)
    if total < L * low:
        raise ImpossibleBudget(f"{total} slots cannot give each of {L} layers {low}")
    if high < low:
        raise ImpossibleBudget(f"no slot count from {low} to {high}")
    none = np.iinfo(np.int64).max // 4  # no split uses exactly this many slots
    best = np.full(total + 1, none, np.int64)  # slots used -> fewest misses
    best[0] = 0
    picks = []  # per layer: slots used -> the slot count that layer takes
    counts = np.arange(high, low - 1, -1)  # most slots first: np.argmin keeps the first of equal values
    for layer in range(L):
        c = np.asarray(curves[layer], np.int64)
        cand = np.full((counts.size, total + 1), none, np.int64)
        for j, s_ in enumerate(counts.tolist()):
            if s_ <= total:
                prev = best[: total + 1 - s_]
                row = cand[j, s_:]
                np.add(prev, c[s_ - 1], out=row, where=prev < none)
        j = np.argmin(cand, axis=0)
        best = cand[j, np.arange(total + 1)]
        picks.append(counts[j])
    u = int(np.argmin(best))  # the fewest misses, then the fewest slots
    split = []
    for layer in range(L - 1, -1, -1):
        s_ = int(picks[layer][u])
        split.append(s_)
        u -= s_
    return split[::-1]


def profile_curves(counts) -> list[list[int]]:
    """Misses per layer for 1..experts slots (index s-1) by a routing profile's counts alone: a layer holding its
    s most used experts misses every use of the others (the profile has no order of uses; what a warm start
    fills is exactly those s).  ``best_split`` over these gives the profile's slots per layer."""
    out = []
    for row in np.asarray(counts, np.int64):
        top = np.sort(row)[::-1]
        out.append((int(row.sum()) - np.cumsum(top)).tolist())
    return out


def even_split(total: int, L: int, high: int) -> list[int]:
    base, extra = divmod(min(total, L * high), L)
    return [min(high, base + (1 if i < extra else 0)) for i in range(L)]


def prefetch_candidates(trace: Trace) -> list:
    """The prefetch settings searched on ``trace``: off; the fixed ones (``PREFETCH_CANDIDATES``) if it holds guesses;
    and prefetch auto (``AUTO_CANDIDATE``) if it also has more than one layer (with one, auto guesses nothing)."""
    if trace.guesses is None:
        return [pc for pc in PREFETCH_CANDIDATES if pc[0] == 0]
    return list(PREFETCH_CANDIDATES) + ([AUTO_CANDIDATE] if trace.n_layers > 1 else [])


def simplicity(label: str, pr: Prediction) -> tuple:
    """Sorts settings simplest first: prefetch off, then fewer guesses and layers ahead, prefetch auto just after the
    fixed setting of as many guesses and layers ahead; an even split, a shared pool, an uneven split; the engine's
    default policy (lru), then the others in their registered order."""
    order = policies.names()
    rank = 0 if pr.policy == "lru" else 1 + (order.index(pr.policy) if pr.policy in order else len(order))
    return (pr.prefetch > 0, pr.prefetch, pr.lookahead, pr.auto, SPLITS.index(label) if label in SPLITS else len(SPLITS), rank)


def choose(cands: list[tuple[str, Prediction]]) -> tuple[str, Prediction]:
    """The setting to recommend: the simplest of those within TIE of the fastest (see TIE)."""
    top = max(pr.tok_s for _, pr in cands)
    return min((c for c in cands if c[1].tok_s >= top * (1 - TIE)), key=lambda c: simplicity(*c))


def minimum_cap(fixed: int, slot: int, layers: int, top_k: int, shared: bool = False) -> int:
    """The smallest cap that works: top_k slots in every layer's pool, or top_k in one pool shared by all layers
    (as moerun.runtime.budget.minimum_cap, for a model given by its shape too)."""
    return fixed + (top_k if shared else layers * top_k) * slot


class _Setting(NamedTuple):
    """What ``simplicity`` reads of a setting not predicted yet."""

    policy: str
    prefetch: int
    lookahead: int
    auto: bool = False


@dataclass
class Space:
    """What the planner searches over for one model or shape."""

    trace: Trace
    costs: Costs
    layers: int
    experts: int
    top_k: int
    fixed: int  # bytes: dense weights, KV cache, scratch
    slot: int  # bytes per slot
    policies: list
    prefetches: list  # (guesses, lookahead) pairs; (AUTO, lookahead) for prefetch auto
    shared: bool = False  # also consider one pool shared by all layers
    prune: bool = True  # simulate only the settings that can win (``candidates``)
    # a routing profile's counts [layers][experts]: every setting starts warm from it (``Decisions.warm``), and its
    # counts give one more per-layer split, "profile" (``profile_curves``); None: cold starts, no such split
    profile: np.ndarray | None = None

    def __post_init__(self):
        self.warm = hottest(self.profile) if self.profile is not None else None
        self._ceilings: dict = {}
        self._shared_ceilings: dict = {}
        self._shared_misses: dict = {}
        self._shared_plan = None
        P = prefill_tokens(self.trace)
        if self.trace.n_tokens - P > REPLAY_TOKENS:
            t = self.trace
            cut = P + REPLAY_TOKENS
            self.trace = Trace(t.experts[:cut], None if t.weights is None else t.weights[:cut],
                               None if t.guesses is None else t.guesses[:cut], dict(t.meta), {},
                               None if t.probs is None else t.probs[:cut])
        self._steps: dict = {}
        # no setting gives a layer fewer slots than top_k (a pool per layer needs them), so those are replayed:
        # one replay per policy and layer serves every quota
        caps = range(min(self.top_k, self.experts), self.experts + 1)
        plans = warm_plans(layer_plans(self.trace), self.warm)
        for n in self.policies:
            for layer, plan in enumerate(plans):
                for cap, v in step_misses(self.trace, n, layer, caps, plan).items():
                    self._steps[(n, layer, cap)] = v
        # misses per layer at 1..experts slots (index s-1); below top_k, never read (0)
        self.curves = {n: [[int(self._steps[(n, layer, c)][1].sum()) if c in caps else 0 for c in range(1, self.experts + 1)]
                           for layer in range(self.layers)] for n in self.policies}

    def set_costs(self, costs: Costs) -> None:
        """Predict with ``costs`` from now on (the speed ceilings the search prunes by are measured again)."""
        self.costs = costs
        self._ceilings.clear()
        self._shared_ceilings.clear()

    def _predict(self, slots, policy, pf, la, shared=False, auto=False) -> Prediction:
        return predict(self.trace, slots, policy, pf, la, self.costs, shared, SEARCH_TOKENS,
                       lambda layer, cap: self._steps[(policy, layer, cap)], self.warm, auto)

    def _prefetch(self, pf, la) -> tuple[int, int, bool] | None:
        """A prefetch candidate as ``predict`` takes it: (guesses, lookahead, auto).  (AUTO, lookahead) is the
        engine's AUTO_GUESSES guesses (at most the experts per layer); None where the trace cannot plan it (no
        guesses, one layer, or fewer guesses or layers ahead recorded than it makes)."""
        if pf != AUTO:
            return pf, la, False
        n, g = min(AUTO_GUESSES, self.experts), self.trace.guesses
        if g is None or self.layers < 2 or g.shape[3] < n or g.shape[2] < la:
            return None
        return n, la, True

    @property
    def min_cap(self) -> int:
        """The smallest cap searched: a shared pool's when one is considered, else per-layer pools'."""
        return minimum_cap(self.fixed, self.slot, self.layers, self.top_k, self.shared)

    @property
    def per_layer_min_cap(self) -> int:
        return minimum_cap(self.fixed, self.slot, self.layers, self.top_k)

    @property
    def full_cap(self) -> int:
        return self.fixed + self.layers * self.experts * self.slot

    def slots_for(self, cap: int) -> int:
        return min((cap - self.fixed) // self.slot, self.layers * self.experts)

    def ceiling(self, policy: str, prefetch: int) -> float:
        """The most tok/s a simulated setting of ``policy`` (a shared pool, or prefetch) can predict, from counts
        alone: the simulated engine's compute over the simulated tokens (every layer's compute outside its experts
        with the pool's and the policy's bookkeeping, each chosen expert, the head), plus, for each expert first
        chosen after the prefill, the least its arrival costs: a miss (the compute thread's copy over an emulated
        link, its read otherwise) or, with prefetch, a guess read (``place``) if that is less.  Every other term
        of the simulation (stalls, guesses, the reader's lateness) only adds time."""
        got = self._ceilings.get((policy, prefetch > 0))
        if got is None:
            c, t = self.costs, self.trace
            P = prefill_tokens(t)
            T = min(t.n_tokens, P + SEARCH_TOKENS)
            n = T - P
            per_access = c.pool + c.policy.get(policy, 0.0)
            chosen = t.experts[P:T] >= 0
            compute = n * (c.head + sum(a + per_access * t.top_k for a in c.attn)) + int(chosen.sum()) * c.expert
            keys = lambda ex: set((np.nonzero(ex >= 0)[1] * max(t.n_experts, 1) + ex[ex >= 0]).tolist())  # noqa: E731
            warmed = set() if self.warm is None else {layer * max(t.n_experts, 1) + e for layer, e in self.warm}
            # (layer, expert) pairs no prefill loaded (nor a warm start may have: it fills at most these)
            cold = len(keys(t.experts[P:T]) - keys(t.experts[:P]) - warmed)
            arrive = c.copy if c.emulated else c.page
            if prefetch:
                arrive = min(arrive, c.place)
            time = compute + cold * max(arrive, 0.0)
            got = self._ceilings[(policy, prefetch > 0)] = n / time * (1 + 1e-9) if time > 0 and n else float("inf")
        return got

    def shared_ceiling(self, policy: str, total: int) -> float:
        """The most tok/s a pool of ``total`` slots shared by all layers can predict with prefetch off, from the
        replay's misses of each layer step (the simulation's decision core without guesses: the same misses).
        With no guesses each step's misses are booked when it routes on an idle link; the step takes at least
        its compute with the compute thread's copy of each miss, and at least until its last miss has arrived
        (their transfers one after the other) and been computed; with real reads, its compute and each read.
        Rounding of the link's whole nanoseconds is allowed for."""
        got = self._shared_ceilings.get((policy, total))
        if got is None:
            c, t = self.costs, self.trace
            P = prefill_tokens(t)
            T = min(t.n_tokens, P + SEARCH_TOKENS)
            n = T - P
            L = t.n_layers
            if self._shared_plan is None:
                self._shared_plan = warm_plans([shared_plan(t)], self.warm)[0]
            plan = self._shared_plan
            m = self._shared_step_misses(policy, max(total, 1))[: n * L].astype(np.float64)
            k = plan.sizes[plan.counted][: n * L].astype(np.float64)
            per_access = c.pool + c.policy.get(policy, 0.0)
            attn = np.tile(np.array([a + per_access * t.top_k for a in c.attn]), n)
            if c.emulated:
                ns = 1e-9
                page = c.page * (1 - 1e-6) - (c.page / ns / CHUNK + 2) * ns  # whole ns per chunk, dropped
                arrive = np.where(m > 0, m * page - ns + c.expert, 0.0)
                step = attn + np.maximum(k * c.expert + m * c.copy, arrive)
            else:
                step = attn + k * c.expert + m * c.page
            time = float(step.sum()) + n * c.head
            got = self._shared_ceilings[(policy, total)] = n / time * (1 + 1e-9) if time > 0 and n else math.inf
        return got

    def _shared_step_misses(self, policy: str, C: int) -> np.ndarray:
        """Misses of each decode step of the shared pool of C slots, by replay.  A policy whose fast path serves
        every pool size in one pass (lru, the score rules) is replayed once for every size the curve visits."""
        got = self._shared_misses.setdefault(policy, {})
        if C not in got:
            cls = policies.get(policy)
            sizes = [C]
            if cls is LRU or (not self.warm and getattr(cls, "history_scores", False) and cls in FAST_PATHS):
                L, k = self.layers, self.top_k
                sizes = sorted({C, *range(k, L * k, L), *range(L * k, L * self.experts + 1, L)} - set(got))
            plan = self._shared_plan
            for c, miss in layer_misses(plan, cls, sizes).items():
                cs = np.concatenate([[0], np.cumsum(miss)])
                got[c] = (cs[plan.starts[1:]] - cs[plan.starts[:-1]])[plan.counted].astype(np.int32)
        return got[C]

    def candidates(self, total: int, policy_names=None, prefetches=None) -> list[tuple[str, Prediction]]:
        """Every setting for ``total`` slots: even and uneven splits (and a shared pool), each policy and prefetch.

        Pruned (``prune``): the settings that are simulated step by step (a shared pool, prefetch) are ranked by
        their ``ceiling`` first, and one is simulated only if it can win: if its ceiling is above every simpler
        setting's predicted speed.  Another is left out; it could not have been recommended (a simpler setting at
        least as fast is within TIE of the best whenever it would be), nor be the best.  So the recommendation is
        the unpruned search's (tests/planner/test_plan.py checks it), and the list holds the settings simulated."""
        out = []

        def can_win(label: str, policy: str, pf: int, la: int, ceiling: float | None = None, auto: bool = False) -> bool:
            if not self.prune:
                return True
            rank = simplicity(label, _Setting(policy, pf, la if pf else 0, auto))
            beaten = max((pr.tok_s for lab, pr in out if simplicity(lab, pr) < rank), default=None)
            return beaten is None or (self.ceiling(policy, pf) if ceiling is None else ceiling) > beaten
        L, E, k = self.layers, self.experts, self.top_k
        names = policy_names or self.policies
        # the prefetch settings tried, as (guesses, lookahead, auto), off left out (every split is predicted without)
        settings = [st for st in (self._prefetch(pf, la) for pf, la in prefetches or self.prefetches) if st and st[0]]
        per_layer = total >= L * k  # below, only a shared pool fits
        ranked = list(names)
        if per_layer:
            splits = {n: {"even": even_split(total, L, E), "uneven": best_split(self.curves[n], total, k, E)} for n in names}
            if self.profile is not None:
                by_profile = best_split(profile_curves(self.profile), total, k, E)
                for n in names:
                    splits[n]["profile"] = by_profile
            for n in names:
                for label, sl in splits[n].items():
                    out.append((label, self._predict(sl, n, 0, 1)))
            ranked = sorted(names, key=lambda n: -max(pr.tok_s for _, pr in out if pr.policy == n))
            for n in ranked[:PREFETCH_POLICIES]:
                for pf, la, auto in settings:
                    for label, sl in splits[n].items():
                        if can_win(label, n, pf, la, auto=auto):
                            out.append((label, self._predict(sl, n, pf, la, auto=auto)))
        if self.shared:  # the best per-layer policies and those made for a shared pool (every policy when per-layer
            # pools do not fit), then prefetch for the best two there
            pick = ranked if not per_layer else ranked[:PREFETCH_POLICIES] + [
                n for n in ranked[PREFETCH_POLICIES:] if getattr(policies.get(n), "for_shared_pool", False)]
            # each policy's plain shared pool is simulated if it can win, or if it may be among the best two (their
            # speeds choose the policies tried with prefetch): not when two simulated already beat its ceiling
            plain = {}
            ranks = len(pick) > PREFETCH_POLICIES
            if self.prune:
                top = {n: self.shared_ceiling(n, total) for n in pick}
                for n in sorted(pick, key=lambda n: -top[n]):
                    ahead = sum(pr.tok_s > top[n] for pr in plain.values())
                    if (ranks and ahead < PREFETCH_POLICIES) or can_win("shared", n, 0, 1, top[n]):
                        plain[n] = self._predict([total], n, 0, 1, shared=True)
                plain = {n: plain[n] for n in pick if n in plain}  # in the order the unpruned search lists them
            else:
                plain = {n: self._predict([total], n, 0, 1, shared=True) for n in pick}
            out += [("shared", pr) for pr in plain.values()]
            for n in sorted(pick, key=lambda n: -plain[n].tok_s if n in plain else math.inf)[:PREFETCH_POLICIES]:
                for pf, la, auto in settings:
                    if can_win("shared", n, pf, la, auto=auto):
                        out.append(("shared", self._predict([total], n, pf, la, shared=True, auto=auto)))
        return out

    def best(self, total: int, policy_names=None, prefetches=None) -> tuple[str, Prediction]:
        return choose(self.candidates(total, policy_names, prefetches))

    def curve(self, policy: str, prefetches) -> list[dict]:
        """Predicted tok/s against cap, one more slot per layer at a time, from the smallest cap (a shared pool's
        below the per-layer minimum, when one is considered).  A bigger cap can always leave slots unused, so each
        point keeps the best figure seen so far."""
        out, best = [], None
        L, E, k = self.layers, self.experts, self.top_k
        below = range(k, L * k, L) if self.shared else range(0)
        for total in [*below, *range(L * k, L * E + 1, L)]:
            _, pr = self.best(total, [policy], prefetches)
            if best is None or pr.tok_s > best.tok_s:
                best = pr
            out.append({"cap_bytes": self.fixed + total * self.slot, "slots_total": total, "tok_s": best.tok_s,
                        "slots": best.slots, "shared": best.shared, "prefetch": best.prefetch_setting,
                        "stall_share": best.stall_share})
        return out

    def smallest_cap(self, target: float, policy: str, prefetches, curve: list[dict]) -> int | None:
        """The smallest cap (bytes) whose best setting reaches ``target`` tok/s; None if none does.  The curve steps
        one slot per layer; between its points the totals are tried one slot at a time."""
        i = next((i for i, p in enumerate(curve) if p["tok_s"] >= target), None)
        if i is None:
            return None
        if i:
            for total in range(curve[i - 1]["slots_total"] + 1, curve[i]["slots_total"]):
                if self.best(total, [policy], prefetches)[1].tok_s >= target:
                    return self.fixed + total * self.slot
        return curve[i]["cap_bytes"]


def check_decode_steps(trace: Trace, where: str) -> None:
    """The planner predicts decode speed: a trace whose tokens are all prefill has nothing to simulate."""
    P = prefill_tokens(trace)
    if trace.n_tokens - P < 1:
        raise BadTrace(
            f"{where}: no decode steps (all {trace.n_tokens} tokens are prefill), so there is no decode speed to "
            "predict; record a trace with 'moerun record' or 'moerun generate --max-new N --trace FILE'"
        )


def check_trace_shape(trace: Trace, layers: int, experts: int, top_k: int, where: str) -> None:
    if trace.n_layers != layers or trace.top_k != top_k:
        raise BadInput(
            f"the trace has {trace.n_layers} layers and top_k {trace.top_k}, but {where} has {layers} and {top_k}"
        )
    if trace.n_experts > experts:
        raise BadInput(f"the trace names expert ids up to {trace.n_experts - 1}, but {where} has {experts} experts")
