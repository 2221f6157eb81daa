"""moerun.policies: textbook fault counts, the learned policies are online, bounded by the optimum,
exact live, reproduced by replay, and fed the same per-step signals live and in replay.

Textbook sources:
- Silberschatz, Galvin and Gagne, Operating System Concepts, 9th edition, chapter 9 (page
  replacement): reference string 7,0,1,2,0,3,0,4,2,3,0,3,2,1,2,0,1,7,0,1 with three frames gives
  15 faults under FIFO (fig. 9.12), 9 under the optimal algorithm (fig. 9.14), 12 under LRU (fig. 9.15).
- Lee, Choi, Kim, Noh, Min, Cho and Kim, "LRFU: a spectrum of policies that subsumes the least
  recently used and least frequently used policies", IEEE Transactions on Computers 50(12), 2001:
  with F(x) = (1/2)^(lambda x) and lambda = 1, LRFU replaces exactly as LRU does (a more recent
  reference always outweighs all older ones together).
- Belady, "A study of replacement algorithms for a virtual-storage computer", IBM Systems Journal
  5(2), 1966: MIN, evicting the page whose next reference is furthest away, faults least; on a
  cyclic reference string, where each page's next possible use is its next use, a rule that evicts
  by the distance to the next possible use decides as MIN does.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import moerun
from moerun import policies
from moerun.cli import main as cli
from moerun.errors import BadTrace
from moerun.files.trace import Trace, read_trace, write_trace
from moerun.model.sampling import Sampling
from moerun.policies import FIFO, LFU, LRFU, LRU, Markov, Optimal, Orbit, Policy, grow
from moerun.runtime.budget import minimum_cap
from moerun.runtime.residency import Residency
from moerun.sim import report as replay

pytestmark = pytest.mark.usefixtures("every_guess_read")  # the prefetch machinery runs whatever guesses cost

SILBERSCHATZ = [7, 0, 1, 2, 0, 3, 0, 4, 2, 3, 0, 3, 2, 1, 2, 0, 1, 7, 0, 1]  # OSC 9th ed., ch. 9
LEARNED = (LRFU, Markov, Orbit)


def _faults(policy: Policy, pages: list[int], frames: int) -> int:
    """Drive one Residency with one access per step, each pinned alone (plain demand paging)."""
    res = Residency(frames, policy)
    return sum(not res.access(p, (p,))[0] for p in pages)


def _random_trace(seed: int, tokens: int, layers: int, experts: int, k: int, prefill: int = 0, probs: bool = True) -> Trace:
    """Skewed, locally repetitive routing (so that hits, misses and learnable contexts all occur), with router probabilities."""
    rng = np.random.default_rng(seed)
    k = min(k, experts)
    logits = rng.normal(size=(tokens, layers, experts)) + np.linspace(0, rng.random() * 2, experts)
    period = int(rng.integers(2, 7))  # a repeating motif, as structured text gives
    logits[period:] += 1.5 * logits[:-period] * (rng.random((tokens - period, layers, 1)) < 0.5)
    p = np.exp(logits - logits.max(axis=-1, keepdims=True))
    p = (p / p.sum(axis=-1, keepdims=True)).astype(np.float32)
    ex = np.sort(np.argsort(-p, axis=-1, kind="stable")[..., :k], axis=-1)
    meta = {"n_experts": experts, "prefill_tokens": min(prefill, tokens)}
    return Trace(ex, meta=meta, probs=p if probs else None)


def _victims(trace: Trace, cls: type[Policy], capacity: int) -> list[list[tuple[int, object]]]:
    """Per layer, every (clock, victim) the policy chose, by replay's reference path."""
    out = []
    for plan in replay.layer_plans(trace):
        log: list[tuple[int, object]] = []

        class Logged(cls):  # same decisions, written down
            record = log

            def victim(self, candidates, now):
                v = super().victim(candidates, now)
                self.record.append((now, v))
                return v

        replay.generic_misses(plan, Logged, capacity)
        out.append(log)
    return out


# ---------------------------------------------------------------------------- textbook examples


def test_textbook_fault_counts_hold_for_lru_fifo_and_the_optimum():
    # Silberschatz, Galvin and Gagne, Operating System Concepts, 9th ed., ch. 9, figs. 9.12, 9.14, 9.15
    assert _faults(FIFO(), SILBERSCHATZ, 3) == 15
    assert _faults(Optimal(SILBERSCHATZ), SILBERSCHATZ, 3) == 9
    assert _faults(LRU(), SILBERSCHATZ, 3) == 12


@pytest.mark.parametrize("generic", [False, True], ids=["fast", "generic"])
def test_textbook_fault_counts_hold_through_the_replay(tmp_path, capsys, generic):
    path = tmp_path / "osc.npz"
    np.savez(path, experts=np.array(SILBERSCHATZ).reshape(-1, 1, 1))
    args = ["replay", "--routing", str(path), "--json", "--evict", "fifo,optimal,lru,lrfu,markov", "--slots", "3", "--no-baselines"]
    assert cli.main(args + (["--generic"] if generic else [])) == 0
    doc = json.loads(capsys.readouterr().out)
    misses = {name: replay.overall(doc["results"], name)[3]["misses"] for name in ("fifo", "optimal", "lru", "lrfu", "markov")}
    assert (misses["fifo"], misses["optimal"], misses["lru"]) == (15, 9, 12)  # OSC 9th ed., ch. 9
    assert misses["lrfu"] >= 9 and misses["markov"] >= 9  # nothing beats the optimum


def test_lrfu_with_lambda_one_is_lru_and_with_lambda_zero_counts_the_whole_history():
    # Lee et al., IEEE Trans. Computers 50(12), 2001: lambda = 1 gives LRU, lambda = 0 gives LFU
    lam1 = type("LRFU1", (LRFU,), {"lam": 1.0})
    assert _faults(lam1(), SILBERSCHATZ, 3) == 12
    rng = np.random.default_rng(5)
    pages = rng.integers(0, 7, 400).tolist()
    a, b = lam1(), LRU()
    ra, rb = Residency(4, a), Residency(4, b)
    for p in pages:
        assert ra.access(p, (p,)) == rb.access(p, (p,))
    # lambda = 0: the count of every access ever made, kept across evictions (unlike lfu)
    lfu_all = type("LRFU0", (LRFU,), {"lam": 0.0})()
    res = Residency(2, lfu_all)
    for p in [1, 1, 1, 2, 3, 2, 3]:  # 1 was used three times: it stays while 2 and 3 take turns
        res.access(p, (p,))
    assert 1 in res and lfu_all.count[1] == 3.0


def test_new_policies_are_registered_and_online():
    for cls in LEARNED:
        assert policies.get(cls.name) is cls
        assert cls.online
        assert cls.name in policies.names(online_only=True)


def test_tuning_variants_keep_the_class_and_refuse_unknown_parameters():
    v = Markov.with_params(order=2, gamma=0.7)
    assert issubclass(v, Markov) and v.order == 2 and v.gamma == 0.7 and v.horizon == Markov.horizon
    assert v.name != Markov.name and policies.get("markov") is Markov
    with pytest.raises(TypeError):
        Markov.with_params(alpha=1)


# ---------------------------------------------------------------------------- online: no look at the future


trace_params = st.tuples(
    st.integers(0, 2**31 - 1),  # seed
    st.integers(8, 120),  # tokens
    st.integers(1, 2),  # layers
    st.integers(3, 10),  # experts
    st.integers(1, 3),  # top_k
    st.integers(0, 5),  # prefill tokens
)


@settings(max_examples=80, deadline=None)
@given(trace_params, st.floats(0.0, 1.0), st.integers(0, 2**31 - 1))
def test_decisions_up_to_t_do_not_depend_on_the_trace_after_t(params, where, seed2):
    a = _random_trace(*params)
    T = a.n_tokens
    t = int(where * T)
    other = _random_trace(seed2, *params[1:])
    b = Trace(np.concatenate([a.experts[:t], other.experts[t:]]), meta=dict(a.meta), probs=np.concatenate([a.probs[:t], other.probs[t:]]))
    k = a.top_k
    for cls in LEARNED:
        for cap in (k, k + 1, k + 3):
            va, vb = _victims(a, cls, cap), _victims(b, cls, cap)
            for layer, plan in enumerate(replay.layer_plans(a)):
                # the clock of the first access of token t (prefill loads belong to token P - 1)
                later = np.nonzero(plan.token >= t)[0] if t >= replay.prefill_tokens(a) else np.array([0])
                cut = int(plan.starts[later[0]]) if later.size else plan.n
                before_a = [v for v in va[layer] if v[0] < cut]
                before_b = [v for v in vb[layer] if v[0] < cut]
                assert before_a == before_b, (cls.name, cap, layer, t)


def test_the_online_check_catches_a_policy_that_reads_the_future():
    # the offline optimum fails the same check: its early choices depend on what comes later
    a = _random_trace(3, 60, 1, 6, 2)
    t = 20
    differs = False
    for seed2 in range(20):
        other = _random_trace(100 + seed2, 60, 1, 6, 2)
        b = Trace(np.concatenate([a.experts[:t], other.experts[t:]]), meta=dict(a.meta), probs=np.concatenate([a.probs[:t], other.probs[t:]]))
        cut = 2 * t  # top-2, no padding, no prefill: token t starts at access 2t
        va = [v for v in _victims(a, Optimal, 3)[0] if v[0] < cut]
        vb = [v for v in _victims(b, Optimal, 3)[0] if v[0] < cut]
        differs |= va != vb
    assert differs


# ---------------------------------------------------------------------------- bounded by the optimum


@settings(max_examples=120, deadline=None)
@given(trace_params, st.booleans())
def test_no_learned_policy_beats_the_offline_optimum(params, with_probs):
    trace = _random_trace(*params, probs=with_probs)
    caps = list(range(1, trace.n_experts + 1))
    opt = replay.replay_counts(trace, Optimal, caps, fast=False)
    for cls in LEARNED:
        got = replay.replay_counts(trace, cls, caps, fast=False)
        for c in caps:
            for layer, (o, g) in enumerate(zip(opt[c], got[c])):
                assert o.accesses == g.accesses
                assert o.misses <= g.misses, (cls.name, c, layer)


def test_without_routing_signals_markov_decides_as_lrfu():
    # no routed() calls (a caller that only drives Residency): no context, so the frequency term decides
    rng = np.random.default_rng(2)
    pages = rng.integers(0, 9, 500).tolist()
    ra, rb = Residency(4, Markov()), Residency(4, LRFU())
    for p in pages:
        assert ra.access(p, (p,)) == rb.access(p, (p,))


def test_markov_learns_a_repeating_routing_pattern_that_lru_cannot_keep():
    # a cycle of 4 pairs over 5 experts with 3 slots: LRU always evicts the expert needed next,
    # the routing model learns which pair follows which
    cycle = [[0, 1], [2, 3], [0, 4], [1, 2]]
    trace = Trace(np.array(cycle * 100).reshape(-1, 1, 2), meta={"n_experts": 5})
    lru = replay.replay_counts(trace, LRU, [3])[3][0]
    mk = replay.replay_counts(trace, Markov, [3], fast=False)[3][0]
    opt = replay.replay_counts(trace, Optimal, [3])[3][0]
    assert opt.misses <= mk.misses < lru.misses
    assert mk.hit_rate > lru.hit_rate + 0.2


def test_the_routing_model_keeps_a_fixed_amount_of_memory():
    from moerun.policies import _RoutingModel

    m = _RoutingModel(order=5, gamma=0.5, horizon=8, kappa=2.0, memory=2, table_bits=6, ring_bits=5)
    sizes = (len(m.keys), len(m.end0), len(m.end1), len(m.ring))
    rng = np.random.default_rng(0)
    for _ in range(5000):  # far more steps and contexts than the table and the ring hold
        m.step(tuple(sorted(rng.choice(6, 2, replace=False).tolist())))
        assert 0.0 < m.p(int(rng.integers(0, 6))) < 1.0
    assert (len(m.keys), len(m.end0), len(m.end1), len(m.ring)) == sizes
    assert len(m.ids) == len(m.sets) <= 15 and len(m.seen) <= 6  # one entry per distinct decision and expert
    with pytest.raises(ValueError):
        _RoutingModel(order=2, gamma=0.5, horizon=4, kappa=1.0, memory=3)


def test_a_shared_pool_keys_layer_expert_pairs_and_models_each_layer():
    E = 8  # a shared pool's key is layer * E + expert
    p = Markov(2 * E, shared_experts=E)
    res = Residency(3, p)
    for t in range(30):
        for layer in (0, 1):
            chosen = [t % 3, (t + 1) % 3] if layer == 0 else [5, 6 + t % 2]
            p.routed(layer, chosen, None, res.now)
            keys = [layer * E + e for e in chosen]
            for key in keys:
                res.access(key, keys)
    assert set(p.models) == {0, 1}
    assert {divmod(k, E)[0] for k in res.slot_of} <= {0, 1} and any(k >= E for k in res.slot_of)


# ---------------------------------------------------------------------------- orbit: the layer cycle


def _shared_misses(trace: Trace, cls: type[Policy], sizes) -> dict[int, int]:
    out = replay.shared_counts(trace, cls, sizes, fast=False)
    return {c: sum(x.misses for x in out[c]) for c in sizes}


@pytest.mark.parametrize("layers,k", [(4, 1), (4, 2), (6, 3)])
def test_orbit_decides_as_beladys_min_when_every_layer_repeats_its_choice(layers, k):
    # Belady 1966 (module docstring): every layer chooses the same k experts at every token, so each
    # resident expert's next use is its layer's next step, and MIN evicts the experts of the layer
    # that ran most recently (outside the pinned step).  Once every layer has run twice, orbit's
    # estimate q is the same for every resident expert and its distance term ranks them as MIN does:
    # the same steady miss rate (its periodic pattern may run in another phase), extra misses only in
    # the first two tokens (orbit learns the routing) and fewer in the last few (MIN knows the end).
    T = 300
    trace = Trace(np.tile(np.arange(k), (T, layers, 1)), meta={"n_experts": 8})  # shared keys: every layer its own
    plan = replay.shared_plan(trace)
    token = np.repeat(plan.token, plan.sizes)
    sizes = list(range(k, layers * k + 1))
    opt = replay.layer_misses(plan, Optimal, sizes, fast=False)
    orb = replay.layer_misses(plan, Orbit, sizes, fast=False)
    lru = replay.layer_misses(plan, LRU, sizes)
    for c in sizes:
        steady = [int(np.bincount(token[m[c]], minlength=T)[2 : T - 4].sum()) for m in (opt, orb)]
        assert abs(steady[0] - steady[1]) <= k, (c, steady)  # within one step's accesses: the phase
        assert abs(int(orb[c].sum()) - int(opt[c].sum())) <= 2 * layers * k  # the warm-up's extra misses at most
    for c in sizes[1:-1]:  # k slots: every access misses whatever the rule; L * k: only cold misses
        assert orb[c].sum() < lru[c].sum()


def test_orbit_keeps_the_cyclic_order_of_single_experts_as_min_does():
    # the textbook cycle of n pages in c frames, one page per layer: MIN (and orbit) hit on c - 1 of
    # every n - 1 accesses after the start, LRU on none
    L, c, tokens = 5, 3, 200
    ex = np.arange(L)[None, :, None].repeat(tokens, 0)  # layer l always chooses expert l
    trace = Trace(ex, meta={"n_experts": L})
    opt = _shared_misses(trace, Optimal, [c])[c]
    assert opt <= _shared_misses(trace, Orbit, [c])[c] <= opt + L  # the first token's extra misses at most
    assert _shared_misses(trace, LRU, [c])[c] == L * tokens  # LRU evicts exactly the key needed next
    assert opt < L * tokens * 0.65


@settings(max_examples=60, deadline=None)
@given(trace_params, st.booleans())
def test_orbit_in_a_shared_pool_never_beats_the_optimum_and_never_evicts_a_pinned_key(params, with_probs):
    trace = _random_trace(*params, probs=with_probs)
    L, E, k = trace.n_layers, trace.n_experts, trace.top_k
    sizes = sorted({k, k + 1, L * k, L * E})
    assert all(o <= g for o, g in zip(_shared_misses(trace, Optimal, sizes).values(), _shared_misses(trace, Orbit, sizes).values()))
    plan = replay.shared_plan(trace)
    res = Residency(k + 1, replay.plan_policy(Orbit, plan))
    keys = plan.keys.tolist()
    for _, a, b, served in replay.walk(plan, res):
        pinned = set(keys[a:b])
        for _, _, evicted in served:
            assert evicted is None or evicted not in pinned


def test_orbit_victim_is_always_one_of_the_candidates():
    rng = np.random.default_rng(5)
    E, L = 6, 3
    p = Orbit(L * E, shared_experts=E)
    for key in range(L * E):
        p.inserted(key, key)
    for t in range(200):
        layer = t % L
        p.routed(layer, sorted(rng.choice(E, 2, replace=False).tolist()), None, t)
        cand = rng.choice(L * E, int(rng.integers(1, L * E)), replace=False).tolist()
        assert p.victim(cand, t) in cand


def test_orbit_with_one_pool_per_layer_learns_a_repeating_pattern_that_lru_cannot_keep():
    cycle = [[0, 1], [2, 3], [0, 4], [1, 2]]  # as the markov test: LRU evicts the expert needed next
    trace = Trace(np.array(cycle * 100).reshape(-1, 1, 2), meta={"n_experts": 5})
    lru = replay.replay_counts(trace, LRU, [3])[3][0]
    orb = replay.replay_counts(trace, Orbit, [3], fast=False)[3][0]
    opt = replay.replay_counts(trace, Optimal, [3])[3][0]
    assert opt.misses <= orb.misses < lru.misses
    assert orb.hit_rate > lru.hit_rate + 0.2


@pytest.mark.parametrize("shared", [False, True], ids=["per-layer", "shared"])
def test_orbit_made_without_n_keys_grows_and_decides_as_one_made_with_them(shared):
    # keys beyond what the policy was made for: its lists grow, and its choices do not change
    trace = _random_trace(11, 150, 3, 12, 3)
    plan = replay.shared_plan(trace) if shared else replay.layer_plans(trace)[1]
    E = plan.shared_experts
    victims = []
    for n_keys in (plan.n_keys, 0, 2):
        res = Residency(5, Orbit(n_keys, E))
        victims.append([ev for *_, served in replay.walk(plan, res) for _, _, ev in served])
    assert victims[0] == victims[1] == victims[2]
    assert any(v is not None for v in victims[0])


def test_orbit_tuning_variants_keep_the_class_and_refuse_unknown_parameters():
    v = Orbit.with_params(beta=0.1, horizon=4)
    assert issubclass(v, Orbit) and v.beta == 0.1 and v.horizon == 4 and v.gamma == Orbit.gamma
    assert policies.get("orbit") is Orbit
    with pytest.raises(TypeError):
        Orbit.with_params(order=3)


# ---------------------------------------------------------------------------- live: exact, and reproduced by replay


def _bits(a) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float32).view(np.uint32)


def _generate(model, prompt, **kw):
    with moerun.load(model, tokenizer=False, **kw) as eng:
        full = eng.logits(prompt)
        gen = eng.generate(prompt_ids=prompt, max_new=24, sampling=Sampling(temperature=0.8, top_p=0.95, seed=4), keep_logits=True)
        return full, gen.new_ids, np.stack(gen.logits), eng.stats


@pytest.fixture(scope="module")
def resident_reference(small_model):
    prompt = list(range(3, 17))
    return prompt, _generate(small_model, prompt)


@pytest.mark.parametrize("evict", ["markov", "lrfu", "orbit", "lru", "fifo", "lfu"])
@pytest.mark.parametrize("prefetch", [0, 2], ids=["no-prefetch", "prefetch-2"])
@pytest.mark.parametrize("split", ["even", "shared"])
def test_capped_run_with_a_learned_policy_equals_resident_bit_for_bit(small_model, resident_reference, evict, prefetch, split):
    prompt, ref = resident_reference
    with moerun.load(small_model, tokenizer=False) as eng:
        st_ = eng.store
        lo = minimum_cap(st_.config, st_.dense_nbytes, st_.expert_nbytes, split)
        hi = eng.budget.total
    for cap in (lo, (lo + hi) // 2):
        got = _generate(small_model, prompt, mem_cap=cap, split=split, evict=evict, prefetch=prefetch, link_speed=5e8 if prefetch else None)
        assert np.array_equal(_bits(ref[0]), _bits(got[0]))
        assert ref[1] == got[1]
        assert np.array_equal(_bits(ref[2]), _bits(got[2]))
        assert got[3]["pool"]["misses"] > 0  # the cap made the policy work
        if prefetch:
            assert got[3]["reader_alive"]


class _DocumentedMostRecent(Policy):
    """docs/design/policy-interface.md's example (``victim`` only, no ``pick``): the pool asks it on the
    general path, a list of candidates per victim.  ``asked`` counts its victims, over every object."""

    name = "test-doc-mru"
    asked = 0

    def __init__(self, n_keys=0, shared_experts=0):
        super().__init__(n_keys, shared_experts)
        self.last = [0] * n_keys

    def inserted(self, key, now):
        grow(self.last, key)
        self.last[key] = now

    def hit(self, key, now):
        self.last[key] = now

    def victim(self, candidates, now):
        type(self).asked += 1
        return max(candidates, key=self.last.__getitem__)


@pytest.mark.parametrize("split", ["even", "shared"])
def test_a_user_policy_written_to_the_documented_interface_runs_live_bit_for_bit(small_model, resident_reference, split,
                                                                              monkeypatch):
    monkeypatch.setitem(policies._REGISTRY, _DocumentedMostRecent.name, _DocumentedMostRecent)
    monkeypatch.setattr(_DocumentedMostRecent, "asked", 0)
    prompt, ref = resident_reference
    with moerun.load(small_model, tokenizer=False) as eng:
        lo = minimum_cap(eng.store.config, eng.store.dense_nbytes, eng.store.expert_nbytes, split)
    got = _generate(small_model, prompt, mem_cap=lo, split=split, evict=_DocumentedMostRecent.name)
    assert np.array_equal(_bits(ref[0]), _bits(got[0])) and ref[1] == got[1]
    assert np.array_equal(_bits(ref[2]), _bits(got[2]))
    assert got[3]["pool"]["misses"] > 0
    assert _DocumentedMostRecent.pick is Policy.pick and _DocumentedMostRecent.asked > 0  # its own victim() decided


@pytest.mark.parametrize("prompt_len", [7, 1], ids=["prompt-7", "prompt-1"])
def test_replay_of_a_live_markov_run_reproduces_its_hits_and_misses(small_model, tmp_path, prompt_len):
    slots = [2, 3, 5]
    with moerun.load(small_model, mem_cap="1GiB", slots=slots, evict="markov", tokenizer=False) as eng:
        eng.start_trace()
        prompt = np.random.default_rng(8).integers(1, eng.config.vocab_size, prompt_len).tolist()
        eng.generate(prompt_ids=prompt, max_new=48, sampling=Sampling(temperature=1.0, seed=8))
        trace = eng.finish_trace()
        pool = eng.stats["pool"]
    path = tmp_path / "live.npz"
    write_trace(path, trace)
    trace = read_trace(path)
    assert trace.probs is not None and trace.probs.shape == (*trace.experts.shape[:2], 8)
    for layer, c in enumerate(slots):
        counts = replay.replay_counts(trace, "markov", [c], fast=False)[c][layer]
        live = pool["per_layer"][layer]
        assert (counts.accesses, counts.misses) == (live["accesses"], live["misses"]), layer


def test_live_pool_and_replay_send_the_same_signals(small_model):
    # the pool calls routed() with the layer, the chosen ids and the token's router probabilities
    seen_live: list = []

    class Spy(LRU):
        name = "spy-signals"

        def routed(self, layer, chosen, probs, now):
            seen_live.append((layer, list(chosen), np.array(probs, copy=True), now))

    policies.register(Spy)
    try:
        with moerun.load(small_model, mem_cap="1GiB", slots=[3, 3, 3], evict="spy-signals", tokenizer=False) as eng:
            eng.start_trace()
            eng.generate(prompt_ids=[5, 6, 7], max_new=12, sampling=Sampling(temperature=1.0, seed=1))
            trace = eng.finish_trace()
    finally:
        policies._REGISTRY.pop("spy-signals", None)
    seen_replay: list = []

    class SpyReplay(Spy):
        def routed(self, layer, chosen, probs, now):
            seen_replay.append((layer, list(chosen), np.array(probs, copy=True), now))

    for plan in replay.layer_plans(trace):
        replay.generic_misses(plan, SpyReplay, 3)
    key = lambda s: (s[0], s[3])  # noqa: E731  (layer, clock)
    live, rep = sorted(seen_live, key=key), sorted(seen_replay, key=key)
    assert len(live) == len(rep) == 3 * (trace.n_tokens - trace.meta["prefill_tokens"])
    for a, b in zip(live, rep):
        assert (a[0], a[1], a[3]) == (b[0], b[1], b[3])
        assert np.array_equal(a[2], b[2])


def test_generate_and_replay_accept_the_new_policies_by_name(small_model, tmp_path, capsys):
    path = tmp_path / "g.npz"
    code = cli.main(["generate", "--model", str(small_model), "--prompt", "ab", "--max-new", "12", "--mem-cap", "1GiB",
                     "--slots", "3,3,3", "--evict", "markov", "--trace", str(path), "--json"])
    assert code == 0
    assert "markov" in capsys.readouterr().out
    assert cli.main(["replay", "--routing", str(path), "--evict", "lru,markov,lrfu,optimal", "--slots", "2-4", "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert {r["policy"] for r in rep["results"]} == {"lru", "markov", "lrfu", "optimal"}


# ---------------------------------------------------------------------------- the probs array of a trace


def test_trace_probs_round_trip_and_a_misshapen_array_is_refused(tmp_path):
    t = _random_trace(1, 20, 2, 5, 2)
    path = tmp_path / "p.npz"
    write_trace(path, t)
    back = read_trace(path)
    assert back.probs.dtype == np.float32 and np.array_equal(back.probs, t.probs)
    np.savez(tmp_path / "bad.npz", experts=t.experts, probs=t.probs[:, :, :3], meta=np.array(json.dumps({"n_experts": 5})))
    with pytest.raises(BadTrace, match="probs"):
        read_trace(tmp_path / "bad.npz")
    np.savez(tmp_path / "bad2.npz", experts=t.experts, probs=t.probs[:5])
    with pytest.raises(BadTrace, match="probs"):
        read_trace(tmp_path / "bad2.npz")


def test_shuffled_baseline_moves_each_tokens_probabilities_with_its_experts():
    t = _random_trace(4, 50, 2, 6, 2, prefill=3)
    s = replay.shuffled_trace(t, seed=1)
    experts_of = {p.tobytes(): e for e, p in zip(t.experts.tolist(), t.probs)}  # random floats: one row per token
    assert len(experts_of) == t.n_tokens
    assert [experts_of[p.tobytes()] for p in s.probs] == s.experts.tolist()
    assert np.array_equal(s.probs[:3], t.probs[:3])  # the prefill block stays in place


def test_builtin_policies_ignore_routing_signals():
    for cls in (LRU, LFU, FIFO):
        assert cls.routed is Policy.routed


def test_lrfu_and_orbit_keep_the_access_that_triggers_their_rescaling():
    # LRFU's combined recency-frequency value of a key is sum over its accesses t of (1/2) ** (lam * (now - t))
    # (Lee et al., "LRFU: a spectrum of policies that subsumes LRU and LFU", IEEE Trans. Computers 50(12), 2001).
    # With lam 1 the kept factor 2 ** (lam * (now - origin)) is rescaled at the 513th tick; the access made at
    # that tick weighs most of all (1 of about 2 in total) and must not be lost to the rescaling.
    from moerun.policies import LRFU, Orbit

    now = 513
    expected_log2 = math.log2(sum(0.5 ** (now - t) for t in range(now + 1)))
    lrfu = type("LRFU1", (LRFU,), {"lam": 1.0})(4)
    lrfu.inserted(0, 0)
    for t in range(1, now + 1):
        lrfu.hit(0, t)
    assert lrfu.log_crf(0, now) == pytest.approx(expected_log2, abs=1e-9)
    orbit = Orbit.with_params(lam=1.0, w=1.0)(4)
    orbit.inserted(0, 0)
    for t in range(1, now + 1):
        orbit.hit(0, t)
    # orbit keeps w * ln of the same value, times the factor 2 ** (lam * now) common to every key
    assert orbit.freq[0] == pytest.approx((expected_log2 + now) * math.log(2), abs=1e-9)
