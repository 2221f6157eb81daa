"""The resident expert pool: preallocated slots under the cap, pinning, page-in, timings.

The pool is the *expert source* the model asks for weights (``moerun.sources.ExpertSource``):
``routed`` does the residency bookkeeping for a layer's chosen experts in
ascending id (the same order the replay uses), ``compute_order`` lists
resident experts first, and ``weights`` returns an expert's float32 matrices
once its bytes are in a slot (waiting for an in-flight read, or reading
synchronously).

Slots are one preallocated, page-aligned block, written only by page-in; each
has one ``Slot`` record.  Everything here runs on the compute thread.  With
prefetch on, reads are handed to the reader process (``moerun.reader``): the
slot stays LOADING, and so cannot be evicted or reused, until the reader
publishes its result.  ``prefetch`` places a guess: it is read only if it can
arrive about when its layer needs it and the policy would rather hold it than
the expert it evicts (``Policy.admits``).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from . import policies, reader_child
from .budget import Budget
from .clock import wait_until
from .errors import BadOption
from .residency import NoVictim, Residency
from .sources import ExpertSource, aligned_block
from .store import ModelStore

EMPTY, LOADING, READY = 0, 1, 2  # LOADING: a background read is outstanding in the reader process
HIT, PREFETCHED, MISS = 0, 1, 2
DEMAND, GUESS, PREFILL = 0, 1, 2  # why a slot is being read
KIND_NAMES = {HIT: "hit", PREFETCHED: "prefetched", MISS: "miss"}


@dataclass(eq=False, slots=True)
class Slot:
    """One expert-sized buffer of the pool and what it holds."""

    index: int
    buf: np.ndarray
    bound: object  # the codec's views of buf
    state: int = EMPTY
    layer: int = -1  # the expert it holds or is being read into (-1: none)
    expert: int = -1
    gen: int = 0  # bumped by every new read, so a result for an earlier read is never taken
    guess: bool = False  # loaded by a guess that no layer has used yet
    why: int = 0  # who asked for its current read: DEMAND, GUESS or PREFILL
    usable_at: int = 0  # when its (emulated) transfer is done; a layer may use it from then on
    start_ns: int = 0  # when its current read started
    read_ns: int = 0


@dataclass
class PoolStats:
    n_layers: int
    accesses: list = field(init=False)
    hits: list = field(init=False)  # resident without a pending guess
    prefetch_hits: list = field(init=False)  # resident or in flight thanks to a guess
    misses: list = field(init=False)
    stall_ns: list = field(init=False)
    pagein_ns: list = field(init=False)  # synchronous page-in time of demand reads
    bytes_in: int = 0  # all bytes paged in (demand + prefetch)
    demand_loads: int = 0
    prefill_loads: int = 0
    prefetch_guesses: int = 0  # guesses made
    prefetch_resident: int = 0  # guesses already resident or in flight: nothing to do
    prefetch_declined: int = 0  # guesses not read: too late to arrive in time, or the policy kept its victim
    prefetch_loads: int = 0  # guesses that needed a page-in
    prefetch_used: int = 0  # prefetched experts that a layer then used
    prefetch_wasted_bytes: int = 0  # prefetched bytes evicted before any use
    prefetch_failed: int = 0
    prefetch_ns: int = 0  # page-in time of guesses in the reader process
    hidden_ns: int = 0  # prefetch page-in time of used guesses not waited for
    reader_stalled: bool = False

    def __post_init__(self):
        for name in ("accesses", "hits", "prefetch_hits", "misses", "stall_ns", "pagein_ns"):
            setattr(self, name, [0] * self.n_layers)

    def to_json(self) -> dict:
        acc = sum(self.accesses)
        misses = sum(self.misses)
        return {
            "accesses": acc,
            "hits": sum(self.hits),
            "prefetch_hits": sum(self.prefetch_hits),
            "misses": misses,
            "hit_rate": (acc - misses) / acc if acc else None,
            "per_layer": [
                {
                    "layer": i,
                    "accesses": self.accesses[i],
                    "hits": self.hits[i],
                    "prefetch_hits": self.prefetch_hits[i],
                    "misses": self.misses[i],
                    "hit_rate": 1 - self.misses[i] / self.accesses[i] if self.accesses[i] else None,
                }
                for i in range(self.n_layers)
            ],
            "stall_ns": sum(self.stall_ns),
            "pagein_ns": sum(self.pagein_ns),
            "bytes_paged_in": self.bytes_in,
            "demand_loads": self.demand_loads,
            "prefill_loads": self.prefill_loads,
            "prefetch": {
                "guesses": self.prefetch_guesses,
                "already_resident": self.prefetch_resident,
                "declined": self.prefetch_declined,
                "loads": self.prefetch_loads,
                "used": self.prefetch_used,
                "accuracy": (self.prefetch_used / self.prefetch_loads) if self.prefetch_loads else None,
                "wasted_bytes": self.prefetch_wasted_bytes,
                "failed": self.prefetch_failed,
                "pagein_ns": self.prefetch_ns,
                "hidden_ns": self.hidden_ns,
                "reader_stalled": self.reader_stalled,
            },
        }


class LinkForecast:
    """The compute thread's forecast of the link: when it frees, and how long a read takes.

    It is told of every read handed to the reader and of every result, and of the time between a
    layer's prefetch point and the next layer's routing, so that a guess can be judged by when it
    would arrive against when its layer will need it.  Figures are running averages (1/8 weight).
    """

    __slots__ = ("read_ns", "free_at", "gap_ns", "mark")

    def __init__(self, read_ns: float):
        self.read_ns = read_ns  # one expert's read, as the reader reports it
        self.free_at = 0  # when the reads handed over so far should be done
        self.gap_ns = 0.0  # prefetch point of layer l to the routing of layer l + 1
        self.mark = 0  # time of the last prefetch point

    def queued(self, now: int) -> int:
        """A read handed over now: returns when it should end."""
        self.free_at = max(self.free_at, now) + int(self.read_ns)
        return self.free_at

    def observed(self, read_ns: int) -> None:
        self.read_ns += (read_ns - self.read_ns) / 8

    def layer_started(self, now: int) -> None:
        if self.mark:
            self.gap_ns += (now - self.mark - self.gap_ns) / 8
            self.mark = 0


class ExpertPool(ExpertSource):
    """Slots, residency per layer (or shared), and the expert-source interface for the model.

    Everything here runs on the compute thread; with a reader (prefetch on), every read goes
    to the reader process (``moerun.reader``) and comes back through shared memory.
    """

    # A guess is read only if it should arrive no later than this share of one read after its
    # layer starts routing (chosen by measurement: docs/offload.md, "Admission").
    late_share = 0.5

    def __init__(self, store: ModelStore, budget: Budget, evict: str = "lru", reader=None):
        super().__init__(store)
        self.budget = budget
        self.config = c = store.config
        L, E = c.n_layers, c.n_experts
        self.shared = budget.split == "shared"
        n_slots = budget.n_slots
        self.slot_size = budget.slot
        if reader is not None:
            block = reader.block
        else:
            block, self._raw = aligned_block(n_slots * self.slot_size)
        block.fill(0)  # allocated once and touched now, so the cap is real from the start
        bufs = [block[i * self.slot_size : (i + 1) * self.slot_size] for i in range(n_slots)]
        self.slots = [Slot(i, b, store.codec.bind(b)) for i, b in enumerate(bufs)]
        policy_cls = policies.get(evict)
        if not getattr(policy_cls, "online", True):
            raise BadOption(f"policy {evict!r} needs the future of the trace; use it with 'moerun replay' only")
        self.evict = evict
        if self.shared:
            r = Residency(n_slots, policies.make_policy(policy_cls, L * E, E))
            self.res_of = [r] * L
            self.base = [layer * E for layer in range(L)]  # key of (layer, expert): base[layer] + expert
        else:
            self.res_of = []
            start = 0
            for n in budget.slots:
                self.res_of.append(Residency(n, policies.make_policy(policy_cls, E), list(range(start, start + n))))
                start += n
            self.base = [0] * L
        self.signals = type(self.res_of[0].policy).routed is not policies.Policy.routed
        self.pinned: tuple = ()
        self.stats = PoolStats(L)
        self.progress = -1  # step * n_layers + layer of the layer being computed
        self.reader = reader  # every page-in goes through it while it is alive
        rate = store.link_rate
        self.link = LinkForecast(store.expert_nbytes / rate * 1e9 if rate else 100_000.0)
        self._prefill = False
        self._events: dict = {}
        self._all_resident = None  # set by preload_all when every expert is resident

    # ------------------------------------------------------------------ keys
    def key(self, layer: int, expert: int) -> int:
        return self.base[layer] + expert

    def residency(self, layer: int) -> Residency:
        return self.res_of[layer]

    def _reading(self) -> bool:
        return self.reader is not None and self.reader.alive

    def resident(self, layer: int, expert: int) -> bool:
        """Is the expert resident or on its way (no read needed)?"""
        return self.base[layer] + expert in self.res_of[layer].slot_of

    # ------------------------------------------------------------------ loading
    def preload_all(self) -> None:
        """Fill every slot in layer, expert order (the fully resident configuration).

        When every expert fits, decode takes a fast path with no residency bookkeeping
        (an access can only hit); a policy is still told nothing it could act on.
        """
        c = self.config
        for layer in range(c.n_layers):
            r = self.res_of[layer]
            for e in range(c.n_experts):
                if len(r.slot_of) >= r.capacity:
                    break
                slot, _ = r.insert(self.key(layer, e))
                s = self.slots[slot]
                self._load_into(s, layer, e)
                s.layer, s.expert, s.state = layer, e, READY
        self.stats.bytes_in = 0
        E = c.n_experts
        if all(all(self.resident(layer, e) for e in range(E)) for layer in range(c.n_layers)):
            self._all_resident = [
                {e: [HIT, self.res_of[layer].slot_of[self.key(layer, e)], 0, 0] for e in range(E)} for layer in range(c.n_layers)
            ]

    def _load_into(self, s: Slot, layer: int, expert: int) -> int:
        ns = self.store.page_in(layer, expert, s.buf)
        self.stats.bytes_in += self.store.expert_nbytes
        return ns

    def _claim(self, s: Slot) -> int:
        """Mark a slot LOADING for a new read; returns its new generation."""
        s.gen += 1
        s.state = LOADING
        s.usable_at = 0
        s.start_ns = time.monotonic_ns()
        return s.gen

    def _submit(self, s: Slot, why: int, target: int) -> bool:
        """Hand a read to the reader process; False (slot left as it was) if the fault hook refused it."""
        hook = self.store.fault_hook
        if hook is not None:
            try:
                hook(s.layer, s.expert)  # runs before every expert read, as in ModelStore.page_in
            except Exception:
                return False
        gen = self._claim(s)
        s.why = why
        self.res_of[s.layer].busy.add(self.key(s.layer, s.expert))
        self.reader.submit(s.index, gen, s.layer, s.expert, why != GUESS, target)
        self.link.queued(s.start_ns)
        return True

    def _settle(self, s: Slot, wait: bool = False) -> None:
        """Take in the result of a LOADING slot's background read, if it is there (or once it is, with ``wait``)."""
        if s.state != LOADING or self.reader is None:
            return
        rd = self.reader
        got = rd.wait(s.index, s.gen) if wait else rd.poll(s.index, s.gen)
        if got is None:
            if rd.alive:
                return
            got = (reader_child.FAILED, 0, 0, 0)  # the reader died with this read outstanding
        if rd.stalled:
            self.stats.reader_stalled = True
        result, usable_at, start, ns = got
        layer, expert = s.layer, s.expert
        r = self.res_of[layer]
        r.busy.discard(self.key(layer, expert))
        st = self.stats
        if result == reader_child.OK:
            s.state = READY
            s.usable_at = usable_at
            s.start_ns = start
            s.read_ns = ns
            self.link.observed(ns)
            st.bytes_in += self.store.expert_nbytes
            if s.why == GUESS:
                st.prefetch_ns += ns
            else:
                st.pagein_ns[layer] += ns
                if s.why == PREFILL:
                    st.prefill_loads += 1
                else:
                    st.demand_loads += 1
            return
        if result == reader_child.FAILED and s.why == GUESS:
            st.prefetch_failed += 1
        if s.guess:  # a guess no layer has claimed: forget it
            s.guess = False
            r.remove(self.key(layer, expert))
            s.layer = s.expert = -1
        s.state = EMPTY  # a layer that claimed it reads it itself

    def _settle_busy(self, r: Residency) -> None:
        for key in list(r.busy):
            self._settle(self.slots[r.slot_of[key]])

    def _evicted(self, s: Slot) -> None:
        """Bookkeeping when a READY slot's expert is evicted."""
        s.gen += 1
        if s.guess:
            self.stats.prefetch_wasted_bytes += self.store.expert_nbytes
            s.guess = False
        s.state = EMPTY
        s.layer = s.expert = -1

    def _access(self, r: Residency, key: int, pinned) -> tuple[bool, int]:
        """``Residency.access``, waiting while every evictable slot has a read outstanding."""
        while True:
            try:
                hit, slot, victim = r.access(key, pinned)
                break
            except NoVictim:  # a background read is outstanding in every free slot; one will finish
                self._settle_busy(r)
                if r.busy and not r.candidates(pinned):
                    self.reader.wait_any()
        if victim is not None:
            self._evicted(self.slots[slot])
        return hit, slot

    # ------------------------------------------------------------------ expert source
    def begin_step(self, step: int) -> None:
        self.step = step
        self._prefill = step < 0

    def routed(self, layer: int, chosen: np.ndarray, weights: np.ndarray, probs: np.ndarray) -> None:
        if self.recorder is not None:
            self.recorder.routed(self.step, layer, chosen, weights, probs)
        if chosen.shape[0] != 1 or self._prefill:  # prefill accesses happen per expert in weights()
            return
        st = self.stats
        if self._all_resident is not None and self.recorder is None:
            # every expert is resident and nothing is ever evicted: every access is a hit
            k = chosen.shape[1]
            st.accesses[layer] += k
            st.hits[layer] += k
            self._events = self._all_resident[layer]
            return
        ids = chosen[0].tolist()
        base = self.base[layer]
        r = self.res_of[layer]
        now = time.monotonic_ns()
        self.link.layer_started(now)
        self.progress = self.step * self.config.n_layers + layer
        pinned = self.pinned = tuple(base + e for e in ids)
        if self.signals:
            r.policy.routed(layer, ids, probs[0], r.now)  # optional per-step signal (Policy.routed)
        slots = self.slots
        events = {}
        misses = []
        for e, key in zip(ids, pinned):
            hit, slot = self._access(r, key, pinned)
            s = slots[slot]
            if not hit:
                s.layer, s.expert, s.state = layer, e, EMPTY  # to be read by weights() or by the reader, below
                events[e] = [MISS, slot, 0, 0]  # kind, slot, pagein ns, stall ns
                misses.append(s)
                continue
            if s.guess:
                s.guess = False
                st.prefetch_used += 1
                st.prefetch_hits[layer] += 1
                events[e] = [PREFETCHED, slot, 0, 0]
                if s.state == LOADING:
                    self._settle(s)
                if s.state == LOADING:
                    self.reader.promote(s.index, s.gen)
                elif s.state == READY and s.usable_at <= now:  # read entirely behind compute
                    st.hidden_ns += max(0, s.usable_at - s.start_ns)
            else:
                st.hits[layer] += 1
                events[e] = [HIT, slot, 0, 0]
        st.accesses[layer] += len(ids)
        st.misses[layer] += len(misses)
        if self._reading():
            # after the accesses, which promoted the guesses this layer uses: the others are stale now
            self.reader.set_progress(self.progress)
            for s in misses:  # the reader fetches them while the layer computes the experts it has
                self._submit(s, DEMAND, self.progress)
        self._events = events

    def compute_order(self, layer: int, ids: list[int]):
        """Resident experts first, then those in flight or still to read (outputs are summed in id order anyway)."""
        if self._prefill:
            return range(len(ids))
        ev = self._events
        now = time.monotonic_ns()
        ready = []
        slots = self.slots
        for j, e in enumerate(ids):
            s = slots[ev[e][1]]
            if s.state == LOADING:
                self._settle(s)
            if s.state == READY and s.usable_at <= now:
                ready.append(j)
        if len(ready) == len(ids):
            return range(len(ids))
        return ready + [j for j in range(len(ids)) if j not in ready]

    def weights(self, layer: int, expert: int):
        ev = self._events.get(expert)
        if self._prefill or ev is None:
            return self._prefill_weights(layer, expert)
        s = self.slots[ev[1]]
        if s.state == READY and s.usable_at <= time.monotonic_ns():
            return self.codec.weights(s.bound)
        t0 = time.monotonic_ns()
        self._settle(s, wait=True)
        if s.state == EMPTY:  # never handed over, or the background read failed: read it here
            ev[2] = self._read(s, layer, expert, DEMAND)
        else:  # READY: a background read whose (emulated) transfer may still be running
            wait_until(s.usable_at)
            done = max(s.usable_at, s.start_ns)
            if ev[0] == MISS:  # the reader read it while this layer computed other experts
                ev[2] = done - s.start_ns
            else:  # a guess: the part of its read not waited for was hidden behind compute
                self.stats.hidden_ns += max(0, done - s.start_ns - (time.monotonic_ns() - t0))
        stall = time.monotonic_ns() - t0
        ev[3] = stall
        self.stats.stall_ns[layer] += stall
        return self.codec.weights(s.bound)

    def _read(self, s: Slot, layer: int, expert: int, why: int) -> int:
        """Read an EMPTY claimed slot now and wait for it: through the reader while it runs (one link
        for every read of the run), else on this thread.  Returns the read's ns."""
        if self._reading() and self._submit(s, why, self.progress):
            self._settle(s, wait=True)
            if s.state == READY:
                wait_until(s.usable_at)
                return s.read_ns
        return self._load_here(s, layer, expert, why)  # the reader failed or is gone: read it on this thread

    def _load_here(self, s: Slot, layer: int, expert: int, why: int) -> int:
        self._claim(s)
        try:
            ns = self._load_into(s, layer, expert)
        except BaseException:
            self.res_of[layer].remove(self.key(layer, expert))
            s.state = EMPTY
            s.layer = s.expert = -1
            raise
        s.state = READY
        s.read_ns = ns
        self.stats.pagein_ns[layer] += ns
        if why == PREFILL:
            self.stats.prefill_loads += 1
        else:
            self.stats.demand_loads += 1
        return ns

    def _prefill_weights(self, layer: int, expert: int):
        """Prefill: each needed expert is accessed (and paged in) once per layer, pinned alone."""
        key = self.key(layer, expert)
        self.progress = max(self.progress, -1)
        pinned = self.pinned = (key,)
        r = self.res_of[layer]
        t0 = time.monotonic_ns()
        hit, slot = self._access(r, key, pinned)
        s = self.slots[slot]
        if hit:
            s.guess = False
            if s.state == LOADING:
                self.reader.promote(s.index, s.gen)
            self._settle(s, wait=True)
            wait_until(s.usable_at)  # a background read whose emulated transfer is still running
        else:
            s.layer, s.expert, s.state = layer, expert, EMPTY
        if s.state != READY:
            self._read(s, layer, expert, PREFILL)
        self.stats.stall_ns[layer] += time.monotonic_ns() - t0
        return self.codec.weights(s.bound)

    def begin_layer(self, layer: int) -> None:
        if self.recorder is not None:
            self._layer_t0 = time.monotonic_ns()

    def end_layer(self, layer: int) -> None:
        if self.recorder is not None and not self._prefill:
            stall = sum(ev[3] for ev in self._events.values())
            compute = time.monotonic_ns() - self._layer_t0 - stall
            self.recorder.events(self.step, layer, self._events, compute)
        self.pinned = ()

    # ------------------------------------------------------------------ prefetch
    @staticmethod
    def _hook_allows(hook, layer: int, expert: int) -> bool:
        if hook is None:
            return True
        try:
            hook(layer, expert)
        except Exception:
            return False
        return True

    def prefetch(self, layer: int, guesses: list[int], target: int, hook=None) -> None:
        """Place the guesses for ``layer`` (best first) and hand their reads to the reader (compute thread).

        A guess already resident or in flight costs nothing more.  Another is read only if it can
        arrive about when its layer needs it (``late_share``) and the policy would rather hold it
        than its victim (``Policy.admits``).  It never evicts an expert pinned by the layer being
        computed (shared pool), a slot being read, or another guess of the same round.
        ``hook(layer, expert)`` (a test hook) runs before a read is handed over; raising fails it.
        """
        st = self.stats
        st.prefetch_guesses += len(guesses)
        if not self._reading():
            return
        r = self.res_of[layer]
        base = self.base[layer]
        keep = tuple(base + e for e in guesses)
        if self.shared:
            keep += self.pinned
        now = time.monotonic_ns()
        link = self.link
        link.mark = now
        need_at = now + link.gap_ns * (target - self.progress) + link.read_ns * self.late_share
        for e in guesses:
            key = base + e
            if key in r.slot_of:
                st.prefetch_resident += 1
                continue
            if max(link.free_at, now) + link.read_ns > need_at:
                st.prefetch_declined += 1
                continue
            try:
                victim = r.victim(keep)
            except NoVictim:
                st.prefetch_declined += 1
                continue
            if victim is not None and not r.policy.admits(key, victim, r.now):
                st.prefetch_declined += 1
                continue
            slot, victim = r.place(key, victim)
            s = self.slots[slot]
            if victim is not None:
                self._evicted(s)
            s.layer, s.expert, s.guess = layer, e, True
            st.prefetch_loads += 1
            if not self._hook_allows(hook, layer, e) or not self._submit(s, GUESS, target):
                st.prefetch_failed += 1  # forget the guess; its layer reads the expert if it needs it
                s.guess = False
                r.remove(key)
                s.layer = s.expert = -1
                s.state = EMPTY
