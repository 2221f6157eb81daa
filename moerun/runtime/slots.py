"""One slot's record and its state machine, a decode layer's per-access event, and what the pool counts.

A slot is one expert-sized buffer of the pool.  Its state says who owns its bytes, and changes only
through the transitions of ``TRANSITIONS`` (one ``Slot`` method each; any other change raises
``IllegalTransition``)::

                  book                fill
        EMPTY ----------> PENDING ----------> READY
         |  |                                  ^  ^
         |  |  hand_over             arrive    |  |
         |  +-----------> LOADING -------------+  |
         |                 |   |   take_over      |
         |      let_go     |   +----(owed)------->|
         |<----------------+                      |
         |               fill (a demand read)     |
         +--------------------------------------->+

        claim, clear, empty: EMPTY, PENDING, READY -> EMPTY (never LOADING, nor READY and owed)

EMPTY: claimed or free, no bytes.  PENDING: a guess booked on the emulated link with no live reader;
the compute thread copies its bytes.  LOADING: the reader process owns the bytes until it answers.
READY: the bytes are there.  A READY slot read here while the reader still held it is ``owed``: not
evictable until the reader answers.  ``PoolStats.to_json`` is ``engine.stats["pool"]``.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass, field

import numpy as np

from moerun.runtime.link import Transfer
from moerun.runtime.residency import Residency


class State(enum.IntEnum):
    EMPTY = 0
    LOADING = 1  # the reader process owns the slot's bytes until it publishes
    READY = 2
    PENDING = 3  # a guess booked on the emulated link, with no reader, whose bytes the compute thread has not copied


# the values a slot's ``state`` holds (plain ints: compared on every access of the decode path)
EMPTY, LOADING, READY, PENDING = int(State.EMPTY), int(State.LOADING), int(State.READY), int(State.PENDING)

# transition -> {from state: to state}: the only changes of state there are
TRANSITIONS: dict[str, dict[int, int]] = {
    # a layer (or a guess) takes the slot for an expert, nothing read yet; an evicted expert's bytes are
    # dropped with it (never a slot the reader may write: LOADING, or READY and owed)
    "claim": {EMPTY: EMPTY, PENDING: EMPTY, READY: EMPTY},
    "book": {EMPTY: PENDING},  # a guess over the emulated link, no live reader: the compute thread copies it
    "hand_over": {EMPTY: LOADING},  # a guess's read handed to the reader process
    "arrive": {LOADING: READY},  # the reader published the bytes
    "let_go": {LOADING: EMPTY},  # the reader answered without the bytes (failed, skipped, or dropped)
    "take_over": {LOADING: READY},  # read here while the reader still holds it: owed until it answers
    "fill": {EMPTY: READY, PENDING: READY},  # the compute thread read the bytes
    "empty": {EMPTY: EMPTY, PENDING: EMPTY, READY: EMPTY},  # its bytes are not to be used; it keeps its expert
    "clear": {EMPTY: EMPTY, PENDING: EMPTY, READY: EMPTY},  # evicted or given back: it holds nothing
}


class IllegalTransition(RuntimeError):
    """A slot asked to change state in a way ``TRANSITIONS`` does not allow (a bug, never a user error)."""


HIT, PREFETCHED, MISS = 0, 1, 2
KIND_NAMES = {HIT: "hit", PREFETCHED: "prefetched", MISS: "miss"}


@dataclass(eq=False, slots=True)
class Event:
    """What one access of a decode layer was, and what it cost: its kind (HIT, PREFETCHED, MISS), its
    slot, the page-in and the stall it took (ns).  One record per slot, reused by every access it serves
    (the recorder copies the figures at the end of the layer), so the decode path allocates none."""

    kind: int = HIT
    slot: int = -1
    pagein_ns: int = 0
    stall_ns: int = 0

    def reset(self, kind: int) -> Event:
        self.kind = kind
        self.pagein_ns = self.stall_ns = 0
        return self


@dataclass(eq=False, slots=True)
class Slot:
    """One expert-sized buffer of the pool and what it holds."""

    index: int
    buf: np.ndarray
    bound: object  # the codec's views of buf
    state: int = EMPTY  # a State
    layer: int = -1  # the expert it holds or is being read into (-1: none)
    expert: int = -1
    res: Residency | None = None  # the residency that holds it
    gen: int = 0  # bumped by every new read, so a result for an earlier read is never taken
    guess: bool = False  # loaded by a guess that no layer has used yet
    dropped: bool = False  # a guess given back while the reader still held it: freed once it lets go
    owed: bool = False  # read here while the reader still held it: the reader may write it until it answers
    transfer: Transfer | None = None  # its emulated transfer, with a link
    ready_at: int = 0  # when its bytes arrived (no link)
    read_ns: int = 0  # how long its last read took
    event: Event = field(init=False)  # its access's record in the current decode layer

    def __post_init__(self):
        self.event = Event(HIT, self.index)

    def _illegal(self, name: str):
        owed = " (owed)" if self.owed else ""
        return IllegalTransition(f"slot {self.index}: {name} from {State(self.state).name}{owed}")

    # one method per transition; each looks its target up in its row of TRANSITIONS (_TO, by state)
    def claim(self, layer: int, expert: int, res: Residency) -> None:
        """Hold ``expert`` of ``layer`` from now, nothing read yet (whatever it held is forgotten)."""
        to = _CLAIM[self.state]
        if to is None or self.owed:
            raise self._illegal("claim")
        self.state = to
        self.layer, self.expert, self.res = layer, expert, res
        self.guess = self.dropped = False
        self.transfer = None

    def book(self) -> None:
        to = _BOOK[self.state]
        if to is None:
            raise self._illegal("book")
        self.state = to

    def hand_over(self) -> None:
        to = _HAND_OVER[self.state]
        if to is None:
            raise self._illegal("hand_over")
        self.state = to

    def arrive(self, at: int, ns: int) -> None:
        to = _ARRIVE[self.state]
        if to is None:
            raise self._illegal("arrive")
        self.state = to
        self.ready_at = at
        self.read_ns = ns

    def let_go(self) -> None:
        to = _LET_GO[self.state]
        if to is None:
            raise self._illegal("let_go")
        self.state = to

    def take_over(self, at: int) -> None:
        to = _TAKE_OVER[self.state]
        if to is None:
            raise self._illegal("take_over")
        self.state = to
        self.owed = True
        self.ready_at = at

    def fill(self, at: int, ns: int) -> None:
        to = _FILL[self.state]
        if to is None:
            raise self._illegal("fill")
        self.state = to
        self.ready_at = at
        self.read_ns = ns

    def empty(self) -> None:
        """Its bytes are not to be used; it stays with its expert, for the layer that wants it to read."""
        to = _EMPTY[self.state]
        if to is None:
            raise self._illegal("empty")
        self.state = to
        self.guess = self.dropped = False

    def clear(self) -> None:
        """Hold nothing: the slot is free again."""
        to = _CLEAR[self.state]
        if to is None or self.owed:
            raise self._illegal("clear")
        self.state = to
        self.guess = self.dropped = False
        self.layer = self.expert = -1
        self.res = self.transfer = None


# TRANSITIONS as rows indexed by the state's number (a tuple lookup, for the decode path)
_TO: dict[str, tuple] = {name: tuple(row.get(st) for st in State) for name, row in TRANSITIONS.items()}
_CLAIM, _BOOK, _HAND_OVER, _ARRIVE, _LET_GO, _TAKE_OVER, _FILL, _EMPTY, _CLEAR = (
    _TO[name] for name in ("claim", "book", "hand_over", "arrive", "let_go", "take_over", "fill", "empty", "clear"))


@dataclass
class PoolStats:
    n_layers: int
    accesses: list = field(init=False)
    hits: list = field(init=False)  # resident without a pending guess
    prefetch_hits: list = field(init=False)  # resident or in flight thanks to a guess
    misses: list = field(init=False)
    stall_ns: list = field(init=False)
    pagein_ns: list = field(init=False)  # page-in time of demand reads
    bytes_in: int = 0  # all bytes paged in (demand + prefetch)
    demand_loads: int = 0
    prefill_loads: int = 0
    prefetch_guesses: int = 0  # guesses made
    prefetch_resident: int = 0  # guesses already resident or in flight: nothing to do
    prefetch_declined: int = 0  # guesses not read: too late to arrive in time, or the policy kept its victim
    prefetch_loads: int = 0  # guesses handed to the reader
    prefetch_dropped: int = 0  # guesses whose layer started without them before they took any link time
    prefetch_used: int = 0  # prefetched experts that a layer then used
    prefetch_wasted_bytes: int = 0  # prefetched bytes evicted or dropped before any use
    prefetch_failed: int = 0
    prefetch_copied_here: int = 0  # guesses the compute thread copied itself (the reader had not yet)
    prefetch_ns: int = 0  # the reader's copy time of guesses
    hidden_ns: int = 0  # transfer time of used guesses that no layer waited for
    reader_stalled: bool = False
    warm_loads: int = 0  # experts read by a warm start, before the first step (moerun.runtime.decisions.Decisions.warm)
    warm_ns: int = 0  # the warm start's time: its reads (and, with an emulated link, their transfers)
    prefetch_wasted: int = 0  # guesses read and then evicted or dropped before any use
    account: object = None  # with --prefetch auto: the pool's moerun.runtime.guesses.Account
    gate: object = None  # with --prefetch auto: the prefetcher's moerun.runtime.guesses.Gate

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
            "stall_s": sum(self.stall_ns) / 1e9,  # JSON durations are seconds (docs/guide/api.md, "Units")
            "pagein_s": sum(self.pagein_ns) / 1e9,
            "bytes_paged_in": self.bytes_in,
            "warm_loads": self.warm_loads,
            "warm_s": self.warm_ns / 1e9,
            "demand_loads": self.demand_loads,
            "prefill_loads": self.prefill_loads,
            "prefetch": {
                "guesses": self.prefetch_guesses,
                "already_resident": self.prefetch_resident,
                "declined": self.prefetch_declined,
                "loads": self.prefetch_loads,
                "dropped": self.prefetch_dropped,
                "used": self.prefetch_used,
                "accuracy": (self.prefetch_used / self.prefetch_loads) if self.prefetch_loads else None,
                "wasted_bytes": self.prefetch_wasted_bytes,
                "failed": self.prefetch_failed,
                "copied_here": self.prefetch_copied_here,
                "pagein_s": self.prefetch_ns / 1e9,
                "hidden_s": self.hidden_ns / 1e9,
                "reader_stalled": self.reader_stalled,
                "wasted": self.prefetch_wasted,
                "auto": self.account is not None,
                "skipped": self.account.skipped if self.account is not None else 0,
                "rests": self.account.rests if self.account is not None else 0,
                "resting_layers": self.account.resting() if self.account is not None else [],
                "steps_guessing": self.gate.steps_on if self.gate is not None else None,
                "steps_not_guessing": self.gate.steps_off if self.gate is not None else None,
                "probes": len(self.gate.verdicts) if self.gate is not None else 0,
                "probe_verdicts_on": sum(self.gate.verdicts) if self.gate is not None else 0,
            },
        }
