"""The resident expert pool: preallocated slots under the cap, pinning, page-in, timings.

The pool is the *expert source* the model asks for weights (``moerun.runtime.sources.ExpertSource``):
``routed`` does the residency bookkeeping for a layer's chosen experts in
ascending id (the same order the replay uses), ``compute_order`` lists
resident experts first, and ``weights`` returns an expert's float32 matrices
once its bytes are in a slot.

Slots are one preallocated, page-aligned block, written only by page-in; each
has one ``Slot`` record whose state changes only through its transitions
(``moerun.runtime.slots``).  Everything here runs on the compute thread.  What
is decided (hits, misses, victims, which guesses are read and where, which are
dropped) is the decision core's (``moerun.runtime.decisions``, shared with
replay and the planner); the pool executes it with buffers, the reader and the
emulated link, which it owns (``ExpertSource.link``).

- A layer's own misses are read on the compute thread when the layer needs
  them (it would wait for them anyway).  With an emulated link they are booked
  on the link (``moerun.runtime.link``) as soon as the layer has routed, so they travel
  while the layer computes the experts it has.
- With prefetch on, ``prefetch`` places guesses.  A guess is read only if it
  can arrive about when its layer needs it and the policy would rather hold it
  than the expert it evicts (``Policy.admits``).  A guess whose layer starts
  without it is dropped: its link time is given back, and its slot.
- Who moves a guess's bytes: the reader process (``moerun.runtime.reader``), in the
  background; the slot stays LOADING, and so cannot be evicted or reused, until
  the reader publishes its result.  With an emulated link the transfer's time
  is kept by the link, so the reader only has to have copied the bytes by the
  time the layer needs them.  If it has not, the compute thread copies them
  itself rather than wait (the reader is told to skip them); it also does so
  for guesses still waiting when it has to wait for a transfer anyway.  Without
  a live reader the compute thread copies every guess (PENDING until then).
"""

from __future__ import annotations

import time

import numpy as np

from moerun import policies
from moerun.errors import BadOption
from moerun.files.store import ModelStore
from moerun.runtime import _reader_child as reader_child
from moerun.runtime.budget import Budget
from moerun.runtime.clock import wait_until
from moerun.runtime.decisions import RESIDENT, Placed, make_decisions
from moerun.runtime.guesses import Timing, guess_pays, worth_guessing
from moerun.runtime.residency import NoVictim, Residency
from moerun.runtime.slots import EMPTY, HIT, LOADING, MISS, PENDING, PREFETCHED, READY, Event, PoolStats, Slot
from moerun.runtime.sources import ExpertSource, aligned_block


def rd_poll_none(reader, s: Slot) -> bool:
    """Has the reader not answered the slot's request yet?"""
    return reader is None or reader.poll(s.index, s.gen) is None


class ExpertPool(ExpertSource):
    """Slots, residency per layer (or shared), and the expert-source interface for the model.

    Everything here runs on the compute thread; with a reader (prefetch on), guesses are read by
    the reader process (``moerun.runtime.reader``) and come back through shared memory.
    """

    # What one guess read costs the compute thread, beyond a copy of its own: placing it, handing
    # it over, and the reader's copy competing with compute for the machine.  Measured on the
    # bundled model on a 2-vCPU VM as the extra compute time per token with prefetch on, divided by
    # the guesses read: 60-120 us (docs/design/prefetch.md, "Which guesses are read").
    place_ns = 60_000

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
            self.core = make_decisions(lambda _: policies.make_policy(policy_cls, L * E, E), [n_slots], L, E, True)
        else:
            self.core = make_decisions(lambda _: policies.make_policy(policy_cls, E), budget.slots, L, E, False)
        self.res_of = self.core.res_of
        self.base = self.core.base  # key of (layer, expert): base[layer] + expert
        self.stats = PoolStats(L)
        self.progress = -1  # step * n_layers + layer of the layer being computed
        self.reader = reader  # guesses are read by it while it is alive (real reads only)
        # self.link (ExpertSource): the emulated link, owned here, or None
        self.timing = Timing(self.link.ns(store.expert_nbytes) if self.link is not None else 100_000.0)
        self._owed: list[Slot] = []  # slots read here while the reader still held them
        # A codec that rewrites a slot after its read (an open checkpoint's experts widened to float32 in place)
        # cannot let the reader's late copy of the same stored bytes land on the widened ones: such a slot is
        # never read here while the reader holds it (``_take_over`` waits for the reader instead).
        self._exclusive = getattr(store.codec, "rewrites_slot", False)
        self._pending: list[Slot] = []  # guesses booked on the emulated link, bytes not copied yet
        self._prefill = False
        self._ready = False
        self._events: dict = {}
        self._all_resident = None  # set by preload_all when every expert is resident
        self.account = None  # with --prefetch auto: what each layer's guesses saved and cost (moerun.runtime.guesses)

    # ------------------------------------------------------------------ keys
    def key(self, layer: int, expert: int) -> int:
        return self.base[layer] + expert

    @property
    def pinned(self) -> tuple:
        """Keys of the layer being computed (the decision core's)."""
        return self.core.pinned

    def residency(self, layer: int) -> Residency:
        return self.res_of[layer]

    def _reading(self) -> bool:
        """Can guesses be read: over the emulated link (copied here), or by a live reader process."""
        return self.link is not None or (self.reader is not None and self.reader.alive)

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
                s.claim(layer, e, r)
                ns = self.store.copy_in(layer, e, s.buf)
                s.fill(time.monotonic_ns(), ns)
        E = c.n_experts
        if all(all(self.resident(layer, e) for e in range(E)) for layer in range(c.n_layers)):
            self._all_resident = [
                {e: Event(HIT, self.res_of[layer].slot_of[self.key(layer, e)]) for e in range(E)} for layer in range(c.n_layers)
            ]

    def warm(self, ranked) -> int:
        """A warm start: the decision core fills the empty pool from ``ranked`` (``decisions.hottest`` of a
        profile; ``Decisions.warm`` decides which experts, in which order, into which slots), and each is read
        here, on the compute thread, before the first step.  With an emulated link every read is booked on it
        and the fill ends when the last transfer has.  Its time is ``stats.warm_ns`` (the engine charges it to
        the first pass, see ``Engine.warm_start``); its bytes are ``warm_loads`` experts, apart from the
        demand and guess reads of ``bytes_in``.  Returns the experts read."""
        if self._all_resident is not None:
            return 0  # every expert is resident already
        t0 = time.monotonic_ns()
        link, nbytes = self.link, self.store.expert_nbytes
        last = None
        filled = self.core.warm(ranked)
        for layer, e, slot in filled:
            s = self.slots[slot]
            s.claim(layer, e, self.res_of[layer])
            if link is not None:
                last = link.book(nbytes, time.monotonic_ns(), True)
            try:
                ns = self.store.copy_in(layer, e, s.buf)
            except BaseException:
                self.core.forget(layer, self.key(layer, e))
                s.clear()
                raise
            s.fill(time.monotonic_ns(), ns)
        if last is not None:
            now = time.monotonic_ns()
            end = max(link.ends(last, now), now)
            wait_until(end)
            link.run(end)
        self.stats.warm_loads += len(filled)
        self.stats.warm_ns += time.monotonic_ns() - t0
        return len(filled)

    def _usable_at(self, s: Slot, now: int) -> int:
        """When a READY slot's bytes may be used: the end of its emulated transfer, or when they arrived."""
        t = s.transfer
        if t is None:
            return s.ready_at
        return t.end if t.end >= 0 else self.link.ends(t, now)

    def _settle(self, s: Slot, wait: bool = False) -> None:
        """Take in the result of a LOADING (or owed) slot's background read, if it is there (or once it
        is, with ``wait``)."""
        if s.state != LOADING and not s.owed:
            return
        rd = self.reader
        got = rd.wait(s.index, s.gen) if wait else rd.poll(s.index, s.gen)
        if got is None:
            if rd.alive:
                return
            got = (reader_child.FAILED, 0, 0)  # the reader died with this read outstanding
        if rd.stalled:
            self.stats.reader_stalled = True
        result, start, ns = got
        self.timing.outstanding -= 1
        key = self.key(s.layer, s.expert)
        r = s.res
        r.busy.discard(key)
        if s.owed:  # read here already; the reader has let go of it now
            s.owed = False
            if s.dropped:  # and its layer went without it meanwhile
                self._unclaimed(s, key)
            return
        st = self.stats
        if s.dropped and (result != reader_child.OK or s.transfer is not None):
            s.let_go()
            self._unclaimed(s, key)  # dropped while the reader held it: its bytes never (emulated: officially) arrived
            return
        s.dropped = False
        if result == reader_child.OK:
            self.store.finish_read(s.buf)
            s.arrive(start + ns, ns)
            self.timing.observed(ns)
            st.bytes_in += self.store.expert_nbytes
            st.prefetch_ns += ns
            return
        s.let_go()  # the reader has let go of it, without its bytes
        if result == reader_child.FAILED:
            st.prefetch_failed += 1
        if s.guess:  # a guess no layer has claimed: forget it
            self._unclaimed(s, key)
            return
        self._claimed_empty(s)  # a layer that claimed it reads it itself

    def _unclaimed(self, s: Slot, key: int) -> None:
        """A guess whose bytes did not arrive: give its slot back, unless the layer being computed has
        just chosen it (its access may be served but not yet seen by ``routed``): then it stays, empty,
        for the layer to read."""
        if key in self.pinned:
            self._claimed_empty(s)
        else:
            self._give_back(s)

    def _claimed_empty(self, s: Slot) -> None:
        """The slot stays with its expert, empty: the layer that wants it reads it (as a miss would)."""
        s.empty()
        if s.transfer is not None:
            self.link.drop(s.transfer, time.monotonic_ns())
            s.transfer = None

    def _give_back(self, s: Slot, read: bool | None = None) -> None:
        """Forget a guess's slot: it becomes free (never while the reader may still write it).  A guess
        counts as wasted bytes if it was ``read`` (by default: unless it is still PENDING)."""
        assert s.state != LOADING and not s.owed, "a slot the reader may still write is never given back"
        if s.guess:
            self.timing.outcome(False)
            if read if read is not None else s.state != PENDING:
                self.stats.prefetch_wasted_bytes += self.store.expert_nbytes
                self.stats.prefetch_wasted += 1
        self.core.forget(s.layer, self.key(s.layer, s.expert))
        s.clear()

    def _settle_owed(self) -> None:
        for s in self._owed:
            self._settle(s)
        self._owed = [s for s in self._owed if s.owed]

    def _settle_busy(self, r: Residency) -> None:
        for key in list(r.busy):
            self._settle(self.slots[r.slot_of[key]])

    def _evicted(self, s: Slot) -> None:
        """Bookkeeping when a READY (or PENDING) slot's expert is evicted; the caller then claims the slot
        for its new expert (``Slot.claim``)."""
        if s.guess:
            self.stats.prefetch_wasted_bytes += self.store.expert_nbytes
            self.stats.prefetch_wasted += 1
            self.timing.outcome(False)
        if s.transfer is not None and s.transfer.end < 0:
            self.link.drop(s.transfer, time.monotonic_ns())

    def _serve(self, layer: int, r: Residency, keys: tuple, done: list) -> list:
        """The rest of the decision core's accesses for a decode layer (``done`` served so far), waiting
        while every evictable slot has a read outstanding."""
        while True:
            self._wait_for_room(r, keys)
            try:
                return self.core.serve(layer, done)
            except NoVictim as e:
                done = e.done

    def _prefill_access(self, layer: int, expert: int) -> tuple[bool, int]:
        """The decision core's prefill access, waiting while every evictable slot has a read outstanding."""
        while True:
            try:
                hit, slot, victim = self.core.prefill(layer, expert)
                break
            except NoVictim:  # a background read is outstanding in every free slot; one will finish
                self._wait_for_room(self.res_of[layer], self.core.pinned)
        if victim is not None:
            self._evicted(self.slots[slot])
        return hit, slot

    def _wait_for_room(self, r: Residency, pinned) -> None:
        since = self.reader.published()  # before looking: a result published after this wakes the wait
        self._settle_busy(r)
        if r.busy and not r.candidates(pinned):
            self.reader.wait_any(since)

    # ------------------------------------------------------------------ expert source
    def begin_step(self, step: int) -> None:
        self.step = step
        self._prefill = step < 0

    def begin_layer(self, layer: int) -> None:
        if self.recorder is not None:
            self._layer_t0 = time.monotonic_ns()

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
        ids = chosen.tolist()[0]  # one call, no view of the row
        r = self.res_of[layer]
        core = self.core
        now = time.monotonic_ns()
        self.progress = self.step * self.config.n_layers + layer
        if self._owed:
            self._settle_owed()
        if core.guessed[layer]:
            self._meet_guesses(layer, ids, now)
        if self.timing.mark:  # a prefetch point was passed since the last layer started
            self.timing.layer_started(now)
        slots, link = self.slots, self.link
        events = {}
        misses = prefetched = 0
        ready = True  # every chosen expert usable now: compute_order has nothing to sort
        try:  # pins them, the optional per-step signal (Policy.routed), the accesses
            served = core.step(layer, ids, probs[0] if core.signals else None)
        except NoVictim as e:  # a background read is outstanding in every free slot; one will finish
            served = self._serve(layer, r, core.pinned, e.done)
        for e, (hit, slot, victim) in zip(ids, served):
            s = slots[slot]
            if not hit:
                if self.account is not None and self.account.victims:  # a guess evicted it lately?
                    self.account.missed(layer * self.config.n_experts + e, self.step, self._read_ns())
                if victim is not None and (s.guess or s.transfer is not None):
                    self._evicted(s)  # its bookkeeping (a plain resident needs none)
                s.claim(layer, e, r)  # read by weights() when the layer needs it (claim clears its transfer)
                if link is not None:  # on its way from now, with an emulated link
                    s.transfer = link.book(self.store.expert_nbytes, now, True)
                ev = events[e] = s.event
                ev.kind = MISS
                ev.pagein_ns = ev.stall_ns = 0
                misses += 1
                ready = False
            elif s.guess:
                s.guess = False
                self.timing.outcome(True)
                prefetched += 1
                st.prefetch_used += 1
                st.prefetch_hits[layer] += 1
                ev = events[e] = s.event
                ev.kind = PREFETCHED
                ev.pagein_ns = ev.stall_ns = 0
                ready = False
                if s.dropped:  # cancelled a moment ago, the reader still holding it: ask for it again
                    s.dropped = False
                    if link is not None:
                        s.transfer = link.book(self.store.expert_nbytes, now, True)
                elif s.transfer is not None and s.transfer.end < 0:
                    link.promote(s.transfer, now)
                if s.state == LOADING:
                    self.reader.promote(s.index, s.gen)
            else:
                ev = events[e] = s.event
                ev.kind = HIT
                ev.pagein_ns = ev.stall_ns = 0
                if s.state != READY or s.transfer is not None:
                    ready = False
        st.accesses[layer] += len(ids)
        st.misses[layer] += misses
        st.hits[layer] += len(ids) - misses - prefetched
        self._events = events
        self._ready = ready

    def compute_order(self, layer: int, ids: list[int]):
        """Resident experts first, then those in flight or still to read (outputs are summed in id order anyway)."""
        if self._prefill or self._ready:
            return range(len(ids))
        ev = self._events
        now = time.monotonic_ns()
        ready = []
        rest = []
        slots = self.slots
        for j, e in enumerate(ids):
            s = slots[ev[e].slot]
            if s.state == LOADING:
                self._settle(s)
            if s.state == READY:
                t = s.transfer  # _usable_at, inline
                if (s.ready_at if t is None else t.end if t.end >= 0 else self.link.ends(t, now)) <= now:
                    ready.append(j)
                    continue
            rest.append(j)
        if not rest:
            return range(len(ids))
        return ready + rest

    def weights(self, layer: int, expert: int):
        ev = self._events.get(expert)
        if self._prefill or ev is None:
            return self._prefill_weights(layer, expert)
        s = self.slots[ev.slot]
        kind = ev.kind
        if kind == PREFETCHED:  # did the reader copy it in time, or is it the compute thread's to copy?
            self.timing.copied_here(s.state == PENDING or (s.state == LOADING and rd_poll_none(self.reader, s)))
        if s.state == READY and s.transfer is None:
            if kind == PREFETCHED:
                self._hidden(s, time.monotonic_ns())
                if self.account is not None:
                    self._credit(layer, expert, 0)  # a whole read saved
            return self.codec.weights(s.bound)
        t0 = time.monotonic_ns()
        if s.state == READY and self._usable_at(s, t0) <= t0:
            if kind == PREFETCHED:
                self._hidden(s, t0)
                if self.account is not None:
                    self._credit(layer, expert, 0)
            s.transfer = None  # arrived: later uses need not ask the link
            return self.codec.weights(s.bound)
        if s.state == LOADING or s.state == PENDING:
            self._bring_in(s)
        if s.state == EMPTY:  # a miss, or a guess whose read failed: read it here
            ev.pagein_ns = self._read_here(s, False)
        else:
            self._wait(self._usable_at(s, time.monotonic_ns()))  # the rest of its emulated transfer
            if kind == PREFETCHED:
                self._hidden(s, t0)
        stall = time.monotonic_ns() - t0
        if kind == PREFETCHED and self.account is not None:
            self._credit(layer, expert, stall)
        ev.stall_ns = stall
        self.stats.stall_ns[layer] += stall
        s.transfer = None  # arrived: later uses need not ask the link
        return self.codec.weights(s.bound)

    def _credit(self, layer: int, expert: int, stall: int) -> None:
        """A used guess's account entry: the read it saved its layer, less the wait for it (negative: it made the
        wait longer)."""
        self.account.used(layer, self._read_ns() - stall, layer * self.config.n_experts + expert)

    def _hidden(self, s: Slot, asked: int) -> None:
        """A used guess: the part of its transfer (or read) done before its layer asked for it was hidden."""
        t = s.transfer
        if t is not None:
            self.link.run(asked)
            start, end = t.start, self._usable_at(s, asked)
        else:
            start, end = s.ready_at - s.read_ns, s.ready_at
        if start >= 0:
            self.stats.hidden_ns += max(0, min(end, asked) - start)

    def _copy(self, s: Slot) -> bool:
        """Copy a PENDING guess's bytes (its emulated transfer is kept by the link).  A guess is advisory:
        if the read fails, the slot is left EMPTY for a layer that claimed it to read itself (where a
        lasting fault raises), or given back if none did; False then."""
        try:
            ns = self.store.copy_in(s.layer, s.expert, s.buf, True)
        except Exception:
            self.stats.prefetch_failed += 1
            if s.transfer is not None:
                self.link.drop(s.transfer, time.monotonic_ns())
                s.transfer = None
            if s.guess:
                self._give_back(s, read=True)  # counted as a read guess is
            else:
                s.empty()
            return False
        self.timing.copied(ns)
        s.fill(time.monotonic_ns(), ns)
        self.stats.bytes_in += self.store.expert_nbytes
        self.stats.prefetch_ns += ns
        self.stats.prefetch_copied_here += 1
        return True

    def _wait(self, deadline: int) -> None:
        """Wait for an emulated transfer's end, copying waiting guesses meanwhile while there is time."""
        if self._pending:
            margin = self.timing.copy_ns
            pending = self._pending
            while pending and time.monotonic_ns() + margin < deadline:
                self._bring_in(pending.pop(0), needed=False)
        wait_until(deadline)

    def _bring_in(self, s: Slot, needed: bool = True) -> None:
        """The one settle / take-over / copy sequence: a LOADING slot takes the reader's result if it is
        there, else is read here (``_take_over``); a PENDING guess is copied here (``_copy``).  A slot
        brought in while waiting for another (not ``needed`` yet) is never waited for."""
        if s.state == LOADING:
            self._settle(s)
            if s.state == LOADING and (needed or not self._exclusive):  # the reader has not got to it
                self._take_over(s)
        elif s.state == PENDING:
            self._copy(s)

    def _take_over(self, s: Slot) -> None:
        """Read a LOADING guess on this thread: the reader is told to skip it, and the slot stays out of
        reach of eviction until the reader answers (it may be copying the same bytes meanwhile, which
        is harmless: they are the same bytes).  A slot its codec rewrites after a read is not read here:
        the reader is asked to read it next and waited for (its copy would land on the rewritten bytes);
        if it skips or fails the read, the slot is left EMPTY for its layer to read."""
        if self._exclusive:
            self.reader.promote(s.index, s.gen)
            self._settle(s, wait=True)
            return
        self.reader.cancel(s.index, s.gen)
        self.store.copy_in(s.layer, s.expert, s.buf)
        self.stats.prefetch_copied_here += 1
        s.take_over(time.monotonic_ns())
        self.stats.bytes_in += self.store.expert_nbytes
        self._owed.append(s)

    def _read_here(self, s: Slot, prefill: bool) -> int:
        """Read an EMPTY claimed slot on this thread and wait out its emulated transfer; returns the page-in ns."""
        st = self.stats
        link = self.link
        if link is not None and s.transfer is None:
            s.transfer = link.book(self.store.expert_nbytes, time.monotonic_ns(), True)
        s.gen += 1
        try:
            ns = self.store.copy_in(s.layer, s.expert, s.buf)
        except BaseException:
            self.core.forget(s.layer, self.key(s.layer, s.expert))
            s.clear()
            raise
        now = time.monotonic_ns()
        s.fill(now, ns)
        st.bytes_in += self.store.expert_nbytes
        t = s.transfer
        if t is not None:
            end = max(link.ends(t, now), now)
            link.hold(t, now)  # a read slower than the link ends when the read did
            self._wait(end)
            link.run(end)
            ns = end - t.start
        s.read_ns = ns
        if t is None:  # a real read: what a guess's read will take too
            self.timing.observed(ns)
        st.pagein_ns[s.layer] += ns
        if prefill:
            st.prefill_loads += 1
        else:
            st.demand_loads += 1
        return ns

    def _prefill_weights(self, layer: int, expert: int):
        """Prefill: each needed expert is accessed (and paged in) once per layer, pinned alone."""
        self.progress = max(self.progress, -1)
        r = self.res_of[layer]
        t0 = time.monotonic_ns()
        hit, slot = self._prefill_access(layer, expert)
        s = self.slots[slot]
        if hit:
            s.guess = s.dropped = False
            if s.transfer is not None and s.transfer.end < 0:
                self.link.promote(s.transfer, t0)
            self._bring_in(s)
        else:
            s.claim(layer, expert, r)
            s.transfer = None
        if s.state == READY:
            self._wait(self._usable_at(s, time.monotonic_ns()))  # the rest of an emulated transfer
        else:
            self._read_here(s, True)
        self.stats.stall_ns[layer] += time.monotonic_ns() - t0
        return self.codec.weights(s.bound)

    def end_layer(self, layer: int) -> None:
        if self.recorder is not None and not self._prefill:
            stall = sum(ev.stall_ns for ev in self._events.values())
            compute = time.monotonic_ns() - self._layer_t0 - stall
            self.recorder.events(self.step, layer, self._events, compute)
        self.core.pinned = ()  # Decisions.done(), inline: the decode path


    # ------------------------------------------------------------------ guesses (the decision core places them)
    def _meet_guesses(self, layer: int, ids: list[int], now: int) -> None:
        """The layer has routed: the decision core offers its unchosen guesses for dropping; each is dropped
        (its link time and slot given back) unless its transfer has begun, or (no link) it was read."""
        link, slots, r = self.link, self.slots, self.res_of[layer]

        def drop(key: int) -> bool:
            s = slots[r.slot_of[key]]
            if link is not None:
                if s.transfer is not None and not link.drop(s.transfer, now):
                    return False  # its transfer had begun: it arrives and stays resident, unused so far
            elif s.state != LOADING:
                return False  # already read: keep it
            self.stats.prefetch_dropped += 1
            if s.state == LOADING or s.owed:  # the reader may still write it: given back once it answers
                if s.state == LOADING:
                    self.reader.cancel(s.index, s.gen)
                s.dropped = True
            else:  # never (officially) arrived: its bytes, copied or not, are not to be used
                self._give_back(s)
            return True

        self.core.meet(layer, ids, drop)
        if self._pending:
            self._pending = [s for s in self._pending if s.state in (PENDING, LOADING) and s.guess]

    def _arrival(self, now: int) -> int:
        """When a guess handed over now should arrive."""
        if self.link is not None:
            return self.link.backlog_until(now) + self.link.ns(self.store.expert_nbytes)
        return now + (self.timing.outstanding + 1) * self.timing.read_ns

    def worth_guessing(self) -> bool:
        """Could any guess pay at all?  Not when even one arriving in time would save less than it costs
        (``prefetch``'s rule with no lateness): then the prefetch point is skipped, guess rule included."""
        return self._all_resident is None and worth_guessing(self.timing, self._read_ns(), self.place_ns)

    def _read_ns(self) -> float:
        """One expert read: over the emulated link, or as the reader's reads have taken."""
        return self.timing.read_ns if self.link is None else self.link.ns(self.store.expert_nbytes)

    def prefetch_point(self) -> None:
        """The model reached a prefetch point (its guesses are placed next): a lingering reader is told
        when to expect the next one."""
        nxt = self.timing.point(time.monotonic_ns())
        if self.reader is not None:
            self.reader.expect(nxt)

    def prefetch(self, layer: int, guesses: list[int], target: int) -> None:
        """Place the guesses for ``layer`` (best first) and hand their reads to the reader (compute thread).

        The decision core (``Decisions.place``) decides which are read and where: a guess already
        resident or in flight costs nothing more; another is read only if it pays (its expected saving,
        the read time it would save its layer if used times the share of guesses used so far, must
        exceed what it costs the compute thread: placing it, and a copy of its own as often as the
        reader has been late; ``moerun.runtime.guesses``), and the policy must rather hold it than its
        victim (``Policy.admits``).  It never evicts an expert pinned by the layer being computed
        (shared pool), a slot being read, or another guess of the same round.  Here each placed guess
        is handed over; one the fault seam refuses is forgotten.
        """
        st = self.stats
        st.prefetch_guesses += len(guesses)
        if not self._reading():
            return
        now = time.monotonic_ns()
        timing = self.timing
        timing.mark = now
        need_at = timing.need_at(now, target - self.progress)
        read = self._read_ns()
        link, nbytes, slots, r = self.link, self.store.expert_nbytes, self.slots, self.res_of[layer]
        account, E = self.account, self.config.n_experts

        def pays() -> bool:
            return guess_pays(timing, read, self._arrival(now), need_at, self.place_ns)

        for out in self.core.place(layer, guesses, pays):
            if type(out) is not Placed:
                if out.why is RESIDENT:
                    st.prefetch_resident += 1
                else:
                    st.prefetch_declined += 1
                continue
            s = slots[out.slot]
            if account is not None:  # charged its placing; a plain resident it evicted is watched for a miss
                off = layer * E - self.base[layer]  # to keys unique across layers, in either pool kind
                victim = None if out.victim is None or out.wasted else out.victim + off
                account.read(layer, self.place_ns, victim, self.step, out.key + off)
            if out.victim is not None:
                self._evicted(s)
            s.claim(layer, out.key - self.base[layer], r)
            s.guess = True
            st.prefetch_loads += 1
            if not self._hand_over(s):
                st.prefetch_failed += 1  # forget the guess; its layer reads the expert if it needs it
                self.core.forget(layer, out.key)
                s.clear()
                continue
            if link is not None:
                s.transfer = link.book(nbytes, now, False)

    def _hand_over(self, s: Slot) -> bool:
        """Give a guess's read to the reader (with an emulated link and no live reader, mark it PENDING
        for the compute thread to copy); False (slot left as it was) if the fault seam refused it."""
        s.gen += 1
        if self.link is not None and not (self.reader is not None and self.reader.alive):
            self._pending.append(s)
            s.book()  # the copy meets the fault seam
            return True
        try:
            self.store.fault(s.layer, s.expert, True)  # the reader's read meets the seam here, when handed over
        except Exception:
            return False
        if self.link is not None:
            self._pending.append(s)  # the compute thread may take it over while it waits anyway
        s.hand_over()
        s.res.busy.add(self.key(s.layer, s.expert))
        self.timing.outstanding += 1
        self.reader.submit(s.index, s.gen, s.layer, s.expert)
        return True
