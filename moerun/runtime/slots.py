"""One slot's record, the states a slot goes through, and what the pool counts.

A slot is one expert-sized buffer of the pool.  Its state says who owns its bytes: EMPTY (claimed,
not read), PENDING (a guess booked on the emulated link whose bytes the compute thread has not
copied yet), LOADING (the reader process owns the bytes until it answers), READY.
``PoolStats.to_json`` is ``engine.stats["pool"]``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from moerun.runtime.link import Transfer
from moerun.runtime.residency import Residency

# PENDING: a guess booked on the emulated link, with no reader, whose bytes the compute thread has
# not copied yet; LOADING: the reader process owns the slot's bytes until it publishes
EMPTY, PENDING, LOADING, READY = 0, 3, 1, 2
HIT, PREFETCHED, MISS = 0, 1, 2
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
    res: Residency | None = None  # the residency that holds it
    gen: int = 0  # bumped by every new read, so a result for an earlier read is never taken
    guess: bool = False  # loaded by a guess that no layer has used yet
    dropped: bool = False  # a guess given back while the reader still held it: freed once it lets go
    owed: bool = False  # read here while the reader still held it: the reader may write it until it answers
    transfer: Transfer | None = None  # its emulated transfer, with a link
    ready_at: int = 0  # when its bytes arrived (no link)
    read_ns: int = 0  # how long its last read took


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
                "dropped": self.prefetch_dropped,
                "used": self.prefetch_used,
                "accuracy": (self.prefetch_used / self.prefetch_loads) if self.prefetch_loads else None,
                "wasted_bytes": self.prefetch_wasted_bytes,
                "failed": self.prefetch_failed,
                "copied_here": self.prefetch_copied_here,
                "pagein_ns": self.prefetch_ns,
                "hidden_ns": self.hidden_ns,
                "reader_stalled": self.reader_stalled,
            },
        }
