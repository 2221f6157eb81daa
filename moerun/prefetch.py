"""Speculative prefetch: guess the next layers' experts and page them in on a background thread.

The prefetch point is right after layer l's attention (before its experts
run): the routers of layers l+1..l+L are applied to that hidden state, and
each layer's top-N guesses are queued.  The thread pages guesses into the
pool, never evicting pinned experts nor another guess of the same round; a guess for a layer that has already
started is dropped as stale.  Guesses are advisory: a wrong one costs
bandwidth, a failed one is forgotten and the layer reads the expert itself.
The same thread also reads a layer's demand misses (queued ahead of every
guess) while the layer computes the experts it already has; a miss the thread
has not started when the layer needs it, the layer reads itself.
The thread is a daemon, stops on ``close()`` and never holds the pool lock
while it reads.
"""

from __future__ import annotations

import collections
import threading

from .pool import ExpertPool


class Prefetcher:
    def __init__(self, pool: ExpertPool, model, n_guesses: int, lookahead: int = 1):
        self.pool = pool
        self.model = model
        self.n = n_guesses
        self.lookahead = lookahead
        self.queue: collections.deque = collections.deque()
        self.cv = threading.Condition()
        self.stopping = False
        self.hook = None  # test hook: callable(layer, expert) run before each prefetch read
        self.loop_hook = None  # test hook: callable() run at each loop turn (may raise to kill the thread)
        self.error: BaseException | None = None
        self.thread = threading.Thread(target=self._run, name="moerun-prefetch", daemon=True)
        self.thread.start()

    def guess(self, layer: int, h) -> None:
        """Prefetch point of layer ``layer`` (compute thread): queue guesses for the next layers."""
        L = self.pool.config.n_layers
        step = self.pool.step
        reqs = []
        made = 0
        for j in range(1, self.lookahead + 1):
            target_layer = layer + j
            if target_layer >= L:
                break
            target = step * L + target_layer
            res = self.pool.residency(target_layer)
            guesses = self.model.guess(h, target_layer, self.n)
            protect = frozenset(self.pool.key(target_layer, e) for e in guesses)  # loading one never evicts another
            for e in guesses:
                made += 1
                if self.pool.key(target_layer, e) not in res:  # resident guesses need no wake-up
                    reqs.append((target_layer, e, target, protect))
        self.pool.stats.prefetch_guesses += made
        if not reqs or not self.thread.is_alive():
            return
        with self.cv:
            self.queue.extend(reqs)
            self.cv.notify()

    def demand(self, layer: int, misses: list[tuple[int, int]]) -> None:
        """Queue a layer's demand misses ahead of every guess (compute thread).

        The layer computes its resident experts meanwhile; whatever the thread
        has not started by the time the layer needs it, the layer reads itself.
        """
        with self.cv:
            for e, slot in reversed(misses):
                self.queue.appendleft((layer, e, -1 - slot, None))
            self.cv.notify()

    def _run(self) -> None:
        try:
            while True:
                with self.cv:
                    while not self.queue and not self.stopping:
                        self.cv.wait()
                    if self.stopping:
                        return
                    layer, e, target, protect = self.queue.popleft()
                if self.loop_hook is not None:
                    self.loop_hook()
                if target < 0:  # a demand miss, encoded as -1 - slot
                    self.pool.serve_demand(layer, e, -1 - target)
                else:
                    self.pool.prefetch(layer, e, target, self.hook, protect)
        except BaseException as exc:  # the thread dies; the compute thread carries on without it
            self.error = exc

    @property
    def alive(self) -> bool:
        return self.thread.is_alive()

    def close(self, timeout: float = 2.0) -> None:
        with self.cv:
            self.stopping = True
            self.queue.clear()
            self.cv.notify_all()
        self.thread.join(timeout)
