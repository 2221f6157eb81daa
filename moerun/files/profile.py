"""Routing profiles (schema moerun-profile/1): how often each layer chose each expert on a text, for warm starts.

A profile is a JSON document (docs/design/file-formats.md, "Routing profiles"): the counts, the model it
came from (enough of its shape to refuse another model), where the counts came from (a text routed by the
model, or a routing trace) with a digest of that file, and the moerun version that wrote it.  ``moerun
profile`` writes one; ``generate --warm-from``, ``replay --warm-from`` and ``plan --warm-from`` read it.
The counts are ranked by ``moerun.runtime.decisions.hottest``; ``Decisions.warm`` fills a pool from them.

A profile is read like every file a user names: a regular file of bounded size, valid UTF-8 JSON, every
field checked before anything is used; any problem is one ``BadInput`` line naming the file and the field.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from moerun._version import __version__
from moerun.errors import BadInput, BadOption
from moerun.files.fileio import open_regular, read_json_file, write_text_atomic

SCHEMA = "moerun-profile/1"
MAX_BYTES = 64 << 20  # a profile of 512 layers x 4096 experts of 12-digit counts is about 30 MB
MAX_CELLS = 1 << 22  # layers x experts
MAX_COUNT = 1 << 53  # a count a JSON number holds exactly
IDENTITY = ("layers", "experts", "top_k", "d_model")  # what must match the model a profile is used with
SOURCES = ("text", "trace")


@dataclass
class Profile:
    """Activation counts per layer and expert (``counts``: int64 [layers, experts]), with their provenance."""

    counts: np.ndarray
    model: dict  # {"name", "layers", "experts", "top_k", "d_model"}
    source: dict  # {"kind": "text" | "trace", "file", "blake2b", "tokens"}
    settings: dict = field(default_factory=dict)  # how the counts were made (max_tokens, windows, ...)
    version: str = __version__
    path: str | None = None  # the file it was read from (not in the document)

    @property
    def layers(self) -> int:
        return int(self.counts.shape[0])

    @property
    def experts(self) -> int:
        return int(self.counts.shape[1])

    def to_json(self) -> dict:
        return {
            "schema": SCHEMA,
            "moerun_version": self.version,
            "model": self.model,
            "source": self.source,
            "settings": self.settings,
            "counts": self.counts.tolist(),
        }

    def where(self) -> str:
        return self.path or "routing profile"

    def check_model(self, layers: int, experts: int, top_k: int, d_model: int | None, what: str) -> None:
        """Refuse a profile of another model: its shape (layers, experts, top_k, and the hidden size when the
        model has one) must be the model's.  BadInput naming the first difference."""
        mine = {"layers": layers, "experts": experts, "top_k": top_k, "d_model": d_model}
        for k in IDENTITY:
            if mine[k] is not None and self.model.get(k) != mine[k]:
                raise BadInput(f"{self.where()}: a profile of another model ({k} {self.model.get(k)}, but {what} has "
                               f"{mine[k]}); make one for this model with 'moerun profile'")

    def check_config(self, config, what: str = "the model") -> None:
        self.check_model(config.n_layers, config.n_experts, config.top_k, config.d_model, what)


def identity(config) -> dict:
    """The model fields a profile keeps (``IDENTITY`` and the name) from a ModelConfig."""
    return {"name": config.name, "layers": config.n_layers, "experts": config.n_experts, "top_k": config.top_k,
            "d_model": config.d_model}


def file_digest(path: str | os.PathLike, what: str = "file") -> str:
    """blake2b (16 bytes, hex) of a regular file's bytes, read in blocks."""
    h = hashlib.blake2b(digest_size=16)
    with open_regular(path, BadInput, what) as f:
        while block := f.read(1 << 20):
            h.update(block)
    return h.hexdigest()


def counts_of(experts: np.ndarray, n_experts: int) -> np.ndarray:
    """Counts [layers, n_experts] of routing ``experts`` [tokens, layers, top_k] (-1: padding)."""
    T, L, k = experts.shape
    layer = np.broadcast_to(np.arange(L)[None, :, None], experts.shape)
    ok = experts >= 0
    flat = layer[ok].astype(np.int64) * n_experts + experts[ok].astype(np.int64)
    return np.bincount(flat, minlength=L * n_experts).reshape(L, n_experts).astype(np.int64)


def write_profile(path: str | os.PathLike, profile: Profile, force: bool = False, inputs=(), what: str = "--out") -> None:
    """Write a profile as JSON, atomically (the output rules of moerun.files.fileio); one row of counts a line."""
    doc = profile.to_json()
    counts = doc.pop("counts")
    head = json.dumps(doc, indent=2)[:-2]  # the object without its closing brace
    rows = ",\n".join("    " + json.dumps(row, separators=(",", ":")) for row in counts)
    text = f"{head},\n  \"counts\": [\n{rows}\n  ]\n}}\n"
    write_text_atomic(path, text, force=force, inputs=inputs, what=what)


def _whole(v, lo: int, hi: int) -> bool:
    return isinstance(v, int) and not isinstance(v, bool) and lo <= v <= hi


def validate_profile(doc: object, where: str) -> Profile:
    """A profile document checked field by field; BadInput naming the first problem."""

    def bad(msg: str):
        raise BadInput(f"{where}: {msg}")

    if not isinstance(doc, dict):
        bad("not a JSON object, expected a routing profile")
    if doc.get("schema") != SCHEMA:
        bad(f"schema is {str(doc.get('schema'))[:60]!r}, expected {SCHEMA!r} (written by 'moerun profile')")
    model = doc.get("model")
    if not isinstance(model, dict):
        bad("'model' is missing or not an object")
    for k in IDENTITY:
        if not _whole(model.get(k), 1, 1 << 31):
            bad(f"model.{k} must be a positive whole number")
    if not isinstance(model.get("name", ""), str):
        bad("model.name must be text")
    if model["top_k"] > model["experts"]:
        bad(f"model.top_k {model['top_k']} is more than its {model['experts']} experts")
    L, E = model["layers"], model["experts"]
    if L * E > MAX_CELLS:
        bad(f"{L} layers x {E} experts is more than the {MAX_CELLS:,} counts a profile may hold")
    source = doc.get("source")
    if not isinstance(source, dict) or source.get("kind") not in SOURCES:
        bad(f"source.kind must be one of {', '.join(SOURCES)}")
    if not _whole(source.get("tokens"), 0, MAX_COUNT):
        bad("source.tokens must be a whole number")
    for k in ("file", "blake2b"):
        if not isinstance(source.get(k), str):
            bad(f"source.{k} must be text")
    settings = doc.get("settings", {})
    if not isinstance(settings, dict):
        bad("settings must be an object")
    version = doc.get("moerun_version")
    if not isinstance(version, str):
        bad("moerun_version must be text")
    counts = doc.get("counts")
    if not isinstance(counts, list) or len(counts) != L:
        bad(f"counts must be a list of {L} rows (one per layer)")
    for layer, row in enumerate(counts):
        if not isinstance(row, list) or len(row) != E:
            bad(f"counts[{layer}] must be a list of {E} counts (one per expert)")
        for e, n in enumerate(row):
            if not _whole(n, 0, MAX_COUNT):
                bad(f"counts[{layer}][{e}] must be a whole number from 0 to 2**53, got {str(n)[:40]}")
    try:  # labels are printed: JSON escapes can spell lone surrogates that no output can print
        json.dumps(doc.get("model"), ensure_ascii=False).encode("utf-8")
        json.dumps(source, ensure_ascii=False).encode("utf-8")
    except (UnicodeEncodeError, ValueError):
        bad("holds text that is not valid UTF-8")
    return Profile(np.array(counts, np.int64).reshape(L, E), dict(model), dict(source), dict(settings), version, where)


def read_profile(path: str | os.PathLike | Profile) -> Profile:
    """Read and check a file written by ``moerun profile`` (a Profile passes through).  BadOption if the path is
    not a readable regular file (it came from an option), BadInput if its content is not a valid profile."""
    if isinstance(path, Profile):
        return path
    if not isinstance(path, (str, os.PathLike)):
        raise BadOption(f"warm_from must be a path to a routing profile, got {type(path).__name__}")
    p = Path(path)
    doc = read_json_file(p, BadInput, "routing profile", limit=MAX_BYTES, file_error=BadOption,
                         missing=f"{p}: no such routing profile (write one with 'moerun profile --out {p}')")
    return validate_profile(doc, str(p))
