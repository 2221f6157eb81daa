"""Eviction policies, shared by the live pool and the trace replay simulator.

A policy sees the keys of one pool (expert ids of a layer, or (layer, expert)
pairs for a pool shared by all layers) and a clock ``now`` that counts
accesses.  The pool tells it what was inserted, hit and evicted, and asks it
to pick a victim among the resident keys that may be evicted (never the
experts pinned by the layer being computed).  See docs/policies.md.

Writing a policy::

    class MostRecent(Policy):
        name = "mru"
        def __init__(self):
            self.last = {}
        def inserted(self, key, now):
            self.last[key] = now
        def hit(self, key, now):
            self.last[key] = now
        def evicted(self, key):
            del self.last[key]
        def victim(self, candidates, now):
            return max(candidates, key=self.last.__getitem__)

    register(MostRecent)
"""

from __future__ import annotations

from collections.abc import Callable, Hashable, Sequence

Key = Hashable


class Policy:
    """Base class: override ``victim`` and whichever notifications you need."""

    name = "base"
    online = True  # False only for policies that read the future (the offline optimum)

    def inserted(self, key: Key, now: int) -> None:
        """``key`` was just loaded into the pool (by demand or by prefetch)."""

    def hit(self, key: Key, now: int) -> None:
        """``key`` was accessed while resident."""

    def evicted(self, key: Key) -> None:
        """``key`` left the pool."""

    def victim(self, candidates: Sequence[Key], now: int) -> Key:
        """Pick one of ``candidates`` (resident, evictable; never empty) to evict."""
        raise NotImplementedError


class LRU(Policy):
    """Least recently used: evict the key whose last access is oldest."""

    name = "lru"

    def __init__(self):
        self.last: dict[Key, int] = {}

    def inserted(self, key, now):
        self.last[key] = now

    hit = inserted

    def evicted(self, key):
        self.last.pop(key, None)

    def victim(self, candidates, now):
        return min(candidates, key=self.last.__getitem__)


class FIFO(Policy):
    """First in, first out: evict the key loaded longest ago, whatever its use."""

    name = "fifo"

    def __init__(self):
        self.loaded: dict[Key, int] = {}

    def inserted(self, key, now):
        self.loaded[key] = now

    def evicted(self, key):
        self.loaded.pop(key, None)

    def victim(self, candidates, now):
        return min(candidates, key=self.loaded.__getitem__)


class LFU(Policy):
    """Least frequently used since loaded; ties go to the least recently used."""

    name = "lfu"

    def __init__(self):
        self.count: dict[Key, int] = {}
        self.last: dict[Key, int] = {}

    def inserted(self, key, now):
        self.count[key] = 1
        self.last[key] = now

    def hit(self, key, now):
        self.count[key] += 1
        self.last[key] = now

    def evicted(self, key):
        self.count.pop(key, None)
        self.last.pop(key, None)

    def victim(self, candidates, now):
        return min(candidates, key=lambda k: (self.count[k], self.last[k]))


class Optimal(Policy):
    """The offline optimum (Belady's MIN): evict the key used furthest in the future.

    It needs the whole access sequence in advance, so it exists for replay only.
    ``future`` is the list of keys in access order; ``now`` is the index of the
    access being served.
    """

    name = "optimal"
    online = False

    def __init__(self, future: Sequence[Key]):
        n = len(future)
        self.next_use = [n] * n  # next_use[i] = index of the next access to future[i] after i
        seen: dict[Key, int] = {}
        for i in range(n - 1, -1, -1):
            self.next_use[i] = seen.get(future[i], n + 1)
            seen[future[i]] = i
        self.upcoming: dict[Key, int] = {}
        self.n = n

    def inserted(self, key, now):
        self.upcoming[key] = self.next_use[now]

    hit = inserted

    def evicted(self, key):
        self.upcoming.pop(key, None)

    def victim(self, candidates, now):
        return max(candidates, key=self.upcoming.__getitem__)


_REGISTRY: dict[str, Callable[..., Policy]] = {}


def register(cls: type[Policy]) -> type[Policy]:
    """Make a policy available by its ``name`` (``--evict NAME``, ``replay --evict``)."""
    _REGISTRY[cls.name] = cls
    return cls


for _cls in (LRU, LFU, FIFO, Optimal):
    register(_cls)


def names(online_only: bool = False) -> list[str]:
    return [n for n, c in _REGISTRY.items() if not online_only or getattr(c, "online", True)]


def get(name: str) -> type[Policy]:
    from .errors import BadOption

    cls = _REGISTRY.get(name)
    if cls is None:
        raise BadOption(f"unknown eviction policy {name!r}; known: {', '.join(names())}")
    return cls
