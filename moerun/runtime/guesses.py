"""Whether a guess is worth reading: the one judgement the decision core asks, in the live pool and the planner.

A guess costs the compute thread something whether or not it is used (placing it, handing it
over, the reader's copy competing with compute, and a copy of its own when the reader is late).
It saves its layer the read time it would otherwise wait for, if the layer uses it.  ``Timing``
keeps the running figures the judgement needs, measured as the run goes (or, in the planner,
simulated); ``guess_pays`` and ``worth_guessing`` are the judgement itself.
"""

from __future__ import annotations

from statistics import median


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


# ---------------------------------------------------------------------------- prefetch auto: an account per layer

AUTO_GUESSES = 2  # guesses per layer with --prefetch auto (at most the experts per layer)
TRIAL_READS = 8  # guess reads a layer's account is judged over
TRIAL_POINTS = 32  # or its prefetch points, if fewer of its guesses were read by then
REST_FIRST = 32  # prefetch points a layer goes without guessing after its first losing trial
REST_MAX = 1024  # the longest rest: each losing trial in a row doubles it up to here
EVICT_HORIZON = 4  # steps within which a miss on an expert a guess evicted is charged to that guess's layer


class Account:
    """What each layer's guesses saved against what they cost, in nanoseconds of the compute thread, and
    whether that layer guesses at all (``--prefetch auto``).

    Charged: each prefetch point where the layer guesses, its share of that point's time on the compute thread
    (``charge``: the guess rule and the placing); each guess read, what the reader's copy costs the compute
    thread beside that (``read``); a miss on an expert that a guess evicted within ``EVICT_HORIZON`` steps, one
    read (``missed``), unless that guess was used (its layer would have read it anyway and evicted the same
    expert for it).  Credited: each guess a layer used, the read time it saved that layer less any wait for it
    (``used``: the wait avoided, negative when the guess arrived later than a read of its own would have).

    A trial is ``TRIAL_READS`` guess reads, or ``TRIAL_POINTS`` prefetch points if fewer guesses were read by
    then.  At its end the layer's balance is judged: at or above zero it goes on (a new trial); below zero the
    layer rests, guessing nothing for ``REST_FIRST`` of its prefetch points, twice that after another losing
    trial in a row, up to ``REST_MAX``, then tries again.  The live pool and the planner's time model drive the
    same object with their own clocks (measured, or simulated)."""

    __slots__ = ("balance", "reads", "points", "rest", "rest_len", "victims", "evicted_by", "skipped", "rests")

    def __init__(self, n_layers: int):
        self.balance = [0.0] * n_layers
        self.reads = [0] * n_layers  # guess reads of the current trial
        self.points = [0] * n_layers  # prefetch points of the current trial
        self.rest = [0] * n_layers  # prefetch points still to rest
        self.rest_len = [REST_FIRST] * n_layers  # the next rest's length
        self.victims: dict = {}  # key a guess evicted -> (the guess's layer, step)
        self.evicted_by: dict = {}  # key of a guess not used yet -> the key it evicted
        self.skipped = 0  # guesses not made because their layer rested
        self.rests = 0  # losing trials (rests begun)

    def open(self, layer: int, n_guesses: int = 0) -> bool:
        """Does ``layer`` guess at this prefetch point?  (Each call is one of its prefetch points; a layer at
        rest counts ``n_guesses`` as skipped.)"""
        if self.rest[layer]:
            self.rest[layer] -= 1
            self.skipped += n_guesses
            return False
        if self.reads[layer] >= TRIAL_READS or self.points[layer] >= TRIAL_POINTS:
            losing = self.balance[layer] < 0
            self.balance[layer] = 0.0
            self.reads[layer] = self.points[layer] = 0
            if losing:
                self.rest[layer] = self.rest_len[layer] - 1  # this point is the first one rested
                self.rest_len[layer] = min(REST_MAX, 2 * self.rest_len[layer])
                self.rests += 1
                self.skipped += n_guesses
                return False
            self.rest_len[layer] = REST_FIRST
        self.points[layer] += 1
        return True

    def charge(self, layer: int, ns: float) -> None:
        """``layer``'s share of a prefetch point's time on the compute thread."""
        self.balance[layer] -= ns

    def read(self, layer: int, cost_ns: float, victim=None, step: int = 0, key=None) -> None:
        """A guess (``key``) for ``layer`` was read, costing the compute thread ``cost_ns``; it evicted ``victim``
        at decode step ``step`` (None: a free slot, or a guess no layer had used).  Keys are unique across
        layers (``layer * n_experts + expert``)."""
        self.reads[layer] += 1
        self.balance[layer] -= cost_ns
        if victim is not None:
            victims = self.victims
            if len(victims) >= 4096:  # forget what is past the horizon
                for k in [k for k, (_, s) in victims.items() if step - s > EVICT_HORIZON]:
                    del victims[k]
                self.evicted_by = {g: v for g, v in self.evicted_by.items() if v in victims}
            victims[victim] = (layer, step)
            if key is not None:
                self.evicted_by[key] = victim

    def used(self, layer: int, saved_ns: float, key=None) -> None:
        """A guess (``key``) for ``layer`` was used: it saved the layer ``saved_ns`` of waiting (negative: it
        cost).  What it evicted is no longer charged to it."""
        self.balance[layer] += saved_ns
        if key is not None and self.evicted_by:
            victim = self.evicted_by.pop(key, None)
            if victim is not None:
                self.victims.pop(victim, None)

    def missed(self, key, step: int, read_ns: float) -> None:
        """A miss on ``key`` at ``step``: if a guess evicted it within the horizon, that guess's layer pays a read."""
        got = self.victims.pop(key, None)
        if got is not None and step - got[1] <= EVICT_HORIZON:
            self.balance[got[0]] -= read_ns

    def resting(self) -> list[int]:
        """The layers at rest now."""
        return [layer for layer, n in enumerate(self.rest) if n]


# ---------------------------------------------------------------------------- prefetch auto: guessing at all?

GATE_STEPS = 16  # decode steps of one probe phase (guessing on, or off)
GATE_ROUNDS = 2  # on/off phase pairs of one probe
HOLD_FIRST = 128  # decode steps a probe's verdict holds before the next probe
HOLD_MAX = 2048  # the longest hold: each verdict the same as the last doubles it up to here


class Gate:
    """Whether the engine guesses at all, judged by what the user waits for: decode steps timed with guessing on
    against steps with it off (``--prefetch auto``).

    The per-layer ``Account`` sees what it can attribute to a layer; what it cannot (the reader process taking a
    core from the compute thread on a busy machine, the cache misses its copies cause) shows in the step time.  So a
    probe runs ``GATE_ROUNDS`` pairs of phases of ``GATE_STEPS`` decode steps each, guessing on then off, and
    compares the median step time of each; the faster holds for ``HOLD_FIRST`` steps, twice as long each time the
    next probe gives the same verdict (up to ``HOLD_MAX``), then the engine probes again.  ``tick`` is called once
    per decode step, at its start; ``valid=False`` (a prefill, say, since the last tick) leaves that gap unmeasured.
    The live pool ticks it with the wall clock, the planner's time model with simulated time."""

    __slots__ = ("probing", "on", "left", "phases", "samples", "hold_len", "last", "verdicts", "steps_on", "steps_off")

    def __init__(self):
        self.probing = True
        self.on = True  # whether the current step guesses
        self.left = GATE_STEPS + 1  # steps left in this phase or hold (the first tick measures nothing)
        self.phases = 0  # probe phases finished
        self.samples: dict[bool, list[float]] = {True: [], False: []}
        self.hold_len = {True: HOLD_FIRST, False: HOLD_FIRST}
        self.last = 0.0  # the last tick's time
        self.verdicts: list[bool] = []  # each probe's verdict: guessing on (True) or off
        self.steps_on = self.steps_off = 0

    def tick(self, now: float, valid: bool = True) -> bool:
        """A decode step begins at ``now`` (ns): does it guess?"""
        if self.probing and self.last and valid:
            self.samples[self.on].append(now - self.last)
        self.last = now
        self.left -= 1
        if self.left <= 0:
            self._next()
        if self.on:
            self.steps_on += 1
        else:
            self.steps_off += 1
        return self.on

    def _next(self) -> None:
        if not self.probing:  # a hold is over: probe again, guessing on first
            self.probing, self.on, self.left, self.phases = True, True, GATE_STEPS, 0
            self.samples = {True: [], False: []}
            return
        self.phases += 1
        if self.phases < 2 * GATE_ROUNDS:
            self.on, self.left = not self.on, GATE_STEPS
            return
        on, off = self.samples[True], self.samples[False]
        verdict = not off or (bool(on) and median(on) < median(off))
        self.probing, self.on = False, verdict
        self.left = self.hold_len[verdict]
        self.hold_len[verdict] = min(HOLD_MAX, 2 * self.hold_len[verdict])
        self.hold_len[not verdict] = HOLD_FIRST
        self.verdicts.append(verdict)
