"""The engine: a model with its store, pool, prefetcher and tokenizer.

``load(model_dir, mem_cap=...)`` (moerun.runtime.options) sizes the budget, allocates the pool once,
starts the prefetch reader process if asked, and returns an ``Engine`` whose
``logits`` and ``generate`` run the numpy transformer with experts served by
the pool.  ``engine.stats`` holds the run's measured figures.
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from moerun.errors import BadModelFile, BadOption
from moerun.files.bundled import DEFAULT, bundled_root, resolve_model
from moerun.files.config import RANDOM_NOTE
from moerun.files.store import ModelStore
from moerun.files.trace import TRACE_GUESSES, TRACE_LOOKAHEAD, Recorder, Trace, read_trace
from moerun.model.routing import ReplayedRouting
from moerun.model.sampling import Sampler, Sampling
from moerun.model.tokenizer import Tokenizer
from moerun.model.transformer import NO_OBSERVER, PREFILL_CHUNK, KVCache, StepObserver, Transformer
from moerun.runtime.budget import Budget
from moerun.runtime.guesses import Account, Gate
from moerun.runtime.memwatch import MemWatch
from moerun.runtime.pool import ExpertPool
from moerun.runtime.prefetch import GuessRule, Prefetcher
from moerun.runtime.reader import Reader

BUNDLED_MODEL = bundled_root() / DEFAULT


def default_model_dir() -> Path:
    """``$MOERUN_MODEL`` if set, else the bundled default model (moerun.files.bundled)."""
    return resolve_model(None)


@dataclass
class Generation:
    prompt_ids: list[int]
    new_ids: list[int]
    text: str
    stop: str  # "max-new", "context-full" or "eos" (the model's end-of-sequence token was generated; it is kept in new_ids)
    prefill_ns: int
    decode_ns: int
    decode_steps: int
    logits: list[np.ndarray] = field(default_factory=list)  # kept only when asked

    @property
    def prefill_tok_s(self) -> float:
        return len(self.prompt_ids) / (self.prefill_ns / 1e9) if self.prefill_ns else 0.0

    @property
    def decode_tok_s(self) -> float:
        return self.decode_steps / (self.decode_ns / 1e9) if self.decode_ns else 0.0


class _Observers(StepObserver):
    """Several step observers, each shown every hidden state in the order given."""

    def __init__(self, observers):
        self.observers = tuple(observers)

    def after_attention(self, layer: int, h: np.ndarray) -> None:
        for o in self.observers:
            o.after_attention(layer, h)

    def after_layer(self, layer: int, x: np.ndarray) -> None:
        for o in self.observers:
            o.after_layer(layer, x)


class Engine:
    def __init__(
        self,
        store: ModelStore,
        tokenizer: Tokenizer | None,
        budget: Budget,
        experts,
        reader: Reader | None,
        memwatch: MemWatch,
        options: dict,
    ):
        self.store = store
        self.config = store.config
        self.tokenizer = tokenizer
        self.budget = budget
        self.experts = experts
        self.pool = experts if isinstance(experts, ExpertPool) else None
        self.model = Transformer(store.config, store.dense, store.embed)
        store.release_dense(f"layers.{layer}.{part}" for layer in range(store.config.n_layers)
                            for part in ("attn.wq", "attn.wk", "attn.wv"))  # now held once, fused as wqkv
        self.cache = KVCache(store.config)
        self.memwatch = memwatch
        self.options = options
        self.recorder: Recorder | None = None
        self._recorder_rule: GuessRule | None = None
        self._step_clock = 0
        self.prefetch_from = options.get("prefetch_from", "attention")
        self.prefetcher = None
        if self.pool is not None and options.get("prefetch"):
            rule = GuessRule(self.model, options["lookahead"])
            self.prefetcher = Prefetcher(self.pool, rule, options["prefetch"], options["lookahead"], reader,
                                         self.prefetch_from)
            if options.get("prefetch_auto"):  # each layer's guesses kept only while they pay, and only while steps gain
                self.pool.account = self.pool.stats.account = Account(store.config.n_layers)
                self.prefetcher.gate = self.pool.stats.gate = Gate()
        self.routing = None  # the forward pass's routing: None for the model's own routers, or a ReplayedRouting
        self._warm: list | None = None  # a warm start not made yet: (layer, expert) pairs, hottest first

    def warm_from(self, profile) -> None:
        """Fill the pool from a routing profile (moerun.files.profile) before the next pass (``warm_start``)."""
        from moerun.runtime.decisions import hottest

        if self.pool is None:
            raise BadOption("a warm start fills the expert pool; this engine has none")
        self._warm = hottest(profile.counts)
        self.options["warm_from"] = profile.path or "routing profile"

    def warm_start(self) -> int:
        """Make the warm start now, if one is waiting: the experts read (0 if none).  ``generate`` calls it inside
        its first call's prefill time (so the fill is part of the time to the first token and of ``prefill_s``),
        ``logits`` before its pass; its own time is ``stats["pool"]["warm_s"]``."""
        if self._warm is None:
            return 0
        ranked, self._warm = self._warm, None
        return self.pool.warm(ranked)

    def replay_routing(self, routing) -> None:
        """Take every layer's routing from a trace (a path or a Trace) from now on (moerun.model.routing)."""
        label = str(routing) if not isinstance(routing, Trace) else "routing trace"
        trace = routing if isinstance(routing, Trace) else read_trace(routing, model=(self.config.n_layers, self.config.n_experts, self.config.top_k))
        self.routing = ReplayedRouting(trace, self.config, label)
        self.options["routing"] = label

    # ------------------------------------------------------------------ what observes a forward pass
    def _observer(self) -> StepObserver:
        """The prefetch point, then the trace recorder's guesses; NO_OBSERVER when neither is needed."""
        watching = []
        if self.prefetcher is not None and self.pool._all_resident is None:  # with every expert resident, nothing to fetch
            watching.append(self.prefetcher)
        if self.recorder is not None:
            watching.append(self.recorder)
        if not watching:
            return NO_OBSERVER
        return watching[0] if len(watching) == 1 else _Observers(watching)

    def guesses(self, layer: int, h: np.ndarray, lookahead: int, n: int) -> np.ndarray:
        """The prefetch rule for every row of h: [T, lookahead, n] expert ids, -1 past the last layer."""
        rule = self._recorder_rule
        if rule is None or rule.lookahead < lookahead:
            rule = self._recorder_rule = GuessRule(self.model, lookahead)
        return rule.table(layer, h, lookahead, n)

    # ------------------------------------------------------------------ passes
    def _check_ids(self, ids) -> np.ndarray:
        bad = BadOption(f"token ids must be whole numbers in 0..{self.config.vocab_size - 1} (a list or an integer array)")
        if isinstance(ids, (str, bytes)):
            raise bad
        try:
            raw = np.asarray(ids)
            if raw.dtype.kind == "O":  # Python integers beyond int64, or mixed objects
                raw = np.asarray(ids, dtype=np.int64)
        except (ValueError, TypeError, OverflowError):
            raise bad from None
        if raw.size and (raw.dtype.kind not in "iuf" or (raw.dtype.kind == "f" and not (
                np.isfinite(raw).all() and np.array_equal(raw, np.trunc(raw)) and np.abs(raw).max() < 2**62))):
            raise bad  # text, booleans, fractions, NaN, infinities
        ids = raw.astype(np.int64).reshape(-1)
        if ids.size == 0:
            raise BadOption("need at least one token")
        if ids.size > self.config.max_seq_len:
            raise BadOption(f"{ids.size} tokens exceed the model's context of {self.config.max_seq_len}")
        if ids.min() < 0 or ids.max() >= self.config.vocab_size:
            raise BadOption(f"token ids must lie in 0..{self.config.vocab_size - 1}")
        return ids

    def _finite(self, logits: np.ndarray) -> np.ndarray:
        """The one check every command's numbers pass (generate, logits, score, record, verify): non-finite
        logits mean damaged or overflowing weights; never report numbers computed from them."""
        if not np.isfinite(logits).all():
            raise BadModelFile(
                f"{self.store.path}: the model computed non-finite logits; its weights are damaged or overflow float32"
            )
        return logits

    def logits(self, token_ids) -> np.ndarray:
        """Float32 logits [len, vocab_size] from one forward pass over the sequence."""
        ids = self._check_ids(token_ids)
        self.warm_start()
        self.experts.begin_step(-1)
        x = self.model.forward(ids, 0, self.cache, self.experts, self.routing, self._observer())
        self.store.check_unchanged()
        return self._finite(self.model.logits(x))

    def logits_in_passes(self, token_ids) -> Iterator[np.ndarray]:
        """The logits of ``logits``, ``PREFILL_CHUNK`` rows at a time: one forward pass over the sequence, then the
        output matrix applied to one pass's rows after another, so only one pass's logits exist at once (the
        budget's scratch counts one; a 4096-token window of a 150k vocabulary would take 2.5 GB at once)."""
        ids = self._check_ids(token_ids)
        self.warm_start()
        self.experts.begin_step(-1)
        x = self.model.forward(ids, 0, self.cache, self.experts, self.routing, self._observer())
        self.store.check_unchanged()
        for r0 in range(0, len(ids), PREFILL_CHUNK):
            yield self._finite(self.model.logits(x[r0 : r0 + PREFILL_CHUNK]))

    def generate(
        self,
        prompt: str | None = None,
        prompt_ids: list[int] | None = None,
        max_new: int = 64,
        sampling: Sampling | None = None,
        on_token=None,
        keep_logits: bool = False,
    ) -> Generation:
        """Prefill the prompt, then decode up to ``max_new`` tokens (stops early when the context is full, or at
        one of the model's end-of-sequence tokens: an open checkpoint's ``eos_token_id``)."""
        if isinstance(max_new, bool) or not isinstance(max_new, int):
            raise BadOption(f"max_new must be a whole number of tokens, got {max_new!r:.40}")
        if max_new < 0:
            raise BadOption(f"--max-new must be zero or more, got {max_new}")
        if prompt_ids is None:
            if self.tokenizer is None:
                raise BadOption("this engine has no tokenizer; pass prompt_ids")
            # encoded only as far as the context reaches: a prompt that cannot fit is refused without encoding it whole
            prompt_ids = self.tokenizer.encode_prompt(prompt or "", self.config.max_seq_len)[1]
        if not prompt_ids:
            bos = self.config.bos_token_id
            prompt_ids = [bos if bos is not None else 0]
        ids = self._check_ids(prompt_ids)
        sampler = Sampler(sampling or Sampling())
        kept: list[np.ndarray] = []
        t0 = time.monotonic_ns()
        self.warm_start()  # charged to the prefill: part of the time to the first token
        observer = self._observer()
        self.experts.begin_step(-1)
        x = self.model.forward(ids, 0, self.cache, self.experts, self.routing, observer)
        # The model file is checked after every read on this thread (the store does it); the reader process's
        # reads are covered by a check after each pass that may have used them (they were done before it
        # ended), and every call ends with one.  Without a reader nothing else reads during decode, and a
        # check per pass (an fstat: about 1% of a resident decode step here) would buy nothing.
        check_each_pass = self.prefetcher is not None and self.prefetcher.reader is not None
        self.store.check_unchanged()
        logits = self._finite(self.model.logits(x[-1:])[0])
        prefill_ns = time.monotonic_ns() - t0
        self.memwatch.sample()
        if keep_logits:
            kept.append(logits.copy())
        new: list[int] = []
        pos = len(ids)
        stop = "max-new"
        eos = set(self.config.eos_token_ids)
        decode_ns = 0
        steps = 0
        while len(new) < max_new:
            tok = sampler(logits)
            new.append(tok)
            if on_token is not None:
                on_token(tok)
            if tok in eos:
                stop = "eos"
                break
            if len(new) == max_new:
                break
            if pos >= self.config.max_seq_len:
                stop = "context-full"
                break
            t1 = time.monotonic_ns()
            self.experts.begin_step(self._step_clock)
            self._step_clock += 1  # never repeats across generations, so stale guesses stay stale
            x = self.model.forward(np.array([tok]), pos, self.cache, self.experts, self.routing, observer)
            if check_each_pass:
                self.store.check_unchanged()
            logits = self._finite(self.model.logits(x)[0])
            decode_ns += time.monotonic_ns() - t1
            steps += 1
            pos += 1
            if keep_logits:
                kept.append(logits.copy())
            if steps % 32 == 0:
                self.memwatch.sample()
        self.store.check_unchanged()  # every call ends with one
        self.memwatch.sample()
        text = self.tokenizer.decode(new) if self.tokenizer is not None else ""
        gen = Generation(list(map(int, ids)), new, text, stop, prefill_ns, decode_ns, steps, kept)
        self.last = gen
        return gen

    # ------------------------------------------------------------------ tracing
    def start_trace(self, lookahead: int = TRACE_LOOKAHEAD, n_guesses: int = TRACE_GUESSES) -> None:
        n_guesses = min(n_guesses, self.config.n_experts)  # a model with fewer experts has fewer guesses to give
        self.recorder = Recorder(self.config.n_layers, self.config.top_k, lookahead, n_guesses, self.guesses)
        self.experts.recorder = self.recorder

    def finish_trace(self, partial: bool = False, extra: dict | None = None) -> Trace:
        rec = self.recorder
        self.recorder = None
        self.experts.recorder = None
        meta = {
            "source": "moerun",
            "model": self.config.name,
            "n_experts": self.config.n_experts,
            "top_k": self.config.top_k,
            "expert_bytes": self.store.expert_nbytes,
            "evict": self.options.get("evict"),
            "slots": list(self.budget.slots),
            "split": self.budget.split,
            "prefetch": self.options.get("prefetch", 0),
            "lookahead": self.options.get("lookahead", 1),
            "link_speed_emulated": self.options.get("link_speed"),
            "partial": partial,
            **({"warm_from": self.options["warm_from"]} if self.options.get("warm_from") else {}),
            **({"synthetic": True, "note": RANDOM_NOTE} if self.config.extra.get("synthetic") else {}),
            **(extra or {}),
        }
        return rec.to_trace(meta)

    # ------------------------------------------------------------------ stats
    @property
    def stats(self) -> dict:
        out = {
            "budget": self.budget.to_json(),
            "peak_rss_growth_bytes": self.memwatch.peak_growth(),
            "options": dict(self.options),
        }
        if self.pool is not None:
            out["pool"] = self.pool.stats.to_json()
        if self.prefetcher is not None and self.prefetcher.reader is not None:
            out["reader_alive"] = self.prefetcher.alive
            out["reader_rss_bytes"] = self.prefetcher.reader.rss_bytes()
        return out

    def close(self) -> None:
        if self.prefetcher is not None:
            self.prefetcher.close()
            self.prefetcher = None
        self.store.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
