"""Eviction policies, shared by the live pool and the trace replay simulator.

A policy sees the keys of one pool as small integers: the expert ids of a
layer (one pool per layer), or ``layer * n_experts + expert`` (one pool shared
by all layers), and a clock ``now`` that counts accesses.  The pool tells it
what was inserted, hit and evicted, and asks it to pick a victim among the
resident keys that may be evicted (never the experts pinned by the layer being
computed).  See docs/design/policy-interface.md.

State lives in plain lists indexed by key, so a notification is a list store
and a victim is one ``min`` over the candidates: no per-access allocation.
Lists grow on insertion (a hit is always on an inserted key), so a policy made
without ``n_keys`` works for any small non-negative keys.

Writing a policy::

    class MostRecent(Policy):
        name = "mru"
        def __init__(self, n_keys=0, shared_experts=0):
            super().__init__(n_keys, shared_experts)
            self.last = [0] * n_keys
        def inserted(self, key, now):
            grow(self.last, key)
            self.last[key] = now
        def hit(self, key, now):
            self.last[key] = now
        def victim(self, candidates, now):
            return max(candidates, key=self.last.__getitem__)

    register(MostRecent)
"""

from __future__ import annotations

from collections.abc import Callable

from moerun.policies._base import FIFO, LFU, LN2, LRFU, LRU, Key, Optimal, Policy, grow, make_policy
from moerun.policies._markov import Markov, _RoutingModel
from moerun.policies._orbit import Orbit

__all__ = ["FIFO", "LFU", "LN2", "LRFU", "LRU", "Key", "Markov", "Optimal", "Orbit", "Policy", "_RoutingModel", "get", "grow",
           "make_policy", "names", "register"]

_REGISTRY: dict[str, Callable[..., Policy]] = {}



def register(cls: type[Policy]) -> type[Policy]:
    """Make a policy available by its ``name`` (``--evict NAME``, ``replay --evict``)."""
    _REGISTRY[cls.name] = cls
    return cls


for _cls in (LRU, LFU, FIFO, Optimal, LRFU, Markov, Orbit):
    register(_cls)


def names(online_only: bool = False) -> list[str]:
    return [n for n, c in _REGISTRY.items() if not online_only or getattr(c, "online", True)]


def get(name: str) -> type[Policy]:
    from moerun.errors import BadOption

    cls = _REGISTRY.get(name)
    if cls is None:
        raise BadOption(f"unknown eviction policy {name!r}; known: {', '.join(names())}")
    return cls
