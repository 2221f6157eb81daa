"""The planner's time model: decode simulated token by token along a routing trace, with measured costs.

The simulation follows the live engine (docs/design/prefetch.md) with the same code where the engine
makes decisions: hits, misses, victims, guess placement and dropping through the pool's decision
core (``moerun.runtime.decisions``, the live pool's own), an emulated
link's schedule through ``moerun.runtime.link.Link``, and whether a guess is worth reading through
``moerun.runtime.guesses`` (with ``Timing`` figures the simulation itself measures as it goes).  Per
decode token and layer:

- the layer's compute outside its experts (``attn[l]``: attention, norms, routing, measured fully
  resident), the pool's bookkeeping per access (``pool``, with LRU) and the policy's own cost per
  access over LRU's (``policy``);
- its routing: guesses for it that it did not choose are dropped; its chosen experts are
  accessed in ascending id, pinned; a miss is booked on the link (emulated) at once;
- the prefetch point (with prefetch): the guess rule (``guess``), and each guess read costs
  ``place``; it is booked on the link, or queued on the reader (real reads);
- its experts: those already there first (``expert`` each, the stored format's decoding
  included), then the others as they arrive.  Over an emulated link the compute thread copies a
  miss's bytes itself (``copy``) while its transfer runs, and waits the rest (``wait`` is added
  to every wait that really sleeps); with real reads it reads a miss itself (``page``).  Guesses'
  bytes are the reader's: there when their transfer ends;
- then the head (final norm, output projection, sampling).

With ``auto`` (``--prefetch auto``) the simulation keeps the live pool's account of each layer's guesses
(``moerun.runtime.guesses.Account``) and drives it as the pool does, in simulated ns: at a prefetch point
that the per-guess judgement lets through, each layer ahead is asked ``open`` (a resting layer is not
guessed for; where none is open the guess rule is not run either); each guess read is charged ``place``
and the plain resident it evicted is watched (``read``); a guess its layer used is credited one page-in
less that expert's wait (``used``); a miss on an expert a guess evicted charges that guess's layer one
page-in (``missed``); each open layer is charged its share of the point's guess rule (``charge``).
Above the accounts the live engine's gate (``moerun.runtime.guesses.Gate``) is ticked at the start of
each decode step with simulated time: steps it holds off guess nothing.  A pool that holds every expert
makes no guesses, as the engine makes none.

With prefetch off and a pool per layer, every layer step depends only on how many of its
accesses missed, so the prediction is a sum over the replay's miss counts (``_additive``),
which is exact for this model and fast on long traces; otherwise the simulation walks the
tokens (at most ``max_tokens`` decode tokens after the prefill).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

from moerun import policies
from moerun.errors import BadOption, BadTrace
from moerun.files.trace import Trace
from moerun.runtime.decisions import Placed, Quotas, Shared, make_decisions, prefill_schedule
from moerun.runtime.guesses import Account, Gate, Timing, guess_pays, worth_guessing
from moerun.runtime.link import Link
from moerun.sim.fast import layer_misses
from moerun.sim.steps import layer_plans, plan_policy, prefill_tokens, warm_plans

SIM_TOKENS = 4096  # decode tokens simulated step by step (the additive path takes every token)


@dataclass
class Costs:
    """Seconds per operation (see the module docstring)."""

    attn: list[float]
    expert: float
    head: float
    page: float
    page_source: str = ""
    wait: float = 0.0  # added to every wait that sleeps: how late a sleep wakes, measured
    emulated: bool = True  # page over an emulated link (copies overlap it) or real reads (the read blocks)
    copy: float = 0.0  # the compute thread copying one expert's bytes from the page cache
    decode: float = 0.0  # of ``expert``: decoding the stored format (F16 widening, low-bit dequantization)
    guess: float = 0.0  # the guess rule at one prefetch point
    place: float = 0.0  # one guess read: placing it, handing it over, the reader's copy beside compute
    late: float = 0.0  # share of used guesses the compute thread copied itself, the reader being late
    policy: dict = field(default_factory=dict)  # policy name -> its cost per access over LRU's
    pool: float = 0.0  # the pool's bookkeeping per access with LRU (a resident run's fast path has none)

    def to_json(self) -> dict:
        return {
            "attn_us": [a * 1e6 for a in self.attn],
            "expert_us": self.expert * 1e6,
            "decode_us": self.decode * 1e6,
            "head_us": self.head * 1e6,
            "page_us": self.page * 1e6,
            "page_source": self.page_source,
            "emulated_link": self.emulated,
            "wait_us": self.wait * 1e6,
            "copy_us": self.copy * 1e6,
            "guess_us": self.guess * 1e6,
            "place_us": self.place * 1e6,
            "late_share": self.late,
            "policy_us_per_access": {k: v * 1e6 for k, v in self.policy.items()},
            "pool_us_per_access": self.pool * 1e6,
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
    shared: bool = False
    tokens: int = 0  # decode tokens the prediction covers
    warm_loads: int = 0  # experts a warm start reads before the first token (0: a cold start)
    warm_s: float = 0.0  # their reads: once per run, before the first token, not in ``step_s``
    auto: bool = False  # --prefetch auto: ``prefetch`` guesses per layer, each layer's kept while its account pays
    skipped: int = 0  # (auto) guesses not made because their layer rested
    rests: int = 0  # (auto) rests begun: trials a layer's guesses lost

    @property
    def prefetch_setting(self) -> int | str:
        """``--prefetch`` as the engine takes it: "auto", or the guesses per layer (0: off)."""
        return "auto" if self.auto else self.prefetch

    @property
    def hit_rate(self) -> float:
        return 1 - self.misses / self.accesses if self.accesses else 0.0

    @property
    def stall_share(self) -> float:
        return self.stall_s / self.step_s if self.step_s else 0.0

    def to_json(self) -> dict:
        """Every field, prefetch as the engine's options write it (``"prefetch": "auto"`` for auto, no ``auto`` key)."""
        d = asdict(self)
        d["prefetch"] = self.prefetch_setting
        del d["auto"]
        d["hit_rate"] = self.hit_rate
        d["stall_share"] = self.stall_share
        return d


def _check(trace: Trace, slots: list[int], prefetch: int, lookahead: int, costs: Costs, shared: bool,
           auto: bool = False) -> None:
    L = trace.n_layers
    if auto and not prefetch:
        raise BadOption("prefetch auto is planned with its guesses per layer (moerun.runtime.guesses.AUTO_GUESSES), got 0")
    if len(slots) != (1 if shared else L):
        raise BadOption(f"{len(slots)} slot counts for a trace of {L} layers" + (" (a shared pool takes one)" if shared else ""))
    if len(costs.attn) != L:
        raise BadOption(f"{len(costs.attn)} per-layer costs for a trace of {L} layers")
    if prefetch and trace.guesses is None:
        raise BadTrace("this trace holds no guesses, so prefetch cannot be planned (record one with 'moerun record')")
    if prefetch and (lookahead > trace.guesses.shape[2] or prefetch > trace.guesses.shape[3]):
        raise BadOption(
            f"the trace holds {trace.guesses.shape[3]} guesses for {trace.guesses.shape[2]} layers ahead; "
            f"cannot plan --prefetch {prefetch} --lookahead {lookahead}"
        )


def predict(trace: Trace, slots: list[int], policy: str, prefetch: int, lookahead: int, costs: Costs,
            shared: bool = False, max_tokens: int = SIM_TOKENS, step_misses=None, warm=None, auto: bool = False) -> Prediction:
    """Predict decode tok/s along ``trace`` (prefill tokens only warm the pool) for one setting.

    ``step_misses(layer, slots)``, if given, returns that layer's (accesses, misses) per decode step for a
    quota (a cache the planner's search keeps); otherwise they are replayed here.  ``warm``: a warm start's
    ``(layer, expert)`` pairs, hottest first (``decisions.hottest`` of a profile): the pool is filled from them
    before the first step (``Decisions.warm``, as the live pool and replay fill it); the cache ``step_misses``
    must then be of replays with the same warm start.  The fill's reads are ``warm_s``, once per run.

    ``auto``: ``--prefetch auto`` with ``prefetch`` guesses per layer (the engine's AUTO_GUESSES, at most the
    experts per layer): each layer's guesses are kept only while its account shows they pay (the module
    docstring); the prediction's ``skipped`` and ``rests`` count what the account held back."""
    _check(trace, slots, prefetch, lookahead, costs, shared, auto)
    policies.get(policy)
    if not prefetch and not shared:
        pr = _additive(trace, slots, policy, costs, step_misses, warm)
    else:
        pr = _simulate(trace, slots, policy, prefetch, lookahead, costs, shared, max_tokens, warm, auto)
    if warm:
        pr.warm_loads = warm_loads(trace, slots, shared, warm)
        pr.warm_s = pr.warm_loads * costs.page  # read one after the other (over a link: its transfers in a row)
    return pr


def warm_loads(trace: Trace, slots: list[int], shared: bool, warm) -> int:
    """Experts a warm start fills into this pool (``Decisions.warm_keys``)."""
    L, E = trace.n_layers, max(trace.n_experts, 1)
    core = make_decisions(lambda _: policies.LRU(), [max(s, 1) for s in slots], L, E, shared)
    return len(core.warm_keys(warm))


def step_misses(trace: Trace, policy: str, layer: int, capacities, plan=None, warm=None) -> dict:
    """For each quota: (accesses, misses) per decode step of one layer, by replay (``plan``: that layer's
    ``layer_plans(trace)`` entry, if the caller holds it, with its warm start; else ``warm``, as ``predict``'s)."""
    if plan is None:
        plan = warm_plans([layer_plans(trace)[layer]], warm)[0]
    flags = layer_misses(plan, policies.get(policy), list(capacities))
    counted = plan.counted_per_access()
    out = {}
    for cap, miss in flags.items():
        cs = np.concatenate([[0], np.cumsum(miss & counted)])
        out[cap] = (plan.sizes[plan.counted], (cs[plan.starts[1:]] - cs[plan.starts[:-1]])[plan.counted])
    return out


# ---------------------------------------------------------------------------- prefetch off, one pool per layer


def layer_step_ns(k: int, misses: int, c: dict) -> tuple[float, float]:
    """(time, stall) of one decode layer step with ``misses`` of its ``k`` accesses missing, prefetch off.

    Over an emulated link the misses are booked when the layer routes and travel one after the other;
    the layer computes its resident experts, then for each miss copies its bytes (while the transfer
    runs) and waits out the rest.  With real reads it reads each miss itself.
    """
    now = c["attn"] + (k - misses) * c["expert"]
    t0 = c["attn"]
    stall = 0.0
    for i in range(misses):
        if c["emulated"]:
            end = t0 + (i + 1) * c["page"]
            now += c["copy"]
            if end > now:
                stall += end - now + c["wait"]
                now = end + c["wait"]
        else:
            now += c["page"]
            stall += c["page"]
        now += c["expert"]
    return now, stall


def _additive(trace: Trace, slots: list[int], policy: str, costs: Costs, cached=None, warm=None) -> Prediction:
    k = trace.top_k
    P = prefill_tokens(trace)
    per_access = costs.pool + costs.policy.get(policy, 0.0)
    step = costs.head * (trace.n_tokens - P)
    stall = 0.0
    accesses = misses = 0
    layer_hit = []
    for layer in range(trace.n_layers):
        sizes, per_step = (cached(layer, slots[layer]) if cached else
                           step_misses(trace, policy, layer, [slots[layer]], warm=warm)[slots[layer]])
        c = {"attn": costs.attn[layer] + per_access * k, "expert": costs.expert, "page": costs.page, "copy": costs.copy,
             "wait": costs.wait, "emulated": costs.emulated}
        for n in np.unique(sizes):
            for m in range(int(n) + 1):
                count = int(((sizes == n) & (per_step == m)).sum())
                if count:
                    t, s = layer_step_ns(int(n), m, c)
                    step += count * t
                    stall += count * s
        a, m_ = int(sizes.sum()), int(per_step.sum())
        accesses += a
        misses += m_
        layer_hit.append(1 - m_ / a if a else 0.0)
    n_tok = trace.n_tokens - P
    step_s = step / n_tok if n_tok else 0.0
    return Prediction(list(slots), policy, 0, 0, 1 / step_s if step_s else 0.0, step_s, stall / n_tok if n_tok else 0.0,
                      accesses, misses, 0, layer_hit, False, n_tok)


# ---------------------------------------------------------------------------- step by step


class _Sim:
    """The simulated engine: the pool's decisions (``moerun.runtime.decisions``) on simulated time, the
    link or the reader's queue, and the clock (ns)."""

    def __init__(self, trace, slots, policy, costs, shared, prefetch, warm=None, auto=False):
        L, E = trace.n_layers, max(trace.n_experts, 1)
        cls = policies.get(policy)
        self.L, self.E, self.k = L, E, trace.top_k
        if shared:
            self.core = Shared(max(slots[0], 1), policies.make_policy(cls, L * E, E), L, E)
        else:
            plans = layer_plans(trace)
            self.core = Quotas([max(s, 1) for s in slots], [plan_policy(cls, plan) for plan in plans])
        if warm:
            self.core.warm(warm)  # untimed here: the fill is ``Prediction.warm_s``, once per run
        ns = 1e9
        self.c = {name: getattr(costs, name) * ns for name in ("expert", "head", "page", "wait", "copy", "guess", "place")}
        self.attn = [a * ns + (costs.pool + costs.policy.get(policy, 0.0)) * ns * self.k for a in costs.attn]
        self.emulated = costs.emulated
        self.link = Link(1e9) if costs.emulated else None  # one "byte" per ns: a transfer booked as page ns
        self.page = int(self.c["page"])
        self.reader_free = 0.0  # real reads: when the reader finishes what it was given
        self.timing = Timing(self.c["page"])
        self.timing.copy_ns = self.c["copy"]
        self.timing.late = costs.late
        self.arrive: dict = {}  # (layer, expert) as one number -> Transfer or reader end time, of reads not yet taken in
        self.off = [0] * L if shared else [layer * E for layer in range(L)]  # a pool key + off[layer]: that number
        self.now = 0.0
        self.stall = 0.0
        self.loads = 0
        self.account = Account(L) if auto else None  # prefetch auto: each layer's guesses, saved against cost
        self.credit: list = []  # (auto) the guesses the layer being computed used, as keys of ``arrive``

    def arrival(self, key: int) -> float:
        """When a key's bytes are (or will be) there: its transfer's end, or the reader's; 0 if there."""
        a = self.arrive.get(key)
        if a is None:
            return 0.0
        return float(self.link.ends(a, int(self.now))) if self.link is not None else a

    def prefill(self, layer: int, rows) -> None:
        """The prefill block of one layer (``prefill_schedule``), untimed: it only warms the pool."""
        core = self.core
        for e in prefill_schedule(rows):
            core.prefill(layer, e)
        core.done()

    def access_layer(self, layer: int, chosen: list[int], probs, step: int = 0) -> tuple[list, set]:
        """The layer's routing: drop its unchosen guesses, access its experts; returns the experts (as keys
        of ``arrive``) whose bytes may not be there yet, and those that missed.  With an account, a miss on
        an expert a guess evicted is charged to that guess's layer, and the guesses used are kept in
        ``credit`` for ``experts`` (which knows their waits)."""
        core, link, timing, arrive, account = self.core, self.link, self.timing, self.arrive, self.account
        now = int(self.now)
        off = self.off[layer]

        def drop(key: int) -> bool:  # a guess not chosen: its link time given back, unless it has begun
            a = arrive.get(key + off)
            if link is None or a is None or link.drop(a, now):
                core.forget(layer, key)
                arrive.pop(key + off, None)
                timing.outcome(False)
                return True
            return False

        core.meet(layer, chosen, drop)
        timing.layer_started(now)
        keys = core.route(layer, chosen, probs)
        out = core.serve(layer)
        used, wasted = core.used, core.wasted
        waiting, missing = [], set()
        credit = self.credit = [] if account is not None else self.credit
        for key, (hit, _, victim) in zip(keys, out):
            if victim is not None:
                if victim in wasted:
                    timing.outcome(False)
                arrive.pop(victim + off, None)
            key += off
            if hit:
                if key - off in used:
                    timing.outcome(True)
                    if account is not None:
                        credit.append(key)
                    a = arrive.get(key)
                    if link is not None and a is not None and a.end < 0:
                        link.promote(a, now)
                if key in arrive:
                    waiting.append(key)
            else:
                if account is not None and account.victims:  # a guess evicted it lately?
                    account.missed(key, step, self.c["page"])
                missing.add(key)
                arrive[key] = link.book(self.page, now, True) if link is not None else None
                waiting.append(key)
        return waiting, missing

    def place(self, layer: int, target: int, guesses: list[int], step: int = 0) -> None:
        """The prefetch point of ``layer``: its guesses for ``target``, read if they pay (moerun.runtime.guesses);
        with an account, each read is charged to ``target`` and a plain resident it evicted watched for a miss."""
        t = self.timing
        account = self.account
        need = t.need_at(self.now, target - layer)

        def pays() -> bool:
            if self.link is not None:
                arrival = self.link.backlog_until(int(self.now)) + self.page
            else:
                arrival = max(self.reader_free, self.now) + self.page
            return guess_pays(t, self.c["page"], arrival, need, self.c["place"])

        off = self.off[target]
        for out in self.core.place(target, guesses, pays):
            if type(out) is not Placed:
                continue
            key = out.key + off
            if account is not None:  # as the pool: a free slot, or a guess no layer used, is not watched for a miss
                victim = None if out.victim is None or out.wasted else out.victim + off
                account.read(target, self.c["place"], victim, step, key)
            if out.victim is not None:
                if out.wasted:
                    t.outcome(False)
                self.arrive.pop(out.victim + off, None)
            self.now += self.c["place"]
            self.loads += 1
            if self.link is not None:
                self.arrive[key] = self.link.book(self.page, int(self.now), False)
            else:
                self.reader_free = max(self.reader_free, self.now) + self.page
                self.arrive[key] = self.reader_free

    def experts(self, waiting: list[int], k: int, missing: set, layer: int = 0) -> None:
        """Compute the layer's experts: those there first, then the others as they arrive; then the layer is done.
        With an account, each guess the layer used is credited one page-in less its own wait."""
        c = self.c
        now = self.now
        waits = {} if self.credit else None
        late = [(0.0 if key in missing and not self.emulated else self.arrival(key), key) for key in waiting]
        behind = sorted((a, key) for a, key in late if a > now or key in missing)
        for a, key in late:
            if not (a > now or key in missing):
                self.arrive.pop(key, None)
        now += (k - len(behind)) * c["expert"]
        for a, key in behind:
            if key in missing:
                if self.emulated:
                    now += c["copy"]
                    a = self.arrival(key)
                else:  # a real read, on this thread
                    self.stall += c["page"]
                    now += c["page"]
                    a = now
            if a > now:
                self.stall += a - now + c["wait"]
                if waits is not None:
                    waits[key] = a - now + c["wait"]
                now = a + c["wait"]
            now += c["expert"]
            self.arrive.pop(key, None)
        if waits is not None:
            for key in self.credit:
                self.account.used(layer, c["page"] - waits.get(key, 0.0), key)
            self.credit = []
        self.now = now
        self.core.done()


def _simulate(trace, slots, policy, prefetch, lookahead, costs, shared, max_tokens, warm=None, auto=False) -> Prediction:
    L = trace.n_layers
    P = prefill_tokens(trace)
    T = min(trace.n_tokens, P + max_tokens)
    sim = _Sim(trace, slots, policy, costs, shared, prefetch, warm, auto)
    account = sim.account
    # prefetch auto guesses nothing where the pool holds every expert (moerun.runtime.options.prefetch_guesses)
    guessing = prefetch and not (auto and sum(slots) >= L * max(trace.n_experts, 1))
    ex = trace.experts.tolist()
    for layer in range(L):  # prefill: each layer's distinct experts once, ascending, pinned alone (as the pool does)
        sim.prefill(layer, (ex[t][layer] for t in range(P)))
    g = trace.guesses.tolist() if prefetch else None
    probs = trace.probs
    accesses = misses = 0
    layer_acc, layer_miss = [0] * L, [0] * L
    gate = Gate() if account is not None and guessing else None  # prefetch auto: does this step guess at all?
    on = True
    for t in range(P, T):
        if gate is not None:  # the live engine ticks it at layer 0's prefetch point, once a decode step
            on = gate.tick(sim.now)
        for layer in range(L):
            sim.now += sim.attn[layer]
            chosen = sorted(e for e in ex[t][layer] if e >= 0)
            waiting, missing = sim.access_layer(layer, chosen, probs[t, layer] if probs is not None else None, t)
            m = len(missing)
            accesses += len(chosen)
            misses += m
            layer_acc[layer] += len(chosen)
            layer_miss[layer] += m
            if guessing and on and worth_guessing(sim.timing, sim.c["page"], sim.c["place"]):
                ahead = range(layer + 1, min(L, layer + lookahead + 1))
                if account is not None:  # as the live prefetch point: every layer ahead asked, the open ones guessed
                    ahead = [target for target in ahead if account.open(target, prefetch)]
                if account is None or ahead:  # none open: the guess rule is not run either
                    sim.now += sim.c["guess"]
                    if account is not None:  # the point's time, shared by the layers it guesses for (as live)
                        for target in ahead:
                            account.charge(target, sim.c["guess"] / len(ahead))
                    sim.timing.mark = int(sim.now)
                    for target in ahead:
                        sim.place(layer, target, [e for e in g[t][layer][target - layer - 1][:prefetch] if e >= 0], t)
            sim.experts(waiting, len(chosen), missing, layer)
        sim.now += sim.c["head"]
    n = T - P
    step_s = sim.now / 1e9 / n if n else 0.0
    return Prediction(list(slots), policy, prefetch, lookahead if prefetch else 0, 1 / step_s if step_s else 0.0, step_s,
                      sim.stall / 1e9 / n if n else 0.0, accesses, misses, sim.loads,
                      [1 - mm / a if a else 0.0 for mm, a in zip(layer_miss, layer_acc)], shared, n,
                      auto=bool(auto), skipped=account.skipped if account else 0, rests=account.rests if account else 0)
