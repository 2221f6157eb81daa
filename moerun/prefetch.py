"""Speculative prefetch: guess the next layers' experts and have the reader process page them in.

The prefetch point is right after layer l's attention (before its experts
run; ``--prefetch-from output`` moves it to the end of the layer): the routers
of layers l+1..l+L are applied to that hidden state, and each layer's top-N
guesses that are not resident get a slot at once (``ExpertPool.prefetch``),
never evicting pinned experts, a slot being read, nor another guess of the
same round, and their reads are handed to the reader process
(``moerun.reader``).  The reader serves a layer's demand misses and the
guesses that layer has started using before other guesses, and drops a guess
whose layer has started without it.  Guesses are advisory: a wrong one costs
bandwidth, a failed one is forgotten and the layer reads the expert itself;
if the reader process dies, the engine carries on with its own reads.
"""

from __future__ import annotations

from .pool import ExpertPool
from .reader import Reader


class Prefetcher:
    def __init__(self, pool: ExpertPool, model, n_guesses: int, lookahead: int, reader: Reader):
        self.pool = pool
        self.model = model
        self.n = n_guesses
        self.lookahead = lookahead
        self.reader = reader
        self.hook = None  # test hook: callable(layer, expert) run before each guess is handed over; raising fails it

    def guess(self, layer: int, h) -> None:
        """Prefetch point of layer ``layer`` (compute thread): start reads for the next layers' guesses."""
        pool = self.pool
        L = pool.config.n_layers
        step = pool.step
        made = 0
        for j in range(1, self.lookahead + 1):
            target_layer = layer + j
            if target_layer >= L:
                break
            guesses = self.model.guess(h, target_layer, self.n)
            protect = frozenset(pool.key(target_layer, e) for e in guesses)  # loading one never evicts another
            made += len(guesses)
            for e in guesses:
                pool.prefetch(target_layer, e, step * L + target_layer, self.hook, protect)
        pool.stats.prefetch_guesses += made

    @property
    def alive(self) -> bool:
        return self.reader.alive

    def close(self, timeout: float = 2.0) -> None:
        self.reader.close(timeout)
