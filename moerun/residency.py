"""Which expert sits in which slot: the bookkeeping the live pool and the replay share.

``Residency`` holds the key -> slot map of one pool (one layer's quota, or
the whole shared pool), a clock that counts accesses, and an eviction policy.
The live pool wraps it with real buffers and locking; ``moerun.replay`` drives
it with recorded routing.  Because both call the same ``access`` method with
the same pinning, a replay of a live run with prefetch off reproduces the
live hit and miss counts exactly.
"""

from __future__ import annotations

from collections.abc import Collection, Hashable

from .policies import Policy

Key = Hashable


class NoVictim(Exception):
    """Every resident key is pinned or busy; the caller must wait or give up."""


class Residency:
    def __init__(self, capacity: int, policy: Policy, slots: list[int] | None = None):
        self.capacity = capacity
        self.policy = policy
        self.slot_of: dict[Key, int] = {}
        self.free: list[int] = list(reversed(slots if slots is not None else range(capacity)))
        self.now = 0

    def __contains__(self, key: Key) -> bool:
        return key in self.slot_of

    def _make_room(self, pinned: Collection[Key], busy: Collection[Key]) -> tuple[int, Key | None]:
        if self.free:
            return self.free.pop(), None
        candidates = [k for k in self.slot_of if k not in pinned and k not in busy]
        if not candidates:
            raise NoVictim
        victim = self.policy.victim(candidates, self.now)
        if victim not in self.slot_of or victim in pinned or victim in busy:
            raise RuntimeError(f"policy {self.policy.name!r} chose {victim!r}, which is not an evictable resident")
        self.policy.evicted(victim)
        return self.slot_of.pop(victim), victim

    def access(self, key: Key, pinned: Collection[Key] = (), busy: Collection[Key] = ()) -> tuple[bool, int, Key | None]:
        """Serve one access: ``(hit, slot, evicted key or None)``; the clock advances by one."""
        now = self.now
        slot = self.slot_of.get(key)
        if slot is not None:
            self.policy.hit(key, now)
            self.now = now + 1
            return True, slot, None
        slot, victim = self._make_room(pinned, busy)
        self.slot_of[key] = slot
        self.policy.inserted(key, now)
        self.now = now + 1
        return False, slot, victim

    def insert(self, key: Key, pinned: Collection[Key] = (), busy: Collection[Key] = ()) -> tuple[int, Key | None]:
        """Insert without an access (a prefetch); the clock does not advance. Raises NoVictim."""
        slot, victim = self._make_room(pinned, busy)
        self.slot_of[key] = slot
        self.policy.inserted(key, self.now)
        return slot, victim

    def remove(self, key: Key) -> int:
        """Forget ``key`` (a failed load); its slot becomes free."""
        slot = self.slot_of.pop(key)
        self.policy.evicted(key)
        self.free.append(slot)
        return slot
