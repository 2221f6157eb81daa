"""Whether a guess is worth reading: the economics the live pool and the planner share.

A guess costs the compute thread something whether or not it is used (placing it, handing it
over, the reader's copy competing with compute, and a copy of its own when the reader is late).
It saves its layer the read time it would otherwise wait for, if the layer uses it.  ``Timing``
keeps the running figures the judgement needs, measured as the run goes (or, in the planner,
simulated); ``guess_pays`` and ``worth_guessing`` are the judgement itself.
"""

from __future__ import annotations

import time

from moerun.runtime.residency import NoVictim
from moerun.runtime.slots import LOADING, PENDING, Slot


class Timing:
    """Running averages (1/8 or 1/16 weight) the pool judges guesses by: one read's time, one copy's
    time, the time from a layer's prefetch point to the next layer's routing, the share of read
    guesses a layer then used (``precision``), and the share of used guesses the compute thread had
    to copy itself because the reader had not (``late``)."""

    __slots__ = ("read_ns", "copy_ns", "gap_ns", "mark", "outstanding", "every_ns", "last_point", "precision", "late")

    def __init__(self, read_ns: float):
        self.read_ns = read_ns
        self.copy_ns = 50_000.0  # a copy from the page cache, before any is measured
        self.gap_ns = 0.0
        self.mark = 0  # time of the last prefetch point
        self.outstanding = 0  # guess reads handed to the reader and not settled
        self.every_ns = 0.0  # time from one prefetch point to the next
        self.last_point = 0
        self.precision = 0.6  # before any outcome is seen: about the router's first guess on the bundled model
        self.late = 0.5

    def need_at(self, now: float, layers_ahead: int) -> float:
        """When a layer ``layers_ahead`` from the current one will route; before any gap is measured, never
        (a first guess is taken to arrive in time)."""
        return now + self.gap_ns * layers_ahead if self.gap_ns else float("inf")

    def outcome(self, used: bool) -> None:
        self.precision += ((1.0 if used else 0.0) - self.precision) / 16

    def copied_here(self, late: bool) -> None:
        self.late += ((1.0 if late else 0.0) - self.late) / 16

    def point(self, now: int) -> int:
        """A prefetch point now: returns when the next one is expected."""
        if self.last_point and now - self.last_point < 50_000_000:
            self.every_ns += (now - self.last_point - self.every_ns) / 8
        self.last_point = now
        return now + int(self.every_ns)

    def copied(self, ns: int) -> None:
        self.copy_ns += (ns - self.copy_ns) / 8

    def observed(self, read_ns: int) -> None:
        self.read_ns += (read_ns - self.read_ns) / 8

    def layer_started(self, now: int) -> None:
        if self.mark:
            self.gap_ns += (now - self.mark - self.gap_ns) / 8
            self.mark = 0


def guess_pays(timing: Timing, read_ns: float, arrival_ns: float, need_ns: float, place_ns: float) -> bool:
    """Does reading a guess that would arrive at ``arrival_ns``, for a layer that needs it at ``need_ns``,
    pay?  The read time it would save if used (all of one read if it arrives in time, less its lateness
    if not), times the share of read guesses used so far, against what it costs the compute thread:
    ``place_ns`` and a copy of its own as often as the reader has been late."""
    late = max(0.0, arrival_ns - need_ns)
    return timing.precision * max(0.0, read_ns - late) > place_ns + timing.late * timing.copy_ns


def worth_guessing(timing: Timing, read_ns: float, place_ns: float) -> bool:
    """Could any guess pay, even one that arrives in time?  If not, the prefetch point is skipped."""
    return timing.precision * read_ns > place_ns + timing.late * timing.copy_ns


class GuessPlacement:
    """The part of ``moerun.runtime.pool.ExpertPool`` that places guesses: which are read, where, and what becomes
    of those their layer did not choose.  It works on the pool's own state (a mixin of the pool)."""

    def _meet_guesses(self, layer: int, ids: list[int], now: int) -> None:
        """The layer has routed: guesses for it that it did not choose are dropped (their link time and
        slots given back) unless their transfer has begun; those it chose are used."""
        link = self.link
        for s in self._guessed[layer]:
            if s.layer != layer or not s.guess or s.expert in ids:
                continue
            if link is not None:
                if s.transfer is not None and not link.drop(s.transfer, now):
                    continue  # its transfer had begun: it arrives and stays resident, unused so far
            elif s.state != LOADING:
                continue  # already read: keep it
            self.stats.prefetch_dropped += 1
            if s.state == LOADING or s.owed:  # the reader may still write it: given back once it answers
                if s.state == LOADING:
                    self.reader.cancel(s.index, s.gen)
                s.dropped = True
            else:  # never (officially) arrived: its bytes, copied or not, are not to be used
                self._give_back(s)
        self._guessed[layer] = []
        if self._pending:
            self._pending = [s for s in self._pending if s.state in (PENDING, LOADING) and s.guess]

    @staticmethod
    def _hook_allows(hook, layer: int, expert: int) -> bool:
        if hook is None:
            return True
        try:
            hook(layer, expert)
        except Exception:
            return False
        return True

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

    def prefetch(self, layer: int, guesses: list[int], target: int, hook=None) -> None:
        """Place the guesses for ``layer`` (best first) and hand their reads to the reader (compute thread).

        A guess already resident or in flight costs nothing more.  Another is read only if it pays:
        the read time it would save its layer if used (all of it if it arrives by the time the layer
        routes, less the lateness if not), times the share of guesses used so far, must exceed what
        it costs the compute thread (placing it, and a copy of its own as often as the reader has
        been late); and the policy must rather hold it than its victim (``Policy.admits``).  It never
        evicts an expert pinned by the layer being computed (shared pool), a slot being read, or
        another guess of the same round.
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
        timing = self.timing
        timing.mark = now
        need_at = timing.need_at(now, target - self.progress)
        read = self._read_ns()
        link, nbytes = self.link, self.store.expert_nbytes
        for e in guesses:
            key = base + e
            if key in r.slot_of:
                st.prefetch_resident += 1
                continue
            if not guess_pays(timing, read, self._arrival(now), need_at, self.place_ns):
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
            s.layer, s.expert, s.guess, s.res = layer, e, True, r
            st.prefetch_loads += 1
            if not self._hook_allows(hook, layer, e) or not self._hand_over(s):
                st.prefetch_failed += 1  # forget the guess; its layer reads the expert if it needs it
                s.guess = False
                r.remove(key)
                s.layer = s.expert = -1
                s.res = None
                continue
            if link is not None:
                s.transfer = link.book(nbytes, now, False)
            self._guessed[layer].append(s)

    def _hand_over(self, s: Slot) -> bool:
        """Give a guess's read to the reader (with an emulated link and no live reader, mark it PENDING
        for the compute thread to copy); False (slot left as it was) if the fault hook refused it."""
        s.gen += 1
        if self.link is not None:
            self._pending.append(s)  # the compute thread may take it over while it waits anyway
            if not (self.reader is not None and self.reader.alive):  # the copy runs the fault hook
                s.state = PENDING
                return True
        hook = self.store.fault_hook
        if hook is not None:
            try:
                hook(s.layer, s.expert)  # runs before every expert read, as in ModelStore.copy_in
            except Exception:
                return False
        s.state = LOADING
        s.res.busy.add(self.key(s.layer, s.expert))
        self.timing.outstanding += 1
        self.reader.submit(s.index, s.gen, s.layer, s.expert)
        return True
