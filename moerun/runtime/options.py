"""``moerun.load`` and its settings, ``EngineOptions``: one frozen dataclass, checked in one place.

``load(model_dir, mem_cap="14MiB", evict="lru", ...)`` (the keyword form, the public API the README
shows) and ``load(model_dir, options=EngineOptions(mem_cap="14MiB", ...))`` are the same call: the
keywords build an ``EngineOptions``; given both, the keywords replace those fields of ``options``.
The settings are checked when the ``EngineOptions`` is made, before any file is opened, so a bad
setting costs no file access and leaves nothing open.
"""

from __future__ import annotations

import dataclasses
import os
from dataclasses import dataclass

import numpy as np

from moerun import policies
from moerun.errors import BadOption
from moerun.files.bundled import resolve_model
from moerun.files.ckpt_store import open_store
from moerun.files.profile import Profile, read_profile
from moerun.files.store import MECHANISMS, ModelStore
from moerun.files.trace import Trace
from moerun.model.tokenizer import Tokenizer
from moerun.runtime.budget import Budget, plan_budget
from moerun.runtime.engine import Engine
from moerun.runtime.guesses import AUTO_GUESSES
from moerun.runtime.memwatch import MemWatch
from moerun.runtime.pool import ExpertPool
from moerun.runtime.reader import STALL_TIMEOUT_S, Reader, reader_possible
from moerun.runtime.sources import BareExperts, NoReuseExperts, WholeLayerExperts
from moerun.units import parse_rate, parse_size

BASELINES = {"whole-layer": WholeLayerExperts, "no-reuse": NoReuseExperts}
EXPERT_SLOTS = ("auto", "stored", "float32")
DENSE_WEIGHTS = ("float32", "stored")


def _whole(v) -> bool:
    return isinstance(v, (int, np.integer)) and not isinstance(v, (bool, np.bool_))


@dataclass(frozen=True)
class EngineOptions:
    """How ``load`` builds an engine: every setting but the model directory.

    mem_cap: bytes (or "48MiB") for dense weights + KV cache + scratch + expert pool; None keeps
    every expert resident (stored as bytes once checked).  slots: explicit slots per layer
    (overrides split; stored as a tuple).  split: "even" per-layer quotas or "shared".
    evict: the eviction policy's name (moerun.policies).  prefetch: guesses per layer (0 = off), or "auto":
    moerun.runtime.guesses.AUTO_GUESSES guesses where the pool cannot hold every expert, each layer's guesses
    kept only while its account shows they pay (moerun.runtime.guesses.Account; ``prefetch_guesses``);
    lookahead: layers ahead; prefetch_from: "attention" or "output", the point the guesses are made.
    link_speed: bytes/s (or "2GB/s") of an emulated slower link (stored as bytes/s).
    cold: drop the model file from the page cache once, first.  cold_reads: every expert read
    comes from the device (each read range is dropped from the page cache right after it is copied).
    mechanism: the page-in read ("pread" and the others of moerun.files.store.MECHANISMS).
    bare: every expert resident in plain buffers, no pool (speed reference).
    tokenizer: load the tokenizer (False for a weights-only directory).
    baseline: "whole-layer" or "no-reuse", the naive offloading baselines of the benchmarks.
    reader_timeout: seconds the prefetch reader may go without progress while the engine waits
    before the engine stops it and reads every expert itself (docs/design/prefetch.md).
    routing: a routing trace (path or moerun.files.trace.Trace): each layer takes its chosen
    experts and weights from it instead of its router (moerun.model.routing).
    max_context: positions the KV cache (and a prompt) may hold: at most the model's context; None is
    the model's context, or for an open checkpoint at most moerun.files.ckpt_store.DEFAULT_CONTEXT.
    expert_slots: "auto", "stored" or "float32": how pool slots hold an open checkpoint's BF16/F16 experts
    (``widen_experts``).  dense_weights: "float32" (widened once) or "stored": an open checkpoint's dense
    matrices kept as stored, widened a block at a time at each use (half the memory; moerun.model.operands).
    warm_from: a routing profile (path or moerun.files.profile.Profile): the pool is filled with each layer's
    hottest experts (a shared pool: the hottest of all) before the first pass (``Engine.warm_start``).
    """

    mem_cap: int | str | None = None
    evict: str = "lru"
    prefetch: int | str = 0
    lookahead: int = 1
    prefetch_from: str = "attention"
    slots: tuple[int, ...] | None = None
    split: str = "even"
    link_speed: float | str | None = None
    cold: bool = False
    mechanism: str = "pread"
    bare: bool = False
    tokenizer: bool = True
    baseline: str | None = None
    reader_timeout: float = STALL_TIMEOUT_S
    routing: str | os.PathLike | Trace | None = None
    cold_reads: bool = False
    max_context: int | None = None
    expert_slots: str = "auto"
    dense_weights: str = "float32"
    warm_from: str | os.PathLike | Profile | None = None

    def __post_init__(self) -> None:
        self._check_types()
        self._check_values()
        if self.slots is not None:
            object.__setattr__(self, "slots", tuple(int(n) for n in self.slots))
        if self.mem_cap is not None:
            object.__setattr__(self, "mem_cap", parse_size(self.mem_cap, "memory cap"))
        if self.link_speed is not None:
            object.__setattr__(self, "link_speed", parse_rate(self.link_speed, "link speed"))

    def _check_types(self) -> None:
        """The API refuses a float lookahead or string slots with BadOption, as the CLI does."""
        for name in ("evict", "split", "mechanism", "expert_slots", "dense_weights"):
            v = getattr(self, name)
            if not isinstance(v, str):
                raise BadOption(f"{name} must be text, got {v!r:.40}")
        if self.baseline is not None and not isinstance(self.baseline, str):
            raise BadOption(f"baseline must be text or None, got {self.baseline!r:.40}")
        for name in ("prefetch", "lookahead"):
            v = getattr(self, name)
            if name == "prefetch" and isinstance(v, str) and v == "auto":
                continue
            if not _whole(v):
                raise BadOption(f"{name} must be a whole number{' or auto' if name == 'prefetch' else ''}, got {v!r:.40}")
        if self.max_context is not None and (not _whole(self.max_context) or self.max_context < 1):
            raise BadOption(f"--max-context must be a positive whole number of positions, got {self.max_context!r:.40}")
        slots = self.slots
        if slots is not None and (isinstance(slots, (str, bytes)) or not hasattr(slots, "__iter__")
                                  or not all(_whole(n) for n in slots)):
            raise BadOption(f"slots must be a list of whole numbers (slots per layer), got {slots!r:.60}")
        for name in ("cold", "bare", "tokenizer", "cold_reads"):
            v = getattr(self, name)
            if not isinstance(v, bool):
                raise BadOption(f"{name} must be True or False, got {v!r:.40}")

    def _check_values(self) -> None:
        """Each setting against what it may be: one BadOption naming the first one out of range."""
        policies.get(self.evict)
        if self.prefetch != "auto" and self.prefetch < 0:
            raise BadOption(f"--prefetch must be 0 (off) or a positive number of guesses, got {self.prefetch}")
        if self.prefetch_from not in ("attention", "output"):
            raise BadOption(f"prefetch point must be 'attention' or 'output', got {self.prefetch_from!r}")
        if self.lookahead < 1:
            raise BadOption(f"--lookahead must be at least 1, got {self.lookahead}")
        if self.mechanism not in MECHANISMS:
            raise BadOption(f"unknown page-in mechanism {self.mechanism!r}; known: {', '.join(MECHANISMS)}")
        if self.dense_weights not in DENSE_WEIGHTS:
            raise BadOption(f"dense weights must be one of {', '.join(DENSE_WEIGHTS)}, got {self.dense_weights!r:.40}")
        if self.expert_slots not in EXPERT_SLOTS:
            raise BadOption(f"expert slots must be one of {', '.join(EXPERT_SLOTS)}, got {self.expert_slots!r:.40}")
        if self.split not in ("even", "shared"):
            raise BadOption(f"split must be 'even' or 'shared', got {self.split!r}")
        t = self.reader_timeout
        if isinstance(t, bool) or not isinstance(t, (int, float)) or not t > 0:
            raise BadOption(f"reader_timeout must be a positive number of seconds, got {t!r:.40}")
        if self.slots is not None and self.split == "shared":
            raise BadOption("slots (per-layer quotas) and split='shared' (one pool for every layer) contradict each other; give one")
        if self.baseline is not None and self.baseline not in BASELINES:
            raise BadOption(f"unknown baseline {self.baseline!r}; known: {', '.join(BASELINES)}")
        w = self.warm_from
        if w is not None and not isinstance(w, (str, os.PathLike, Profile)):
            raise BadOption(f"warm_from must be a path to a routing profile (or a Profile), got {type(w).__name__}")
        if w is not None and (self.bare or self.baseline is not None):
            raise BadOption("a warm start fills the expert pool; --bare and the baselines have none")

    def engine_dict(self) -> dict:
        """The settings as ``Engine.options`` (and ``engine.stats["options"]``) show them."""
        return {
            "mem_cap": self.mem_cap,
            "evict": self.evict,
            "prefetch": self.prefetch,
            "prefetch_auto": self.prefetch == "auto",
            "lookahead": self.lookahead,
            "prefetch_from": self.prefetch_from,
            "link_speed": self.link_speed,
            "cold": self.cold,
            "cold_reads": self.cold_reads,
            "mechanism": self.mechanism,
            "bare": self.bare,
            "baseline": self.baseline,
            "routing": None,
            "warm_from": None,
        }


def parse_slot_list(text: str | None) -> list[int] | None:
    """``"3,4,3"`` (slots per layer, as --slots gives them) -> [3, 4, 3]; None stays None."""
    if text is None:
        return None
    try:
        slots = [int(s) for s in text.split(",") if s.strip()]
    except ValueError:
        raise BadOption(f"--slots takes whole numbers separated by commas, got {text!r}") from None
    if not slots:
        raise BadOption("--slots is empty")
    return slots


def check_against_config(prefetch: int | str, lookahead: int | None, config) -> None:
    """The prefetch settings only the model can refute: more guesses than experts, guesses past the last layer.
    ``auto`` fits any model (it guesses nothing where there is no later layer); a lookahead given with it is checked."""
    if prefetch == "auto":
        if lookahead is None or config.n_layers == 1:
            return
        prefetch = 1
    prefetch = prefetch or 0
    if prefetch > config.n_experts:
        raise BadOption(f"--prefetch {prefetch} is more than the model's {config.n_experts} experts per layer")
    if prefetch and config.n_layers == 1:
        raise BadOption(f"--prefetch {prefetch} has nothing to do: the model has one layer, so no later layer to guess for")
    lookahead = lookahead or 1
    if prefetch and lookahead >= config.n_layers:
        most = config.n_layers - 1
        raise BadOption(
            f"--lookahead {lookahead} reaches past the last layer: the model has {config.n_layers} layer(s), "
            + (f"so at most {most}" if most else "so there is no later layer to prefetch for")
        )


_FIELDS = frozenset(f.name for f in dataclasses.fields(EngineOptions))


def load(model_dir: str | os.PathLike | None = None, options: EngineOptions | None = None, **settings) -> Engine:
    """Open a model and return an engine (the public entry point, docs/guide/api.md).

    ``settings`` are the fields of ``EngineOptions`` given as keywords (``mem_cap="14MiB"``,
    ``evict="lru"``, ``prefetch=2``, ...); with ``options`` as well, they replace those fields of it.
    """
    if model_dir is not None and not isinstance(model_dir, (str, os.PathLike)):
        raise BadOption(f"model_dir must be a path, got {type(model_dir).__name__}")
    unknown = sorted(set(settings) - _FIELDS)
    if unknown:
        raise TypeError(f"load() got an unexpected keyword argument {unknown[0]!r}")
    if options is None:
        options = EngineOptions(**settings)
    elif not isinstance(options, EngineOptions):
        raise BadOption(f"options must be an EngineOptions (settings go by keyword), got {options!r:.40}")
    elif settings:
        options = dataclasses.replace(options, **settings)
    return open_engine(model_dir, options)


def widen_experts(o: EngineOptions) -> bool:
    """Whether an open checkpoint's BF16/F16 experts are held as float32 (widened once when read, twice the bytes
    of a BF16 slot) rather than as stored (widened at each use).  "auto": float32 when every expert is resident
    and there is no reader process (no cap, no slot list, no prefetch), where memory is not what is asked to be
    saved and each use would otherwise pay the widening again; as stored under a cap, where a slot of half the
    bytes holds twice the experts (scripts/bench_open.py has the measurements)."""
    if o.expert_slots != "auto":
        return o.expert_slots == "float32"
    return o.mem_cap is None and o.slots is None and (o.prefetch in (0, "auto") or o.bare or o.baseline is not None)


def prefetch_guesses(o: EngineOptions, config, budget: Budget) -> int:
    """Guesses per layer the engine makes: ``prefetch`` as given, or for "auto" AUTO_GUESSES (at most the experts
    per layer) where a guess can save a read: a pool that cannot hold every expert, a model of more than one layer,
    and neither --bare nor a baseline; else none (and no reader process)."""
    if o.bare or o.baseline is not None:
        return 0
    if o.prefetch != "auto":
        return o.prefetch
    if config.n_layers < 2 or (o.mem_cap is None and o.slots is None) or not reader_possible():
        return 0
    if sum(budget.slots) >= config.n_layers * config.n_experts:
        return 0
    return min(AUTO_GUESSES, config.n_experts)


def open_engine(model_dir, o: EngineOptions) -> Engine:
    """The engine of checked options: sizes the budget, allocates the pool, starts the reader if asked."""
    watch = MemWatch()
    profile = read_profile(o.warm_from) if o.warm_from is not None else None  # before the model is opened
    store = open_store(resolve_model(model_dir), o.max_context, widen=widen_experts(o),
                       stored_dense=o.dense_weights == "stored")
    reader = None
    try:
        c = store.config
        tok = Tokenizer.load(store.model_dir, c.vocab_size, c.bos_token_id) if o.tokenizer else None
        if o.cold or o.cold_reads:
            store.drop_cache()
        store.cold_reads = o.cold_reads
        store.set_mechanism(o.mechanism)
        chosen_split = list(o.slots) if o.slots is not None else o.split
        if o.dense_weights == "stored" and not getattr(store, "stored_dense", False):
            raise BadOption("--dense-weights stored is for open checkpoints read in place (their BF16 and F16 matrices); a "
                            "moerun model's dense weights are held as float32, a quantized checkpoint's too")
        if o.expert_slots == "float32" and not getattr(store.codec, "widened", False) and store.codec.name != "F32":
            raise BadOption(f"float32 expert slots are for open checkpoints' BF16 and F16 experts; this model's are {store.codec.name}")
        budget = plan_budget(c, store.dense_nbytes, store.expert_nbytes, o.mem_cap, chosen_split, store.codec.scratch_bytes(),
                             store.slot_nbytes)
        store.link_rate = o.link_speed
        guesses = prefetch_guesses(o, c, budget)
        if guesses > 0:  # guesses are read by the reader process
            reader = Reader(store, budget.n_slots, budget.slot, o.reader_timeout)
        experts = _expert_source(store, budget, o.evict, reader, o.bare, o.baseline, o.mem_cap is None)
        options = o.engine_dict()
        options["prefetch"] = guesses  # as made: "auto" is options["prefetch_auto"]
        engine = Engine(store, tok, budget, experts, reader, watch, options)
        if o.routing is not None:
            engine.replay_routing(o.routing)
        if profile is not None:
            profile.check_config(c)
            engine.warm_from(profile)
        return engine
    except BaseException:
        if reader is not None:
            reader.close()
        store.close()
        raise


def _expert_source(store: ModelStore, budget: Budget, evict: str, reader: Reader | None, bare: bool,
                   baseline: str | None, all_resident: bool):
    """Where the model gets its experts: the pool (the engine proper), or a reference without one.

    ``bare`` keeps every expert in plain buffers (the speed reference); a ``baseline`` is one of the naive
    offloading schemes the benchmarks compare against.  Without a cap the pool is filled up front.
    """
    if bare:
        return BareExperts(store)
    if baseline is not None:
        return BASELINES[baseline](store)
    pool = ExpertPool(store, budget, evict, reader)
    if all_resident:
        pool.preload_all()
    return pool
