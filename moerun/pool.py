"""The resident expert pool: preallocated slots under the cap, pinning, page-in, timings.

The pool is also the *expert source* the model asks for weights
(``moerun.model.moe``): ``routed`` does the residency bookkeeping for a
layer's chosen experts in ascending id (the same order the replay uses),
``compute_order`` lists resident experts first, ``weights`` returns an
expert's float32 matrices once its bytes are in a slot (waiting for an
in-flight prefetch, or reading synchronously), and ``done`` unpins it.

Slots are one preallocated, page-aligned block, written only by page-in.
Everything here runs on the compute thread.  With prefetch on, reads are
handed to the reader process (``moerun.reader``): the slot stays LOADING,
and so cannot be evicted or reused, until the reader publishes its result.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from . import policies, reader_child
from .budget import Budget
from .residency import NoVictim, Residency
from .sources import ExpertSource
from .store import ModelStore, wait_until

EMPTY, LOADING, READY = 0, 1, 2  # LOADING: a background read is outstanding in the reader process
HIT, PREFETCHED, MISS = 0, 1, 2
KIND_NAMES = {HIT: "hit", PREFETCHED: "prefetched", MISS: "miss"}


@dataclass
class PoolStats:
    n_layers: int
    accesses: np.ndarray = field(init=False)
    hits: np.ndarray = field(init=False)  # resident without a pending guess
    prefetch_hits: np.ndarray = field(init=False)  # resident or in flight thanks to a guess
    misses: np.ndarray = field(init=False)
    stall_ns: np.ndarray = field(init=False)
    pagein_ns: np.ndarray = field(init=False)  # synchronous page-in time on the compute thread
    bytes_in: int = 0  # all bytes paged in (demand + prefetch)
    demand_loads: int = 0
    prefill_loads: int = 0
    prefetch_guesses: int = 0  # guesses made
    prefetch_loads: int = 0  # guesses that needed a page-in
    prefetch_used: int = 0  # prefetched experts that a layer then used
    prefetch_wasted_bytes: int = 0  # prefetched bytes evicted before any use
    prefetch_failed: int = 0
    prefetch_ns: int = 0  # page-in time of guesses in the reader process
    hidden_ns: int = 0  # prefetch page-in time of used guesses not waited for

    def __post_init__(self):
        L = self.n_layers
        for name in ("accesses", "hits", "prefetch_hits", "misses", "stall_ns", "pagein_ns"):
            setattr(self, name, np.zeros(L, np.int64))

    def to_json(self) -> dict:
        acc = self.accesses.sum()
        return {
            "accesses": int(acc),
            "hits": int(self.hits.sum()),
            "prefetch_hits": int(self.prefetch_hits.sum()),
            "misses": int(self.misses.sum()),
            "hit_rate": float((acc - self.misses.sum()) / acc) if acc else None,
            "per_layer": [
                {
                    "layer": i,
                    "accesses": int(self.accesses[i]),
                    "hits": int(self.hits[i]),
                    "prefetch_hits": int(self.prefetch_hits[i]),
                    "misses": int(self.misses[i]),
                    "hit_rate": float(1 - self.misses[i] / self.accesses[i]) if self.accesses[i] else None,
                }
                for i in range(self.n_layers)
            ],
            "stall_ns": int(self.stall_ns.sum()),
            "pagein_ns": int(self.pagein_ns.sum()),
            "bytes_paged_in": int(self.bytes_in),
            "demand_loads": self.demand_loads,
            "prefill_loads": self.prefill_loads,
            "prefetch": {
                "guesses": self.prefetch_guesses,
                "loads": self.prefetch_loads,
                "used": self.prefetch_used,
                "accuracy": (self.prefetch_used / self.prefetch_loads) if self.prefetch_loads else None,
                "wasted_bytes": self.prefetch_wasted_bytes,
                "failed": self.prefetch_failed,
                "pagein_ns": self.prefetch_ns,
                "hidden_ns": self.hidden_ns,
            },
        }


class ExpertPool(ExpertSource):
    """Slots, residency per layer (or shared), and the expert-source interface for the model.

    The prefetch-point hooks (``after_attention``, ``after_layer``) come from ``ExpertSource``.
    Everything here runs on the compute thread; with prefetch on, background reads
    go to the reader process (``moerun.reader``) and come back through shared memory.
    """

    def __init__(self, store: ModelStore, budget: Budget, evict: str = "lru", block: np.ndarray | None = None):
        self.store = store
        self.budget = budget
        self.config = store.config
        L = self.config.n_layers
        self.shared = budget.split == "shared"
        n_slots = budget.n_slots
        self.slot_size = budget.slot
        if block is None:
            raw = np.empty(n_slots * self.slot_size + 4096, np.uint8)
            off = (-raw.ctypes.data) % 4096
            block = raw[off : off + n_slots * self.slot_size]
            self._raw = raw
        self.block = block
        self.block.fill(0)  # allocated once and touched now, so the cap is real from the start
        self.slots = [self.block[i * self.slot_size : (i + 1) * self.slot_size] for i in range(n_slots)]
        self.bound = [store.codec.bind(s) for s in self.slots]
        self.state = [EMPTY] * n_slots
        self.key_of: list = [None] * n_slots
        self.prefetched = [False] * n_slots  # loaded by a guess and not used yet
        self.by_guess = [False] * n_slots  # the slot's current background read was asked for by a guess
        self.load_ns = [0] * n_slots
        # when a background read's (emulated) transfer is done; a layer may use the slot from then on
        self.usable_at = [0] * n_slots
        self.load_t0 = [0] * n_slots  # when the slot's current read started
        self.gen = [0] * n_slots  # bumped by every new read, so a result for an earlier read is never taken
        policy_cls = policies.get(evict)
        if not getattr(policy_cls, "online", True):
            from .errors import BadOption

            raise BadOption(f"policy {evict!r} needs the future of the trace; use it with 'moerun replay' only")
        self.evict = evict
        if self.shared:
            self.res = [Residency(n_slots, policy_cls())] * 1
        else:
            self.res = []
            start = 0
            for n in budget.slots:
                self.res.append(Residency(n, policy_cls(), list(range(start, start + n))))
                start += n
        self.pinned: set = set()
        self.stats = PoolStats(L)
        self.step = -1  # decode step (token index), -1 in prefill
        self.progress = -1  # step * n_layers + layer of the layer being computed
        self.recorder = None
        self.prefetcher = None
        self.reader = None  # set by the engine with prefetch on: every page-in then goes through it
        self._prefill = False
        self._layer_events: dict = {}
        self.guess_hook = None  # set by the engine: callable(layer, h) at the prefetch point
        self._resident_events = None  # set by preload_all when every expert is resident

    # ------------------------------------------------------------------ keys
    def key(self, layer: int, expert: int):
        return (layer, expert) if self.shared else expert

    def residency(self, layer: int) -> Residency:
        return self.res[0] if self.shared else self.res[layer]

    def _busy(self, layer: int) -> set:
        """Keys of this layer's slots (or the shared pool's) with a background read outstanding."""
        busy = set()
        for s in self._slot_range(layer):
            if self.state[s] == LOADING:
                self._settle(s)
                if self.state[s] == LOADING:
                    busy.add(self.key(*self.key_of[s]))
        return busy

    def _slot_range(self, layer: int):
        r = self.residency(layer)
        return list(r.slot_of.values())

    def _reading(self) -> bool:
        return self.reader is not None and self.reader.alive

    # ------------------------------------------------------------------ loading
    def preload_all(self) -> None:
        """Fill every slot in layer, expert order (the fully resident configuration).

        When every expert fits, decode takes a fast path with no residency bookkeeping
        (an access can only hit); a policy is still told nothing it could act on.
        """
        for layer in range(self.config.n_layers):
            for e in range(self.config.n_experts):
                r = self.residency(layer)
                if len(r.slot_of) >= r.capacity:
                    break
                slot, _ = r.insert(self.key(layer, e))
                self._load_into(slot, layer, e)
                self.key_of[slot] = (layer, e)
                self.state[slot] = READY
        L, E = self.config.n_layers, self.config.n_experts
        if all(len(self.residency(layer).slot_of) == (E if not self.shared else L * E) for layer in range(L)):
            self._resident_events = [
                {e: [HIT, self.residency(layer).slot_of[self.key(layer, e)], 0, 0] for e in range(E)} for layer in range(L)
            ]

    def _load_into(self, slot: int, layer: int, expert: int) -> int:
        ns = self.store.page_in(layer, expert, self.slots[slot])
        self.stats.bytes_in += self.store.expert_nbytes
        return ns

    def _claim(self, slot: int) -> int:
        """Mark a slot LOADING for a new read; returns its new generation."""
        self.gen[slot] += 1
        self.state[slot] = LOADING
        self.usable_at[slot] = 0
        self.load_t0[slot] = time.monotonic_ns()
        return self.gen[slot]

    def _submit(self, slot: int, layer: int, expert: int, demand: bool, target: int) -> bool:
        """Hand a read to the reader process; False (slot left as it was) if the fault hook refused it."""
        hook = self.store.fault_hook
        if hook is not None:
            try:
                hook(layer, expert)  # runs before every expert read, as in ModelStore.page_in
            except Exception:
                return False
        gen = self._claim(slot)
        self.by_guess[slot] = not demand
        self.reader.submit(slot, gen, layer, expert, demand, target)
        return True

    def _settle(self, slot: int, wait: bool = False) -> None:
        """Take in the result of a LOADING slot's background read, if it is there (or once it is, with ``wait``)."""
        if self.state[slot] != LOADING or self.reader is None:
            return
        got = self.reader.wait(slot, self.gen[slot]) if wait else self.reader.poll(slot, self.gen[slot])
        if got is None:
            if self.reader.alive:
                return
            got = (reader_child.FAILED, 0, 0, 0)  # the reader died with this read outstanding
        result, usable_at, start, ns = got
        layer, expert = self.key_of[slot]
        st = self.stats
        if result == reader_child.OK:
            self.state[slot] = READY
            self.usable_at[slot] = usable_at
            self.load_t0[slot] = start
            self.load_ns[slot] = ns
            st.bytes_in += self.store.expert_nbytes
            if self.by_guess[slot]:
                st.prefetch_ns += ns
            else:
                st.pagein_ns[layer] += ns
                st.demand_loads += 1
            return
        if result == reader_child.FAILED and self.by_guess[slot]:
            st.prefetch_failed += 1
        if self.prefetched[slot]:  # a guess no layer has claimed: forget it
            self.prefetched[slot] = False
            self.residency(layer).remove(self.key(layer, expert))
            self.key_of[slot] = None
        self.state[slot] = EMPTY  # a layer that claimed it reads it itself

    def _evicted(self, slot: int) -> None:
        """Bookkeeping when a READY slot's key is evicted."""
        self.gen[slot] += 1
        if self.prefetched[slot]:
            self.stats.prefetch_wasted_bytes += self.store.expert_nbytes
            self.prefetched[slot] = False
        self.state[slot] = EMPTY
        self.key_of[slot] = None

    def _access(self, layer: int, expert: int, pinned_keys) -> tuple[int, int]:
        """Residency bookkeeping for one access; returns (kind, slot)."""
        r = self.residency(layer)
        key = self.key(layer, expert)
        while True:
            try:
                busy = () if key in r else self._busy(layer)  # only a miss looks for a victim
                hit, slot, victim = r.access(key, pinned_keys, busy)
                break
            except NoVictim:  # a background read is outstanding in every free slot; one will finish
                time.sleep(0)
        if hit:
            kind = PREFETCHED if self.prefetched[slot] else HIT
            if kind == PREFETCHED:
                self.prefetched[slot] = False
                self.stats.prefetch_used += 1
                if self.state[slot] == LOADING:
                    self._settle(slot)
                if self.state[slot] == LOADING:
                    self.reader.promote(slot, self.gen[slot])
                elif self.state[slot] == READY and self.usable_at[slot] <= time.monotonic_ns():  # read entirely behind compute
                    self.stats.hidden_ns += max(0, self.usable_at[slot] - self.load_t0[slot])
        else:
            if victim is not None:
                self._evicted(slot)
            self.key_of[slot] = (layer, expert)
            self.state[slot] = EMPTY  # to be read by weights() (or by the reader, handed over below)
            kind = MISS
        return kind, slot

    # ------------------------------------------------------------------ expert source
    def begin_step(self, step: int) -> None:
        self.step = step
        self._prefill = step < 0

    def routed(self, layer: int, chosen: np.ndarray, weights: np.ndarray, probs: np.ndarray) -> None:
        if self.recorder is not None:
            self.recorder.routed(self.step, layer, chosen, weights, probs)
        if chosen.shape[0] != 1 or self._prefill:  # prefill accesses happen per expert in weights()
            return
        if self._resident_events is not None and self.recorder is None:
            # every expert is resident and nothing is ever evicted: every access is a hit
            k = chosen.shape[1]
            self.stats.accesses[layer] += k
            self.stats.hits[layer] += k
            self._layer_events = self._resident_events[layer]
            return
        ids = chosen[0].tolist()
        keys = [self.key(layer, e) for e in ids]
        st = self.stats
        self.progress = self.step * self.config.n_layers + layer
        reading = self._reading()
        self.pinned = set(keys)
        r = self.residency(layer)
        r.policy.routed(layer, ids, probs[0], r.now)  # optional per-step signal (Policy.routed); a no-op by default
        events = {}
        for e in ids:
            kind, slot = self._access(layer, e, self.pinned)
            events[e] = [kind, slot, 0, 0]  # kind, slot, pagein ns, stall ns
            st.accesses[layer] += 1
            if kind == MISS:
                st.misses[layer] += 1
            elif kind == PREFETCHED:
                st.prefetch_hits[layer] += 1
            else:
                st.hits[layer] += 1
        if reading:
            # after the accesses, which promoted the guesses this layer uses: the others are stale now
            self.reader.set_progress(self.progress)
            # the reader fetches the misses while the layer computes the experts it has
            for e in ids:
                kind, slot = events[e][0], events[e][1]
                if kind == MISS:
                    self._submit(slot, layer, e, True, self.progress)
        self._layer_events = events

    def compute_order(self, layer: int, ids: list[int]) -> list[int]:
        """Resident experts first, then those in flight or still to read (outputs are summed in id order anyway)."""
        if self._prefill:
            return range(len(ids))
        ev = self._layer_events
        now = time.monotonic_ns()
        ready = []
        for j, e in enumerate(ids):
            s = ev[e][1]
            if self.state[s] == LOADING:
                self._settle(s)
            if self.state[s] == READY and self.usable_at[s] <= now:
                ready.append(j)
        if len(ready) == len(ids):
            return range(len(ids))
        return ready + [j for j in range(len(ids)) if j not in ready]

    def weights(self, layer: int, expert: int):
        if self._prefill or expert not in self._layer_events:
            return self._prefill_weights(layer, expert)
        ev = self._layer_events[expert]
        slot = ev[1]
        if self.state[slot] == READY and self.usable_at[slot] <= time.monotonic_ns():
            return self.store.codec.weights(self.bound[slot])
        t0 = time.monotonic_ns()
        self._settle(slot, wait=True)
        if self.state[slot] == EMPTY:  # never handed over, or the background read failed: read it here
            ev[2] = self._demand_read(slot, layer, expert)
        else:  # READY: a background read whose (emulated) transfer may still be running
            wait_until(self.usable_at[slot])
            done = max(self.usable_at[slot], self.load_t0[slot])
            if ev[0] == MISS:  # the reader read it while this layer computed other experts
                ev[2] = done - self.load_t0[slot]
            else:  # a guess: the part of its read not waited for was hidden behind compute
                self.stats.hidden_ns += max(0, done - self.load_t0[slot] - (time.monotonic_ns() - t0))
        stall = time.monotonic_ns() - t0
        ev[3] = stall
        self.stats.stall_ns[layer] += stall
        return self.store.codec.weights(self.bound[slot])

    def _demand_read(self, slot: int, layer: int, expert: int) -> int:
        """Read an EMPTY claimed slot now: through the reader when it runs (one link for all reads), else here."""
        if self._reading() and self._submit(slot, layer, expert, True, self.progress):
            self._settle(slot, wait=True)
            if self.state[slot] == READY:
                wait_until(self.usable_at[slot])
                return self.load_ns[slot]
        return self._demand_load(slot, layer, expert)  # the reader failed or is gone: read it on this thread

    def _demand_load(self, slot: int, layer: int, expert: int) -> int:
        self._claim(slot)
        try:
            ns = self._load_into(slot, layer, expert)
        except BaseException:
            self.residency(layer).remove(self.key(layer, expert))
            self.state[slot] = EMPTY
            self.key_of[slot] = None
            raise
        self.state[slot] = READY
        self.load_ns[slot] = ns
        self.stats.pagein_ns[layer] += ns
        self.stats.demand_loads += 1
        return ns

    def _prefill_weights(self, layer: int, expert: int):
        """Prefill: each needed expert is accessed (and paged in) once per layer, pinned alone."""
        key = self.key(layer, expert)
        self.progress = max(self.progress, -1)
        self.pinned = {key}
        r = self.residency(layer)
        while True:
            try:
                hit, slot, victim = r.access(key, self.pinned, () if key in r else self._busy(layer))
                break
            except NoVictim:
                time.sleep(0)
        t0 = time.monotonic_ns()
        if hit:
            self.prefetched[slot] = False
            if self.state[slot] == LOADING:
                self.reader.promote(slot, self.gen[slot])
            self._settle(slot, wait=True)
            need = self.state[slot] != READY
        else:
            if victim is not None:
                self._evicted(slot)
            self.key_of[slot] = (layer, expert)
            self.state[slot] = EMPTY
            need = True
        if need:
            self._demand_read(slot, layer, expert)
            self.stats.prefill_loads += 1
            self.stats.demand_loads -= 1
        else:
            wait_until(self.usable_at[slot])  # a background read whose emulated transfer is still running
        self.stats.stall_ns[layer] += time.monotonic_ns() - t0
        return self.store.codec.weights(self.bound[slot])

    def done(self, layer: int, expert: int) -> None:
        if self._prefill:
            self.pinned = set()

    def begin_layer(self, layer: int) -> None:
        self._layer_t0 = time.monotonic_ns()

    def end_layer(self, layer: int) -> None:
        if self.recorder is not None and not self._prefill:
            stall = sum(ev[3] for ev in self._layer_events.values())
            compute = time.monotonic_ns() - self._layer_t0 - stall
            self.recorder.events(self.step, layer, self._layer_events, compute)
        self.pinned = set()

    # ------------------------------------------------------------------ prefetch
    def prefetch(self, layer: int, expert: int, target: int, hook=None, protect=frozenset()) -> None:
        """Start a guess's background read unless it is resident or unplaceable (compute thread).

        It never evicts an expert pinned by the layer being computed (shared
        pool), a slot being read, or another guess of the same round (``protect``).
        """
        key = self.key(layer, expert)
        r = self.residency(layer)
        if key in r or not self._reading():
            return
        keep = (protect | self.pinned) if self.shared else protect
        try:
            slot, victim = r.insert(key, keep, self._busy(layer))
        except NoVictim:
            return
        if victim is not None:
            self._evicted(slot)
        self.key_of[slot] = (layer, expert)
        self.prefetched[slot] = True
        self.stats.prefetch_loads += 1
        ok = True
        if hook is not None:
            try:
                hook(layer, expert)
            except Exception:
                ok = False
        if not ok or not self._submit(slot, layer, expert, False, target):
            self.stats.prefetch_failed += 1  # forget the guess; its layer reads the expert if it needs it
            self.prefetched[slot] = False
            r.remove(key)
            self.key_of[slot] = None
            self.state[slot] = EMPTY
