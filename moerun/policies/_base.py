"""The policy interface and the classic eviction rules: LRU, FIFO, LFU, LRFU and the offline optimum.

``moerun.policies`` is the registry (``get``, ``names``, ``register``) and the name users import;
the rules that learn the routing online live in ``policies_markov`` and ``policies_orbit``.
"""

from __future__ import annotations

import inspect
import math
from collections.abc import Sequence

import numpy as np

Key = int
LN2 = math.log(2.0)


def grow(values: list, key: int, fill=0) -> None:
    """Extend ``values`` with ``fill`` so that ``values[key]`` exists (the policies' per-key lists)."""
    if key >= len(values):
        values.extend([fill] * (key + 1 - len(values)))


class Policy:
    """Base class: override ``victim`` and whichever notifications you need.

    ``n_keys`` is the size of the key space when known (0: keys are small ints, lists grow as they
    come).  ``shared_experts`` is set for a pool shared by all layers: the experts per layer, so a
    key splits into ``divmod(key, shared_experts)`` = (layer, expert); 0 for a pool of one layer.
    """

    name = "base"
    online = True  # False only for policies that read the future (the offline optimum)

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        self.n_keys = n_keys
        self.shared_experts = shared_experts

    def inserted(self, key: Key, now: int) -> None:
        """``key`` was just loaded into the pool (by demand or by prefetch)."""

    def hit(self, key: Key, now: int) -> None:
        """``key`` was accessed while resident."""

    def evicted(self, key: Key) -> None:
        """``key`` left the pool."""

    def victim(self, candidates: Sequence[Key], now: int) -> Key:
        """Pick one of ``candidates`` (resident, evictable; never empty) to evict."""
        raise NotImplementedError

    def routed(self, layer: int, chosen: Sequence[int], probs: np.ndarray | None, now: int) -> None:
        """Optional per-step signal, before a decode step's accesses: the layer, its chosen expert ids
        (ascending) and the router probabilities of the current token for that layer (float32
        [n_experts]; None when a replayed trace holds no ``probs``).  ``now`` is the clock of the
        step's first access.  The live pool and the replay both call it; prefill is not signalled.
        The arrays belong to the caller: copy what you keep."""

    # Replay's fast path for score rules (moerun.sim.tape) reads these; the pool never does.
    # ``history_scores`` True promises: ``victim`` returns the first candidate with the smallest ``scores``
    # value; a key's score depends only on the routing and the accesses so far, never on what is resident
    # (so ``inserted`` and ``hit`` leave the same score), and it changes only when the key is accessed,
    # when its layer routes (``routed``), or when ``epoch`` changes (every key's at once).
    history_scores = False
    epoch = 0

    def scores(self, keys: Sequence[Key], now: int) -> list[float]:
        """With ``history_scores``: the values ``victim`` minimises, for these keys (each accessed before)."""
        raise NotImplementedError

    def admits(self, key: Key, victim: Key, now: int) -> bool:
        """Would the policy rather hold ``key`` (a guess about to be prefetched) than ``victim`` (the
        resident it would evict for it)?  The pool asks before every prefetch that evicts.  The
        default says yes: a guess is for the coming step, sooner than any other use."""
        return True


def make_policy(cls: type[Policy], n_keys: int = 0, shared_experts: int = 0, future: Sequence[Key] | None = None) -> Policy:
    """A policy object for a pool of ``n_keys`` keys; an offline one (``online = False``) gets the access sequence.

    Policies written before keys were counted (an ``__init__`` without parameters) still work."""
    if not getattr(cls, "online", True):
        return cls(future if future is not None else [])
    try:
        params = inspect.signature(cls).parameters
    except (TypeError, ValueError):
        params = {"n_keys": None}
    return cls(n_keys, shared_experts) if len(params) >= 2 else cls(n_keys) if params else cls()


class LRU(Policy):
    """Least recently used: evict the key whose last access is oldest."""

    name = "lru"

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        super().__init__(n_keys, shared_experts)
        self.last = [0] * n_keys

    def inserted(self, key, now):
        grow(self.last, key)
        self.last[key] = now

    def hit(self, key, now):
        self.last[key] = now

    def victim(self, candidates, now):
        return min(candidates, key=self.last.__getitem__)


class FIFO(Policy):
    """First in, first out: evict the key loaded longest ago, whatever its use."""

    name = "fifo"

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        super().__init__(n_keys, shared_experts)
        self.loaded = [0] * n_keys

    def inserted(self, key, now):
        grow(self.loaded, key)
        self.loaded[key] = now

    def victim(self, candidates, now):
        return min(candidates, key=self.loaded.__getitem__)


class LFU(Policy):
    """Least frequently used since loaded; ties go to the least recently used."""

    name = "lfu"

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        super().__init__(n_keys, shared_experts)
        self.count = [0] * n_keys
        self.last = [0] * n_keys

    def inserted(self, key, now):
        grow(self.count, key)
        grow(self.last, key)
        self.count[key] = 1
        self.last[key] = now

    def hit(self, key, now):
        self.count[key] += 1
        self.last[key] = now

    def victim(self, candidates, now):
        count, last = self.count, self.last
        return min(candidates, key=lambda k: (count[k], last[k]))


class Optimal(Policy):
    """The offline optimum (Belady's MIN): evict the key used furthest in the future.

    It needs the whole access sequence in advance, so it exists for replay only.
    ``future`` is the list of keys in access order; ``now`` is the index of the
    access being served.
    """

    name = "optimal"
    online = False

    def __init__(self, future: Sequence[Key]):
        super().__init__(0, 0)
        n = len(future)
        self.next_use = [n] * n  # next_use[i] = index of the next access to future[i] after i
        seen: dict[Key, int] = {}
        for i in range(n - 1, -1, -1):
            self.next_use[i] = seen.get(future[i], n + 1)
            seen[future[i]] = i
        self.upcoming = [0] * (max(future, default=-1) + 1)
        self.n = n

    def inserted(self, key, now):
        self.upcoming[key] = self.next_use[now]

    hit = inserted

    def victim(self, candidates, now):
        return max(candidates, key=self.upcoming.__getitem__)


class LRFU(Policy):
    """Least recently/frequently used: evict the key with the smallest decayed access count.

    Each access adds 1 to a key's count, and counts halve every ``1 / lam`` accesses, so
    ``lam`` slides from LFU (0) towards LRU (1).  Unlike ``lfu``, a key's history survives its
    eviction, so an expert that is used often but was pushed out is recognised when it returns.
    Source: Lee, Choi, Kim, Noh, Min, Cho and Kim, "LRFU: a spectrum of policies that subsumes the
    least recently used and least frequently used policies", IEEE Transactions on Computers
    50(12), 2001 (the combined recency and frequency value, CRF, with F(x) = (1/2)^(lam x)).

    Kept cheaply: ``count[key]`` is the key's CRF times ``2 ** (lam * (now - origin))``, the same
    factor for every key, so an access adds ``2 ** (lam * (now - origin))`` (one power per clock
    tick, shared by the tick's accesses) and the victim is the smallest ``count``.  With lam 0
    it is the plain count.  The origin moves forward before the factor can overflow.
    """

    name = "lrfu"
    lam = 0.01  # per access; chosen on tuning traces (docs/research/policies.md)

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        super().__init__(n_keys, shared_experts)
        self.count = [0.0] * n_keys  # CRF * 2 ** (lam * (now - origin)); 0: never seen
        self.origin = 0
        self._tick = -1
        self._add = 1.0

    def _weight(self, now: int) -> float:
        """2 ** (lam * (now - origin)), computed once per clock tick."""
        if now != self._tick:
            x = self.lam * (now - self.origin)
            if x > 512.0:  # rescale everything before the factor overflows a float
                scale = 2.0**-x
                self.count = [c * scale for c in self.count]
                self.origin = now
                x = 0.0
            self._tick = now
            self._add = 2.0**x
        return self._add

    def inserted(self, key, now):
        add = self._weight(now)  # first: it may rescale (and replace) the counts
        count = self.count
        if key >= len(count):
            grow(count, key, 0.0)
        count[key] += add

    hit = inserted

    def log_crf(self, key: Key, now: int) -> float:
        """log2 of the key's decayed count at ``now`` (its combined recency and frequency value)."""
        return math.log2(self.count[key]) - self.lam * (now - self.origin)

    history_scores = True

    @property
    def epoch(self) -> int:
        """Moves when the counts are rescaled (every score changes at once)."""
        return self.origin

    def scores(self, keys, now):
        count = self.count
        return [count[k] for k in keys]

    def victim(self, candidates, now):
        return min(candidates, key=self.count.__getitem__)
