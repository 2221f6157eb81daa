"""``moerun.inspect``, ``moerun.verify`` and ``moerun.score``: what a model directory holds, bit-exactness of
offloaded runs, and perplexity under a cap.

Each returns a result whose ``to_json()`` is what the command's ``--json`` prints; errors are
``moerun.errors``; progress goes to the callback given, never to a stream.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from moerun.checks.contents import check_digests, check_files, describe
from moerun.checks.score import Score, n_windows, score_text
from moerun.checks.verify import Outcome, Setting
from moerun.checks.verify import verify as verify_settings
from moerun.errors import BadInput, BadOption
from moerun.files.bundled import resolve_model
from moerun.files.ckpt_config import is_open_checkpoint
from moerun.files.ckpt_store import open_store
from moerun.files.config import RANDOM_NOTE as CONFIG_NOTE
from moerun.files.config import ModelConfig
from moerun.files.store import ModelStore
from moerun.model.sampling import Sampling
from moerun.model.tokenizer import Tokenizer, read_text_file
from moerun.runtime.budget import fixed_bytes, minimum_cap
from moerun.runtime.capcheck import cap_check, cap_warning
from moerun.runtime.options import EngineOptions, check_against_config, load, parse_slot_list
from moerun.units import parse_rate, parse_size

RANDOM_NOTE = f"{CONFIG_NOTE} and the text is noise"  # what a run of random weights needs said

# ---------------------------------------------------------------------------------------------- inspect


@dataclass
class InspectResult:
    """A model directory: its config, every file checked, sizes in the file and in memory, the layout, the
    smallest caps, every tensor; with ``check``, the digests compared."""

    model_dir: str
    config: ModelConfig
    file_bytes: int
    header_bytes: int
    dense_file_bytes: int
    dense_memory_bytes: int
    d_shared: int
    norm_topk: bool
    shared_expert_file_bytes: int
    shared_expert_memory_bytes: int
    expert_bytes: int
    expert_storage: str
    experts_total_bytes: int
    expert_share: float  # of the weights' bytes in the file
    kv_cache_bytes: int
    scratch_bytes: int
    min_cap_even_bytes: int
    min_cap_shared_bytes: int
    experts_region: list[int]  # [first byte, end] of the experts in the weights file
    experts_in_layer_order: bool
    synthetic: bool
    files: dict[str, str]  # file name -> what reading it found
    tensors: list[dict]  # name, dtype, shape, offset, bytes; in file order
    note: str | None = None
    check: dict | None = None  # {"checked", "recorded", "differ"} with check=True

    @property
    def ok(self) -> bool:
        """False when the digests were checked and one differs, or the file records none (exit code 1)."""
        return self.check is None or (self.check["recorded"] and not self.check["differ"])

    def to_json(self) -> dict:
        doc = {name: getattr(self, name) for name in self.__dataclass_fields__ if name not in ("note", "check")}
        doc["config"] = self.config.to_json()
        if self.note is not None:
            doc["note"] = self.note
        if self.check is not None:
            doc["check"] = self.check
        return doc


@dataclass
class CheckpointInspectResult:
    """What ``inspect`` finds in an open checkpoint: its architecture, shards, expert layout and spans, and the
    bytes as stored and as the engine holds them.  ``check``: an open checkpoint records no digests."""

    model_dir: str
    config: ModelConfig  # as the engine runs it (routed layers numbered in stack order)
    checkpoint: dict  # moerun.files.checkpoint.Checkpoint.summary()
    first_expert: dict  # layer 0's expert 0: its parts (file, offset, bytes) and its reads
    dense_memory_bytes: int
    expert_bytes: int  # one routed expert as stored (what a page-in reads)
    expert_storage: str
    experts_total_bytes: int
    kv_cache_bytes: int
    scratch_bytes: int
    min_cap_even_bytes: int
    min_cap_shared_bytes: int
    check: dict | None = None

    @property
    def ok(self) -> bool:
        return self.check is None or (self.check["recorded"] and not self.check["differ"])

    def to_json(self) -> dict:
        doc = {name: getattr(self, name) for name in self.__dataclass_fields__ if name != "check"}
        doc["config"] = self.config.to_json()
        doc["kind"] = "open checkpoint"
        if self.check is not None:
            doc["check"] = self.check
        return doc


def _inspect_checkpoint(model_dir: Path, check: bool) -> CheckpointInspectResult:
    store = open_store(model_dir)
    try:
        c, ck = store.config, store.checkpoint
        sp = store.spans[0][0]
        files = ck.files
        budget_args = (c, store.dense_nbytes, store.expert_nbytes)
        scratch = store.codec.scratch_bytes()
        d, kv, s = fixed_bytes(c, store.dense_nbytes, scratch)
        return CheckpointInspectResult(
            model_dir=str(model_dir), config=c, checkpoint=ck.summary(),
            first_expert={
                "layer": c.routed_blocks()[0], "expert": 0,
                "parts": [{"tensor": p.tensor, "file": files[p.file].name, "offset": p.offset, "bytes": p.nbytes,
                           "dtype": p.dtype, "shape": list(p.shape)} for p in sp.parts],
                "reads": [{"file": files[r.file].name, "offset": r.offset, "bytes": r.nbytes} for r in sp.reads],
            },
            dense_memory_bytes=store.dense_nbytes, expert_bytes=store.expert_nbytes, expert_storage=store.codec.name,
            experts_total_bytes=store.expert_total_nbytes, kv_cache_bytes=kv, scratch_bytes=s,
            min_cap_even_bytes=minimum_cap(*budget_args, "even", scratch),
            min_cap_shared_bytes=minimum_cap(*budget_args, "shared", scratch),
            check={"checked": 0, "recorded": False, "differ": []} if check else None,
        )
    finally:
        store.close()


def inspect(model_dir: str | os.PathLike | None = None, *, check: bool = False) -> InspectResult | CheckpointInspectResult:
    """What is in a model directory and where each byte lives (``moerun inspect``); every file of the directory is
    read as the other jobs read it (BadModelFile otherwise).  ``check``: compare every tensor with its recorded digest.
    An open checkpoint gives a ``CheckpointInspectResult``."""
    model_dir = resolve_model(model_dir)
    if is_open_checkpoint(model_dir):
        return _inspect_checkpoint(model_dir, check)
    store = ModelStore.open(model_dir)
    try:
        doc = describe(store, check_files(store))
        doc["config"] = store.config
        if check:
            bad, checked = check_digests(store)
            doc["check"] = {"checked": checked, "recorded": checked > 0, "differ": bad}
    finally:
        store.close()
    return InspectResult(**doc)


# ---------------------------------------------------------------------------------------------- verify


@dataclass
class VerifyResult:
    """Each setting's run against the fully resident one: ``ok`` when every logit and token was the same bits."""

    ok: bool
    prompts: int
    max_new: int
    min_cap: int
    resident_cap: int
    resident_slots: list[int]
    outcomes: list[Outcome]
    note: str | None = None  # a synthetic model's warning
    # what the runs were compared with: "resident" (every expert resident) or "whole-layer" (each layer's experts
    # all read when it runs, one layer's worth at a time: a model too large for the memory available)
    reference: str = "resident"

    def to_json(self) -> dict:
        return {
            "ok": self.ok,
            **({"note": self.note} if self.note is not None else {}),
            "reference": self.reference,
            "prompts": self.prompts,
            "max_new": self.max_new,
            "min_cap": self.min_cap,
            "resident_cap": self.resident_cap,
            "resident_slots": self.resident_slots,
            "results": [
                {
                    "setting": o.setting.label,
                    "options": o.setting.kwargs,
                    "slots": o.slots,
                    "logits_equal": o.logits_equal,
                    "tokens_equal": o.tokens_equal,
                    "max_abs_diff": o.max_abs_diff,
                    "hit_rate": o.hit_rate,
                }
                for o in self.outcomes
            ],
        }


def default_prompts(model_dir: Path, tok: Tokenizer, n: int) -> list[list[int]]:
    held = model_dir / "heldout.txt"
    if held.exists():
        text = read_text_file(held)
        docs = [d for d in text.split("\n\n") if d.strip()]
        picks = [docs[i * len(docs) // max(n, 1)] for i in range(n)] if docs else []
        return [tok.encode(d[:160]) for d in picks]
    return [tok.encode(s) for s in ("", "a", "hello")[:n]]


_SETTINGS = ("mem_cap", "evict", "prefetch", "lookahead", "prefetch_from", "slots", "split", "link_speed", "cold")


def _given_setting(c, settings: dict) -> list[Setting] | None:
    """The offloaded setting asked for, or None for verify's own set of settings.

    Offloading settings without a cap would compare the resident engine with itself: refused, not passed.
    """
    unknown = sorted(set(settings) - set(_SETTINGS))
    if unknown:
        raise TypeError(f"verify() got an unexpected keyword argument {unknown[0]!r}")
    kw = {"mem_cap": None, "evict": "lru", "prefetch": 0, "lookahead": 1, "prefetch_from": "attention", "slots": None,
          "split": "even", "link_speed": None, "cold": False}
    kw.update({k: v for k, v in settings.items() if v is not None})
    offloads = bool(kw["mem_cap"] or kw["slots"])
    given = [flag for flag, on in (("--evict", kw["evict"] != "lru"), ("--prefetch", kw["prefetch"]),
                                   ("--link-speed", kw["link_speed"]), ("--shared-pool", kw["split"] == "shared"),
                                   ("--cold", kw["cold"])) if on]
    if given and not offloads:  # every expert resident: the run would be compared with itself
        raise BadOption(
            f"{' and '.join(given)} offload{'s' if len(given) == 1 else ''} nothing without --mem-cap or --slots: "
            "verify would compare the resident engine with itself; add --mem-cap SIZE"
        )
    if not offloads:
        return None
    check_against_config(kw["prefetch"], kw["lookahead"], c)
    kw["mem_cap"] = parse_size(kw["mem_cap"], "memory cap") if kw["mem_cap"] else None
    if kw["link_speed"]:
        kw["link_speed"] = parse_rate(kw["link_speed"], "link speed")
    if isinstance(kw["slots"], str):
        kw["slots"] = parse_slot_list(kw["slots"])
    elif kw["slots"] is not None:
        kw["slots"] = list(kw["slots"])
    return [Setting("as given", kw)]


def verify(model_dir: str | os.PathLike | None = None, prompt: str | None = None, *, prompt_file=None,
           prompts: int = 3, max_new: int = 24, temperature: float = 0.8, top_p: float = 0.95, seed: int = 0,
           max_context: int | None = None, progress: Callable[[int, int, str], None] | None = None,
           **settings) -> VerifyResult:
    """Run the same prompts fully resident and offloaded, and compare logits and tokens bit for bit (``moerun verify``).

    ``prompt`` (or the text of ``prompt_file``): one prompt; otherwise ``prompts`` held-out ones.
    ``settings``: one offloaded setting to compare, as ``load`` takes it (``mem_cap``, ``slots``, ``evict``,
    ``prefetch``, ``lookahead``, ``prefetch_from``, ``split``, ``link_speed``, ``cold``); without ``mem_cap``
    or ``slots``, verify's own set of caps, policies and prefetch settings.
    ``max_context``: the KV cache's positions in every run, the reference included (``load``'s).
    ``progress(done, total, setting)`` before each setting.  ``ok`` is False on any difference.
    """
    model_dir = resolve_model(model_dir)
    EngineOptions(max_context=max_context)  # checked before anything is opened
    store = open_store(model_dir, max_context)
    c = store.config
    store.close()
    tok = Tokenizer.load(model_dir, c.vocab_size, c.bos_token_id)
    if prompt is not None or prompt_file:
        # refused as generate refuses it (a cut prompt is not the one asked about), read only as far as the context
        if prompt_file:
            ids = [tok.encode_prompt(context=c.max_seq_len, path=prompt_file)[1]]
        else:
            ids = [tok.encode_prompt(prompt, c.max_seq_len)[1]]
        # a generation stops when the context is full: report the tokens that are compared, no more
        max_new = min(max_new, c.max_seq_len - len(ids[0]))
    else:
        if prompts < 1:
            raise BadInput("--prompts must be at least 1")
        ids = default_prompts(model_dir, tok, prompts)
        ids = [p[: max(1, c.max_seq_len - max_new)] for p in ids]  # our own excerpts: cut to leave room
    chosen = _given_setting(c, settings)
    sampling = Sampling(temperature, top_p, seed)
    outcomes, info = verify_settings(model_dir, ids, chosen, max_new, sampling, progress=progress,
                                     base={} if max_context is None else {"max_context": max_context})
    return VerifyResult(
        ok=all(o.ok for o in outcomes), prompts=len(ids), max_new=max_new, min_cap=info["min_cap"],
        resident_cap=info["resident_cap"], resident_slots=info["resident_slots"], outcomes=outcomes,
        note=RANDOM_NOTE if c.extra.get("synthetic") else None, reference=info["reference"],
    )


# ---------------------------------------------------------------------------------------------- score

RULE_BOS = "windows of [bos] + the next max_seq_len-1 tokens; every token of the text predicted once"
RULE_PLAIN = "windows of max_seq_len tokens, no bos inserted; every token but each window's first predicted"


@dataclass
class ScoreResult:
    """Perplexity of a text under the engine's settings, with what the run paged in and its memory."""

    model_dir: str
    model: str
    text: str
    expert_storage: str  # the experts' format (F32, q4, ...)
    expert_bytes: int
    rule: str
    score: Score
    bytes_paged_in: int | None
    expert_loads: int | None
    stall_s: float | None
    stats: dict  # the engine's stats but the pool's: budget, peak_rss_growth_bytes, options (and the reader's)
    link_emulated: bool
    cap_exceeded: bool | None = None  # None without a cap
    cap_allowance_bytes: int | None = None
    note: str | None = None
    warning: str | None = None  # the measured peak passed the cap (not in the document: the command says it on stderr)

    def to_json(self) -> dict:
        doc = {
            "model_dir": self.model_dir,
            "model": self.model,
            "text": self.text,
            "expert_storage": self.expert_storage,
            "expert_bytes": self.expert_bytes,
            "rule": self.rule,
            **self.score.to_json(),
            "bytes_paged_in": self.bytes_paged_in,
            "expert_loads": self.expert_loads,
            "stall_s": self.stall_s,
            **self.stats,
            "link_emulated": self.link_emulated,
        }
        if self.cap_exceeded is not None:
            doc["cap_exceeded"] = self.cap_exceeded
            doc["cap_allowance_bytes"] = self.cap_allowance_bytes
        if self.note is not None:
            doc["note"] = self.note
        return doc


def score(model_dir: str | os.PathLike | None = None, text: str | os.PathLike | None = None, *,
          max_tokens: int | None = None, plain_windows: bool = False,
          progress: Callable[[int, int], None] | None = None, **settings) -> ScoreResult:
    """Perplexity of a text file (default: the model's heldout.txt), teacher-forced in context-sized windows
    (``moerun score``), under the engine ``settings`` (``load``'s keywords: ``mem_cap``, ``evict``, ...).

    ``plain_windows``: windows of max_seq_len tokens with no bos inserted.  ``progress(windows_done,
    windows_total)`` after each window.
    """
    model_dir = resolve_model(model_dir)
    engine = load(model_dir, **settings)  # the model is checked first: its problems are the likelier ones
    with engine:
        check_against_config(settings.get("prefetch", 0), settings.get("lookahead"), engine.config)
        if text is not None:
            text_path = Path(text)
        else:
            text_path = model_dir / "heldout.txt"
            if not text_path.exists():
                raise BadInput(f"{model_dir} has no heldout.txt; name a text with --text FILE")
        if max_tokens is not None and (isinstance(max_tokens, bool) or not isinstance(max_tokens, int) or max_tokens < 1):
            raise BadOption(f"--max-tokens must be a whole number of at least 1, got {max_tokens!r}")
        c = engine.config
        # read and encoded only as far as max_tokens needs; the ids kept take 4 bytes a token
        ids = engine.tokenizer.encode_file(text_path, max_tokens)
        bos = None if plain_windows else c.bos_token_id
        total = n_windows(ids.size, c.max_seq_len, bos)
        on_window = (lambda done: progress(done, total)) if progress is not None else None
        result = score_text(engine, None, max_tokens, on_window=on_window, plain=plain_windows, ids=ids)
        engine.memwatch.sample()
        st = engine.stats
        pool = st.get("pool") or {}
        chk = cap_check(engine)
        return ScoreResult(
            model_dir=str(engine.store.model_dir),
            model=c.name,
            text=str(text_path),
            expert_storage=engine.store.codec.name,
            expert_bytes=engine.store.expert_nbytes,
            rule=RULE_PLAIN if bos is None else RULE_BOS,
            score=result,
            bytes_paged_in=pool.get("bytes_paged_in"),
            expert_loads=pool.get("prefill_loads"),
            stall_s=pool.get("stall_s", 0.0) if pool else None,
            stats={k: v for k, v in st.items() if k != "pool"},
            link_emulated=engine.options.get("link_speed") is not None,
            cap_exceeded=chk["exceeded"] if chk is not None else None,
            cap_allowance_bytes=chk["allowance_bytes"] if chk is not None else None,
            note="random weights: the perplexity means nothing" if c.extra.get("synthetic") else None,
            warning=cap_warning(engine),
        )
