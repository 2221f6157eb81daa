"""The expert-source protocol, and the sources other than the pool: bare (all resident) and the baselines.

An expert source is how ``moerun.model.transformer`` gets expert weights.  Per layer, the
model calls, in this order::

    begin_layer(layer)
    routed(layer, chosen, weights, probs)   # the layer's routing decision, [T, k] ascending ids
    compute_order(layer, ids)               # one token: the order to compute ids[j] in
    weights(layer, expert)                  # float32 (w_gate, w_up, w_down), once per chosen expert
    end_layer(layer)

and the engine calls ``begin_step(step)`` before each forward pass (-1 for a
prefill).  The math never asks whether an expert was resident, prefetched or
just read; the outputs are summed in ascending id whatever ``compute_order``
says, so a source can only change speed, never numbers.  ``recorder``, when
set, receives each routing decision.

``BareExperts`` holds every expert in page-aligned buffers with no bookkeeping
at all: the speed reference for the pool's overhead.  ``WholeLayerExperts``
and ``NoReuseExperts`` are the naive offloading baselines of
``scripts/bench_offload.py``: page in every expert of a layer each time it
runs, or page in just the chosen experts every time with no cache.
``moerun.runtime.pool.ExpertPool`` is the real thing.
"""

from __future__ import annotations

import time

import numpy as np

from moerun.files.store import ModelStore
from moerun.runtime.budget import slot_bytes
from moerun.runtime.clock import wait_until
from moerun.runtime.link import Link


def aligned_block(nbytes: int) -> tuple[np.ndarray, np.ndarray]:
    """A zero-filled, 4 KiB-aligned uint8 block (returned with the raw array that owns it)."""
    raw = np.empty(nbytes + 4096, np.uint8)
    off = (-raw.ctypes.data) % 4096
    block = raw[off : off + nbytes]
    block.fill(0)
    return block, raw


class ExpertSource:
    """The expert-source protocol (module docstring), with the hooks a simple source does not need
    implemented as no-ops; a source overrides ``weights`` and whatever else it needs."""

    recorder = None
    step = -1

    def __init__(self, store: ModelStore):
        self.store = store
        self.codec = store.codec
        self.stall_ns = 0
        self.bytes_in = 0
        # the emulated link's one owner: the source that reads the experts (None: real speed)
        self.link: Link | None = Link(store.link_rate) if store.link_rate else None

    def begin_step(self, step: int) -> None:
        self.step = step

    def begin_layer(self, layer: int) -> None:
        pass

    def routed(self, layer: int, chosen: np.ndarray, weights: np.ndarray, probs: np.ndarray) -> None:
        if self.recorder is not None:
            self.recorder.routed(-1 if chosen.shape[0] > 1 else self.step, layer, chosen, weights, probs)

    def compute_order(self, layer: int, ids: list[int]):
        return range(len(ids))

    def weights(self, layer: int, expert: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        raise NotImplementedError

    def end_layer(self, layer: int) -> None:
        pass

    def page_in(self, layer: int, expert: int, dst: np.ndarray) -> int:
        """Copy one expert's bytes into ``dst``; return ns.  With an emulated link the transfer is booked
        on its one channel when the read starts and the call returns when it ends (``moerun.runtime.link``):
        page-ins queue behind each other."""
        t0 = time.monotonic_ns()
        link = self.link
        t = link.book(self.store.expert_nbytes, t0, True) if link is not None else None
        self.store.copy_in(layer, expert, dst)
        if t is not None:
            now = time.monotonic_ns()
            end = link.ends(t, now)
            link.hold(t, now)  # a read slower than the link ends when the read did
            wait_until(max(end, now))
        return time.monotonic_ns() - t0

    def _page_in(self, layer: int, expert: int, dst: np.ndarray) -> None:
        self.stall_ns += self.page_in(layer, expert, dst)
        self.bytes_in += self.store.expert_nbytes


class BareExperts(ExpertSource):
    """Every expert resident in page-aligned buffers, no bookkeeping (the benchmark's baseline)."""

    def __init__(self, store: ModelStore):
        super().__init__(store)
        c = store.config
        size = slot_bytes(store.slot_nbytes)
        block, self._raw = aligned_block(c.n_layers * c.n_experts * size)
        self.table = []
        for layer in range(c.n_layers):
            row = []
            for e in range(c.n_experts):
                i = layer * c.n_experts + e
                slot = block[i * size : (i + 1) * size]
                self.page_in(layer, e, slot)
                row.append(store.codec.bind(slot))
            self.table.append(row)

    def weights(self, layer, expert):
        return self.codec.weights(self.table[layer][expert])


class WholeLayerExperts(ExpertSource):
    """Baseline: each time a layer runs, all of its experts are paged in (one layer's worth of slots)."""

    def __init__(self, store: ModelStore):
        super().__init__(store)
        c = store.config
        size = slot_bytes(store.slot_nbytes)
        block, self._raw = aligned_block(c.n_experts * size)
        self.slots = [block[i * size : (i + 1) * size] for i in range(c.n_experts)]
        self.bound = [store.codec.bind(s) for s in self.slots]

    def begin_layer(self, layer: int) -> None:
        for e, slot in enumerate(self.slots):
            self._page_in(layer, e, slot)

    def weights(self, layer, expert):
        return self.codec.weights(self.bound[expert])


class NoReuseExperts(ExpertSource):
    """Baseline: only the chosen experts are paged in, every time they are used; nothing is kept."""

    def __init__(self, store: ModelStore):
        super().__init__(store)
        size = slot_bytes(store.slot_nbytes)
        block, self._raw = aligned_block(size)
        self.slot = block
        self.bound = store.codec.bind(block)

    def weights(self, layer, expert):
        self._page_in(layer, expert, self.slot)
        return self.codec.weights(self.bound)
