"""Which expert sits in which slot: the bookkeeping the live pool and the replay share.

``Residency`` holds the key -> slot map of one pool (one layer's quota, or
the whole shared pool), a clock that counts accesses, and an eviction policy.
The live pool wraps it with real buffers; ``moerun.sim.report`` and the planner
drive it with recorded routing.  Because both call the same ``access`` method
with the same pinning, a replay of a live run with prefetch off reproduces the
live hit and miss counts exactly.

Keys are small integers (see ``moerun.policies``).  Residents are kept in
insertion order, which is the order ties between equal scores are broken in.
``busy`` holds the keys whose slot has a background read outstanding: like
pinned keys, they are never victims.
"""

from __future__ import annotations

from collections.abc import Collection

from moerun.policies import Policy

Key = int


class NoVictim(Exception):
    """Every resident key is pinned or busy; the caller must wait or give up.  From ``access_step``,
    ``done`` holds the results of the accesses served before it."""

    def __init__(self, done: list | None = None):
        super().__init__()
        self.done = done if done is not None else []


class Residency:
    def __init__(self, capacity: int, policy: Policy, slots: list[int] | None = None):
        self.capacity = capacity
        self.policy = policy
        self.slot_of: dict[Key, int] = {}
        self.free: list[int] = list(reversed(slots if slots is not None else range(capacity)))
        self.now = 0
        self.busy: set[Key] = set()

    def __contains__(self, key: Key) -> bool:
        return key in self.slot_of

    def candidates(self, pinned: Collection[Key]) -> list[Key]:
        """Resident keys that may be evicted now (neither pinned nor busy), in insertion order."""
        busy = self.busy
        return [k for k in self.slot_of if k not in pinned and k not in busy]

    def victim(self, pinned: Collection[Key]) -> Key | None:
        """The key the policy would evict to make room (None while a slot is free). Raises NoVictim."""
        if self.free:
            return None
        victim = self.policy.pick(self.slot_of, pinned, self.busy, self.now)
        if victim is None:
            raise NoVictim
        if victim not in self.slot_of or victim in pinned or victim in self.busy:
            raise RuntimeError(f"policy {self.policy.name!r} chose {victim!r}, which is not an evictable resident")
        return victim

    def _take_slot(self, victim: Key | None) -> tuple[int, Key | None]:
        """A slot for a new key: a free one (``victim`` None) or the victim's."""
        if victim is None:
            return self.free.pop(), None
        self.policy.evicted(victim)
        return self.slot_of.pop(victim), victim

    def access(self, key: Key, pinned: Collection[Key] = ()) -> tuple[bool, int, Key | None]:
        """Serve one access: ``(hit, slot, evicted key or None)``; the clock advances by one."""
        now = self.now
        slot = self.slot_of.get(key)
        if slot is not None:
            self.policy.hit(key, now)
            self.now = now + 1
            return True, slot, None
        slot, victim = self._take_slot(self.victim(pinned))
        self.slot_of[key] = slot
        self.policy.inserted(key, now)
        self.now = now + 1
        return False, slot, victim

    def access_step(self, keys: list[Key], pinned: Collection[Key], done: list | None = None) -> list:
        """Serve a step's accesses in order, as ``access`` does one: ``[(hit, slot, victim), ...]``.
        ``done`` continues a step that raised NoVictim (its results so far).

        The decode path: looked up once per step, not per access (the policy's ``hit``, ``out.append``),
        and the clock stored once per step."""
        if done is None:
            out = []
            todo = keys
        else:
            out = done
            todo = keys[len(done):]
        slot_of, policy = self.slot_of, self.policy
        hit = policy.hit
        append = out.append
        now = self.now
        try:
            for key in todo:
                slot = slot_of.get(key)
                if slot is not None:
                    hit(key, now)
                    append((True, slot, None))
                else:
                    free = self.free
                    if free:  # victim() and _take_slot(), inline
                        slot, victim = free.pop(), None
                    else:
                        busy = self.busy
                        victim = policy.pick(slot_of, pinned, busy, now)
                        if victim is None:
                            raise NoVictim(out)
                        if victim not in slot_of or victim in pinned or victim in busy:
                            raise RuntimeError(f"policy {policy.name!r} chose {victim!r}, which is not an evictable resident")
                        policy.evicted(victim)
                        slot = slot_of.pop(victim)
                    slot_of[key] = slot
                    policy.inserted(key, now)
                    append((False, slot, victim))
                now += 1
        finally:
            self.now = now  # the accesses served (all of them, or those before an exception)
        return out

    def insert(self, key: Key, pinned: Collection[Key] = ()) -> tuple[int, Key | None]:
        """Insert without an access (a prefetch); the clock does not advance. Raises NoVictim."""
        return self.place(key, self.victim(pinned))

    def place(self, key: Key, victim: Key | None) -> tuple[int, Key | None]:
        """Insert without an access in place of ``victim``, a key ``victim()`` chose (None: a free slot)."""
        slot, victim = self._take_slot(victim)
        self.slot_of[key] = slot
        self.policy.inserted(key, self.now)
        return slot, victim

    def remove(self, key: Key) -> int:
        """Forget ``key`` (a failed or skipped load); its slot becomes free."""
        slot = self.slot_of.pop(key)
        self.busy.discard(key)
        self.policy.evicted(key)
        self.free.append(slot)
        return slot
