"""The policy interface and the classic eviction rules: LRU, FIFO, LFU, LRFU and the offline optimum.

``moerun.policies`` is the registry (``get``, ``names``, ``register``) and the name users import;
the rules that learn the routing online live in ``policies_markov`` and ``policies_orbit``.
"""

from __future__ import annotations

import inspect
import math
from collections.abc import Collection, Iterable, Sequence

import numpy as np

Key = int
LN2 = math.log(2.0)
_RANK = 1 << 62  # lfu's count weighs this much against its last access


def first_min(resident: Iterable[Key], score: list, pinned: Collection[Key], busy: Collection[Key], top=math.inf) -> Key | None:
    """The first key of ``resident`` with the smallest ``score[key]`` that is neither pinned nor busy (None:
    every key is): what ``min(candidates, key=score.__getitem__)`` gives over the list of candidates, without
    making that list.  The first smallest of all, if evictable, is the first smallest of any subset that
    keeps the order; if not, the pinned and busy residents' scores are set to ``top`` (above every score)
    for a second ``min`` and put back."""
    if not resident:
        return None
    get = score.__getitem__
    key = min(resident, key=get)
    if key not in pinned and key not in busy:
        return key
    held = [(k, score[k]) for k in (*pinned, *busy) if k in resident]
    for k, _ in held:
        score[k] = top
    try:
        key = min(resident, key=get)
    finally:
        for k, v in held:  # read before any was masked: a key both pinned and busy gets its own score back
            score[k] = v
    return None if key in pinned or key in busy else key


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

    def pick(self, resident: Collection[Key], pinned: Collection[Key], busy: Collection[Key], now: int) -> Key | None:
        """The victim among ``resident`` (the resident keys, in insertion order) that is in neither ``pinned``
        nor ``busy``; None when every one is.  This is what the pool calls: the default makes the list of
        candidates and asks ``victim``, the general path every policy may rely on.  A built-in rule whose
        victim is the first smallest of a list of scores overrides it to skip making that list
        (``first_min``), or keeps its residents in the order its victims come in (``lru``, ``fifo``).
        Such a ``pick`` relies on the methods ``pick_relies_on`` names: a subclass that overrides one of
        them and not ``pick`` gets the general path back (``__init_subclass__``), so its own ``victim``
        is asked."""
        candidates = [k for k in resident if k not in pinned and k not in busy]
        return self.victim(candidates, now) if candidates else None

    pick_relies_on: tuple[str, ...] = ("victim",)

    def __init_subclass__(cls, **kwargs):
        super().__init_subclass__(**kwargs)
        if "pick" not in cls.__dict__ and any(name in cls.__dict__ for name in cls.pick_relies_on):
            cls.pick = Policy.pick  # a rule of its own: the general path asks its victim()
            cls.pick_relies_on = ("victim",)

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
    """Least recently used: evict the key whose last access is oldest.

    ``order`` holds the resident keys from the least to the most recently used (an access moves its
    key to the end), so the victim is found at the front instead of by a scan: the first evictable key
    there, or, when evictable keys tie on their last access (a guess placed at the clock of the access
    that follows), the first of them in the pool's insertion order, as ``min`` over the candidates."""

    name = "lru"
    pick_relies_on = ("victim", "inserted", "hit", "evicted")

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        super().__init__(n_keys, shared_experts)
        self.last = [0] * n_keys
        self.order: dict[Key, None] = {}  # resident keys, least recently used first

    def inserted(self, key, now):
        last = self.last
        if key >= len(last):
            grow(last, key)
        last[key] = now
        order = self.order
        order.pop(key, None)
        order[key] = None

    def hit(self, key, now):
        self.last[key] = now
        order = self.order
        order.pop(key, None)
        order[key] = None

    def evicted(self, key):
        self.order.pop(key, None)

    def victim(self, candidates, now):
        return min(candidates, key=self.last.__getitem__)

    def pick(self, resident, pinned, busy, now):
        last = self.last
        best = tied = None
        t = 0
        for k in self.order:  # last access ascending
            if best is not None and last[k] != t:
                break
            if k in pinned or k in busy:
                continue
            if best is None:
                best, t = k, last[k]
            else:
                tied = [best, k] if tied is None else [*tied, k]
        if tied is not None:  # the first of them in insertion order, as min() over the candidates
            tied = set(tied)
            return next(k for k in resident if k in tied)
        return best


class FIFO(Policy):
    """First in, first out: evict the key loaded longest ago, whatever its use."""

    name = "fifo"

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        super().__init__(n_keys, shared_experts)
        self.loaded = [0] * n_keys

    def inserted(self, key, now):
        loaded = self.loaded
        if key >= len(loaded):
            grow(loaded, key)
        loaded[key] = now

    def victim(self, candidates, now):
        return min(candidates, key=self.loaded.__getitem__)

    pick_relies_on = ("victim", "inserted")

    def pick(self, resident, pinned, busy, now):
        # the pool's residents are in insertion order and ``loaded`` is the clock at insertion, which never
        # goes back: the first evictable resident is the first smallest, as min() over the candidates
        for k in resident:
            if k not in pinned and k not in busy:
                return k
        return None


class LFU(Policy):
    """Least frequently used since loaded; ties go to the least recently used."""

    name = "lfu"

    def __init__(self, n_keys: int = 0, shared_experts: int = 0):
        super().__init__(n_keys, shared_experts)
        self.count = [0] * n_keys
        self.last = [0] * n_keys
        # count * 2**62 + last: ordered as (count, last) is (the clock never reaches 2**62 accesses), and
        # compared as one integer; what the victim is the first smallest of
        self.rank = [0] * n_keys

    def inserted(self, key, now):
        if key >= len(self.rank):
            grow(self.count, key)
            grow(self.last, key)
            grow(self.rank, key)
        self.count[key] = 1
        self.last[key] = now
        self.rank[key] = _RANK + now

    def hit(self, key, now):
        c = self.count[key] = self.count[key] + 1
        self.last[key] = now
        self.rank[key] = c * _RANK + now

    def victim(self, candidates, now):
        return min(candidates, key=self.rank.__getitem__)

    def pick(self, resident, pinned, busy, now):
        return first_min(resident, self.rank, pinned, busy)


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

    def pick(self, resident, pinned, busy, now):
        get = self.upcoming.__getitem__  # the first largest, as max() over the candidates (see first_min)
        key = max(resident, key=get, default=None)
        if key is not None and (key in pinned or key in busy):
            return max([k for k in resident if k not in pinned and k not in busy], key=get, default=None)
        return key


SMALLEST_COUNT = math.ulp(0.0)  # 2**-1074: the smallest positive float


def rescaled(count: list[float], scale: float) -> list[float]:
    """Decayed counts times ``scale`` (< 1), a count that was above zero kept above zero: one left unused long
    enough would otherwise underflow to 0.0, which means "never seen" and has no logarithm (markov and the log
    CRF take one).  Such counts were already the smallest there are; they stay so, tied."""
    return [(c * scale) or (SMALLEST_COUNT if c else 0.0) for c in count]


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
                self.count = rescaled(self.count, 2.0**-x)
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

    def pick(self, resident, pinned, busy, now):
        return first_min(resident, self.count, pinned, busy)
