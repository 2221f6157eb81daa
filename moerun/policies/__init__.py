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
without ``n_keys`` works for any small non-negative keys.  The pool asks for a
victim through ``Policy.pick``, which lists the candidates and asks ``victim``;
the built-in rules override it to reach the same key without that list
(docs/design/policy-interface.md).

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

A package can also declare policies for every program that uses moerun, through the packaging
entry-point convention (group ``moerun.policies``, docs/design/policy-interface.md): they are found by
name without importing anything (``plugins``), and imported the first time that name is asked for.
"""

from __future__ import annotations

from collections.abc import Callable

from moerun.policies._base import FIFO, LFU, LN2, LRFU, LRU, Key, Optimal, Policy, grow, make_policy
from moerun.policies._markov import Markov, _RoutingModel
from moerun.policies._orbit import Orbit

__all__ = ["ENTRY_POINT_GROUP", "FIFO", "LFU", "LN2", "LRFU", "LRU", "Key", "Markov", "Optimal", "Orbit", "Policy", "_RoutingModel",
           "get", "grow", "listing", "make_policy", "names", "plugins", "register"]

_REGISTRY: dict[str, Callable[..., Policy]] = {}

# The entry-point group in which installed packages declare policies (the PyPA "Entry points
# specification": name = the policy's --evict name, object reference = its Policy subclass).
ENTRY_POINT_GROUP = "moerun.policies"
_PLUGINS: dict[str, type[Policy]] = {}  # plug-ins imported so far, by name
_declared: dict[str, list] | None = None  # name -> [(entry point, "distribution version")], read once


def register(cls: type[Policy]) -> type[Policy]:
    """Make a policy available by its ``name`` (``--evict NAME``, ``replay --evict``)."""
    _REGISTRY[cls.name] = cls
    return cls


for _cls in (LRU, LFU, FIFO, Optimal, LRFU, Markov, Orbit):
    register(_cls)


def names(online_only: bool = False) -> list[str]:
    return [n for n, c in _REGISTRY.items() if not online_only or getattr(c, "online", True)]


def _declared_plugins() -> dict[str, list]:
    """The policies installed packages declare (entry points of ENTRY_POINT_GROUP), read once, none imported.
    Metadata that cannot be read gives one warning and no plug-ins: the built-in policies never depend on it."""
    global _declared
    if _declared is None:
        found: dict[str, list] = {}
        try:
            from importlib.metadata import entry_points

            for ep in entry_points(group=ENTRY_POINT_GROUP):
                dist = getattr(ep, "dist", None)
                label = f"{dist.name} {dist.version}" if dist is not None else ep.value
                found.setdefault(ep.name, []).append((ep, label))
        except Exception as e:  # noqa: BLE001 - a damaged installed package must not stop moerun
            import warnings

            warnings.warn(f"policy plug-ins not read: the installed packages' entry points cannot be read ({_first_line(e)})",
                          stacklevel=2)
        _declared = found
    return _declared


def _first_line(e: BaseException) -> str:
    text = str(e).splitlines()[0][:200] if str(e) else ""
    return f"{type(e).__name__}: {text}" if text else type(e).__name__


def plugins() -> list[tuple[str, str]]:
    """``(name, "distribution version")`` of each policy an installed package declares, none imported.
    A name that a registered policy already has is left out: the registered one is used."""
    return [(name, ", ".join(label for _, label in eps)) for name, eps in _declared_plugins().items() if name not in _REGISTRY]


def listing(online_only: bool = False) -> str:
    """The policies for ``--help``: the registered ones (``online_only``: those the live engine runs), then
    the installed plug-ins, each marked with its package (plug-ins are not imported to list them)."""
    return ", ".join(names(online_only) + [f"{name} (plug-in: {label})" for name, label in plugins()])


def _load_plugin(name: str) -> type[Policy] | None:
    """The plug-in policy ``name``, imported now (None: no installed package declares it).  Anything wrong
    with it is one BadOption naming the plug-in and its package, never a traceback."""
    from moerun.errors import BadOption

    eps = _declared_plugins().get(name)
    if not eps:
        return None
    if len(eps) > 1:
        raise BadOption(f"eviction policy {name!r} is declared by more than one installed package "
                        f"({'; '.join(label for _, label in eps)}); uninstall all but one")
    ep, label = eps[0]
    where = f"plug-in policy {name!r} ({label}, {ep.value})"
    try:
        obj = ep.load()
    except (Exception, SystemExit) as e:  # noqa: BLE001 - a broken plug-in is one line, whatever it raised
        raise BadOption(f"{where} cannot be loaded: {_first_line(e)}") from None
    if not (isinstance(obj, type) and issubclass(obj, Policy)):
        raise BadOption(f"{where} is not a subclass of moerun.policies.Policy")
    if getattr(obj, "name", None) != name:
        raise BadOption(f"{where}: its class is named {getattr(obj, 'name', None)!r}; set name = {name!r} in the class")
    _PLUGINS[name] = obj
    return obj


def get(name: str) -> type[Policy]:
    """The policy class of ``name``: a registered policy, or an installed plug-in (imported on first use)."""
    from moerun.errors import BadOption

    cls = _REGISTRY.get(name) or _PLUGINS.get(name)
    if cls is None:
        cls = _load_plugin(name)
    if cls is None:
        raise BadOption(f"unknown eviction policy {name!r}; known: {', '.join(names() + [n for n, _ in plugins()])}")
    return cls
