"""Routing traces: recording them from a run, and the ``.npz`` file format (docs/design/file-formats.md).

A trace file is a numpy ``.npz`` archive:

- ``experts``  int  [tokens, layers, top_k]  chosen expert ids per token and layer
  (ascending within a row); ``-1`` is padding (no access).
- ``weights``  float32, same shape, optional: the routing weights.
- ``guesses``  int  [tokens, layers, lookahead, n], optional: for token t and
  layer l, entry [t, l, j-1] holds the top-n experts that layer l+j's router
  picks from the hidden state after layer l's attention (the prefetch rule);
  ``-1`` where l+j is past the last layer.
- ``probs``    float32 [tokens, layers, n_experts], optional: the router
  probabilities (softmax over every expert) per token and layer, for policies
  that read them (``Policy.routed``).
- ``meta``     0-d string array holding a JSON object, optional (``n_experts``,
  ``top_k``, ``expert_bytes``, ``prefill_tokens``, ``source``, ``partial``, ...).

Traces written by the live engine add per-access events: ``kind`` int8
(0 hit, 1 prefetched, 2 miss, -1 prefill), ``pagein_ns`` and ``stall_ns``
int64 [tokens, layers, top_k], and ``compute_ns`` int64 [tokens, layers].
"""

from __future__ import annotations

import io
import json
import zipfile
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from moerun.errors import BadTrace
from moerun.files.fileio import atomic_path, read_user_file

PAD = -1
TRACE_LOOKAHEAD = 3
TRACE_GUESSES = 4


@dataclass
class Trace:
    experts: np.ndarray
    weights: np.ndarray | None = None
    guesses: np.ndarray | None = None
    meta: dict = field(default_factory=dict)
    events: dict = field(default_factory=dict)
    probs: np.ndarray | None = None  # float32 [tokens, layers, n_experts]: router probabilities, optional

    @property
    def n_tokens(self) -> int:
        return self.experts.shape[0]

    @property
    def n_layers(self) -> int:
        return self.experts.shape[1]

    @property
    def top_k(self) -> int:
        return self.experts.shape[2]

    @property
    def n_experts(self) -> int:
        n = self.meta.get("n_experts")
        return int(n) if n is not None else int(self.experts.max(initial=-1)) + 1


class Recorder:
    """Collects routing, guesses and events per layer while the engine runs.

    Routing and events come from the expert source (``routed``, ``events``); the guesses from the
    forward pass, which the recorder observes (``moerun.model.transformer.StepObserver``): after each
    layer's attention, ``guess(layer, h, lookahead, n_guesses)`` gives the prefetch rule's
    [T, lookahead, n_guesses] guesses for the hidden state h (``Engine.guesses``)."""

    def __init__(self, n_layers: int, top_k: int, lookahead: int = TRACE_LOOKAHEAD, n_guesses: int = TRACE_GUESSES,
                 guess=None):
        self.L = n_layers
        self.k = top_k
        self.lookahead = lookahead
        self.n_guesses = n_guesses
        self.guess = guess
        self.experts: list[list[np.ndarray]] = [[] for _ in range(n_layers)]
        self.weights: list[list[np.ndarray]] = [[] for _ in range(n_layers)]
        self.probs: list[list[np.ndarray]] = [[] for _ in range(n_layers)]
        self.guesses: list[list[np.ndarray]] = [[] for _ in range(n_layers)]
        self.kind: list[list[np.ndarray]] = [[] for _ in range(n_layers)]
        self.pagein: list[list[np.ndarray]] = [[] for _ in range(n_layers)]
        self.stall: list[list[np.ndarray]] = [[] for _ in range(n_layers)]
        self.compute: list[list[np.ndarray]] = [[] for _ in range(n_layers)]
        self.prefill_tokens = 0

    def routed(self, step: int, layer: int, chosen: np.ndarray, weights: np.ndarray, probs: np.ndarray) -> None:
        T = chosen.shape[0]
        self.experts[layer].append(chosen.astype(np.int16))
        self.weights[layer].append(weights.astype(np.float32))
        self.probs[layer].append(np.asarray(probs, np.float32))
        if T > 1 or step < 0:
            self.kind[layer].append(np.full((T, self.k), -1, np.int8))
            self.pagein[layer].append(np.zeros((T, self.k), np.int64))
            self.stall[layer].append(np.zeros((T, self.k), np.int64))
            self.compute[layer].append(np.zeros(T, np.int64))
            if layer == 0:
                self.prefill_tokens += T

    def guessed(self, layer: int, g: np.ndarray) -> None:
        """g: [T, lookahead, n] guesses made at layer's prefetch point."""
        self.guesses[layer].append(g.astype(np.int16))

    def after_attention(self, layer: int, h: np.ndarray) -> None:
        """The forward pass's prefetch point after attention: record the guesses for every row of h."""
        self.guessed(layer, self.guess(layer, h, self.lookahead, self.n_guesses))

    def after_layer(self, layer: int, x: np.ndarray) -> None:
        pass

    def events(self, step: int, layer: int, events: dict, compute_ns: int) -> None:
        """Per-access events of one decode layer: {expert: record with kind, slot, pagein_ns, stall_ns}
        (``moerun.runtime.slots.Event``; the figures are copied here, the records are reused)."""
        last = self.experts[layer][-1][0].tolist()
        self.kind[layer].append(np.array([[events[e].kind for e in last]], np.int8))
        self.pagein[layer].append(np.array([[events[e].pagein_ns for e in last]], np.int64))
        self.stall[layer].append(np.array([[events[e].stall_ns for e in last]], np.int64))
        self.compute[layer].append(np.array([compute_ns], np.int64))

    def to_trace(self, meta: dict) -> Trace:
        n = min(sum(a.shape[0] for a in rows) for rows in self.experts) if self.L else 0

        def stack(rows, tail, dtype, fill=0):
            out = []
            for layer_rows in rows:
                a = np.concatenate(layer_rows, axis=0) if layer_rows else np.zeros((0, *tail), dtype)
                if a.shape[0] < n:
                    return None
                out.append(a[:n])
            return np.stack(out, axis=1) if out else np.zeros((n, 0, *tail), dtype)

        experts = stack(self.experts, (self.k,), np.int16)
        weights = stack(self.weights, (self.k,), np.float32)
        guesses = stack(self.guesses, (self.lookahead, self.n_guesses), np.int16)
        probs = stack(self.probs, (self.probs[0][0].shape[-1],), np.float32) if self.L and self.probs[0] else None
        events = {}
        for name, rows, tail, dt in (
            ("kind", self.kind, (self.k,), np.int8),
            ("pagein_ns", self.pagein, (self.k,), np.int64),
            ("stall_ns", self.stall, (self.k,), np.int64),
            ("compute_ns", self.compute, (), np.int64),
        ):
            a = stack(rows, tail, dt)
            if a is not None and a.shape[0] == n:
                events[name] = a
        # a run stopped inside prefill has routed its prompt through some layers only: the trace keeps the
        # tokens every layer saw, all of them prefill
        meta = {"prefill_tokens": min(self.prefill_tokens, n), **meta}
        return Trace(experts, weights, guesses, meta, events, probs)


def write_trace(path: str | Path, trace: Trace, force: bool = True, inputs=(), what: str = "") -> None:
    """Write ``trace`` to ``path`` (moerun.files.fileio rules: ``force`` to replace a file, never an input or a device)."""
    arrays = {"experts": trace.experts, "meta": np.array(json.dumps(trace.meta))}
    if trace.weights is not None:
        arrays["weights"] = trace.weights
    if trace.guesses is not None:
        arrays["guesses"] = trace.guesses
    if trace.probs is not None:
        arrays["probs"] = trace.probs
    arrays.update(trace.events)
    with atomic_path(path, suffix=".npz", force=force, inputs=inputs, what=what) as tmp:
        with open(tmp, "wb") as f:
            np.savez_compressed(f, **arrays)


_INT_KINDS = "iu"


def _not_a_zip(data: bytes) -> str | None:
    """Why ``data`` cannot be an .npz archive, or None if it starts like a zip file."""
    if data.startswith(b"PK"):
        return None
    if not data:
        return "the file is empty"
    if data.startswith(b"\x93NUMPY"):
        return "it is a single .npy array; save with numpy.savez(path, experts=...)"
    try:
        data[:4096].decode("utf-8")
        return "it looks like a text file"
    except UnicodeDecodeError:
        return "it does not start like a zip file"


MAX_EXPERTS = 1 << 20  # more experts per layer than any model has; a guard against absurd metadata
TRACE_FILE_LIMIT = 1 << 34  # bytes of a trace file read into memory (16 GiB)
# The arrays of an archive may expand to at most this many times the archive's size, or EXPANSION_FLOOR
# bytes, whichever is more: a real trace compresses 2-10 times (routing ids, timings), while a small
# archive of zeros can claim 1000 times its size (deflate's limit) and make the reader allocate it.
MAX_EXPANSION = 100
EXPANSION_FLOOR = 64 << 20


def _check_members(path: Path, data: bytes) -> None:
    """Refuse, before numpy allocates anything: encrypted members, members that expand far beyond the archive's
    size (or beyond free memory), and members whose array header claims more bytes than the member holds."""
    try:
        zf = zipfile.ZipFile(io.BytesIO(data))
    except (zipfile.BadZipFile, ValueError, NotImplementedError):
        return  # np.load reports it
    with zf:
        infos = zf.infolist()
        for info in infos:
            if info.flag_bits & 0x1:  # bit 0 of the general purpose flag: encrypted (PKWARE APPNOTE.TXT 4.4.4)
                raise BadTrace(f"{path}: member {info.filename!r} is encrypted; a trace archive holds plain arrays")
        total = sum(info.file_size for info in infos)
        allowed = max(MAX_EXPANSION * len(data), EXPANSION_FLOOR)
        if total > allowed:
            raise BadTrace(
                f"{path}: its arrays would expand to {total:,} bytes from a {len(data):,}-byte archive "
                f"(more than {MAX_EXPANSION} times its size); refusing to unpack it"
            )
        free = _available_memory()
        if free is not None and total > free:
            raise BadTrace(f"{path}: its arrays need {total:,} bytes, more than the {free:,} bytes of memory available")
        for info in infos:
            if not info.filename.endswith(".npy"):
                continue
            try:
                with zf.open(info) as f:
                    version = np.lib.format.read_magic(f)
                    if version == (1, 0):
                        shape, _, dtype = np.lib.format.read_array_header_1_0(f)
                    else:
                        shape, _, dtype = np.lib.format.read_array_header_2_0(f)
            except Exception:  # noqa: BLE001 - a member numpy cannot even describe; np.load reports it
                continue
            count = 1
            for n in shape:
                count *= int(n)
            if count * max(dtype.itemsize, 1) > info.file_size:
                raise BadTrace(
                    f"{path}: array {info.filename[:-4]!r} claims shape {list(shape)} of {dtype}, "
                    f"more than the {info.file_size} bytes the archive holds for it"
                )


def _available_memory() -> int | None:
    try:
        import psutil

        return int(psutil.virtual_memory().available)
    except Exception:  # noqa: BLE001 - no figure: no check
        return None


def _load_arrays(path: Path, data: bytes) -> dict[str, np.ndarray]:
    """The named arrays of a trace file's bytes (no pickles); BadTrace for anything that is not a readable .npz.

    The archive's members were checked first (``_check_members``), so no array claims more memory than the file
    can hold; every failure numpy or zipfile can raise on damaged bytes becomes one line naming the file.
    """
    try:
        z = np.load(io.BytesIO(data), allow_pickle=False)
        if not isinstance(z, np.lib.npyio.NpzFile):
            raise BadTrace(f"{path}: not an .npz archive (a trace holds named arrays)")
        with z:
            names = set(z.files)
            if "experts" not in names:
                raise BadTrace(f"{path}: missing the 'experts' array [tokens, layers, top_k]")
            return {name: z[name] for name in names}
    except BadTrace:
        raise
    except (zipfile.BadZipFile, EOFError, zlib.error):
        raise BadTrace(f"{path}: damaged or truncated .npz archive (the zip cannot be read to the end)") from None
    except NotImplementedError as e:  # zipfile: a zip version or compression method it does not read
        raise BadTrace(f"{path}: damaged .npz archive or one Python cannot read ({e})") from None
    except (ValueError, OSError, KeyError) as e:
        raise BadTrace(f"{path}: not a readable .npz trace ({str(e).splitlines()[0][:120] if str(e) else type(e).__name__})") from None


def _read_meta(path: Path, arrays: dict[str, np.ndarray]) -> dict:
    """The trace's ``meta``: a 0-d string holding a JSON object of valid UTF-8, or {} when absent."""
    if "meta" not in arrays:
        return {}
    m = arrays["meta"]
    try:
        meta = json.loads(str(m.item())) if m.shape == () else None
    except (ValueError, TypeError, RecursionError):
        meta = None
    if not isinstance(meta, dict):
        raise BadTrace(f"{path}: 'meta' must be a 0-d string holding a JSON object")
    try:
        json.dumps(meta, ensure_ascii=False).encode("utf-8")
    except (UnicodeEncodeError, RecursionError):
        raise BadTrace(f"{path}: 'meta' holds text that is not valid UTF-8") from None
    return meta


def _check_routing_shape(path: Path, experts: np.ndarray) -> None:
    """'experts' is an integer array [tokens, layers, top_k] with at least one layer and one column."""
    if experts.ndim != 3 or experts.dtype.kind not in _INT_KINDS:
        raise BadTrace(f"{path}: 'experts' must be an integer array [tokens, layers, top_k], got {experts.dtype} {list(experts.shape)}")
    if 0 in experts.shape[1:]:
        raise BadTrace(f"{path}: 'experts' has no layers or no top_k column")


def _checked_experts(path: Path, experts: np.ndarray, meta: dict, n_experts: int | None) -> tuple[np.ndarray, int | None]:
    """The routing [tokens, layers, top_k] as int64, and the expert count ids must stay below.

    Replay indexes tables with these ids and a policy counts them, so a negative id other than the padding,
    one past the model's experts or twice in one row would give wrong figures rather than an error later.
    The count is the caller's (the model's) if given, else the trace's own ``meta.n_experts``.
    """
    experts = experts.astype(np.int64)
    if (experts < PAD).any():
        raise BadTrace(f"{path}: 'experts' holds negative ids other than the padding value {PAD}")
    declared = meta.get("n_experts")
    if declared is not None and (isinstance(declared, bool) or not isinstance(declared, int) or not 0 < declared <= MAX_EXPERTS):
        raise BadTrace(f"{path}: meta n_experts must be a whole number from 1 to {MAX_EXPERTS}")
    limit = n_experts if n_experts is not None else declared
    if limit is not None and (experts >= limit).any():
        raise BadTrace(f"{path}: 'experts' holds ids >= n_experts ({limit})")
    for key, low in (("prefill_tokens", 0), ("expert_bytes", 1)):
        v = meta.get(key)
        if v is not None and (isinstance(v, bool) or not isinstance(v, int) or v < low):
            raise BadTrace(f"{path}: meta {key} must be a whole number of at least {low}, got {v!r}")
    if meta.get("prefill_tokens") is not None and meta["prefill_tokens"] > experts.shape[0]:
        raise BadTrace(f"{path}: meta prefill_tokens {meta['prefill_tokens']} exceeds the trace's {experts.shape[0]} tokens")
    if experts.size and experts.max() > 1_000_000:
        raise BadTrace(f"{path}: expert ids up to {experts.max()} are implausible")
    rows = np.sort(np.where(experts < 0, np.iinfo(np.int64).max, experts), axis=-1)
    dup = (rows[..., 1:] == rows[..., :-1]) & (rows[..., 1:] != np.iinfo(np.int64).max)
    if dup.any():
        raise BadTrace(f"{path}: an expert appears twice in one token's top_k row")
    return experts, limit


# A row's weights are softmax probabilities of the chosen experts, renormalised or not, so their sum is at most 1;
# the slack allows float32 rounding of the sum (common practice, no source).
WEIGHT_SUM_SLACK = 1e-3


def check_weights(path, weights: np.ndarray, experts: np.ndarray) -> None:
    """Routing weights a router could have given: finite, above 0, at most 1, each row summing to at most 1.
    ``path``: what to name in the error (the file, or "routing trace")."""
    chosen = experts != PAD
    w = np.where(chosen, weights, 0.0)
    if not np.isfinite(w).all() or (w[chosen] <= 0).any() or (w > 1).any():
        raise BadTrace(f"{path}: 'weights' must be routing probabilities, each above 0 and at most 1 "
                       f"(found {float(np.nanmin(np.where(chosen, weights, np.nan))):.3g}..{float(np.nanmax(np.where(chosen, weights, np.nan))):.3g})")
    sums = w.astype(np.float64).sum(axis=-1)
    if (sums > 1 + WEIGHT_SUM_SLACK).any():
        raise BadTrace(f"{path}: a token's routing weights in one layer sum to {float(sums.max()):.4g}; "
                       "probabilities of the chosen experts sum to at most 1")


def _optional_arrays(path: Path, arrays: dict[str, np.ndarray], experts: np.ndarray, limit: int | None):
    """(weights, guesses, probs, events) checked against the routing's shape; None (or {}) for what is absent."""
    weights = arrays.get("weights")
    if weights is not None:
        if weights.shape != experts.shape or weights.dtype.kind != "f":
            raise BadTrace(f"{path}: 'weights' must be a float array shaped like 'experts' {list(experts.shape)}")
        weights = weights.astype(np.float32)
        check_weights(path, weights, experts)
    guesses = arrays.get("guesses")
    if guesses is not None:
        if guesses.ndim != 4 or guesses.shape[:2] != experts.shape[:2] or guesses.dtype.kind not in _INT_KINDS:
            raise BadTrace(f"{path}: 'guesses' must be an integer array [tokens, layers, lookahead, n] matching 'experts'")
        guesses = guesses.astype(np.int64)
        # without a declared count the trace's experts are those it routes to (Trace.n_experts), and a guess
        # names one of them, as a routed id names one of the declared
        bound = limit if limit is not None else int(experts.max(initial=-1)) + 1
        if (guesses < PAD).any() or (guesses >= bound).any():
            what = "n_experts-1" if limit is not None else f"{bound - 1} (the highest routed id; the meta declares no n_experts)"
            raise BadTrace(f"{path}: 'guesses' holds ids outside 0..{what} (or -1 padding)")
    probs = arrays.get("probs")
    if probs is not None:
        if probs.ndim != 3 or probs.shape[:2] != experts.shape[:2] or probs.dtype.kind != "f":
            raise BadTrace(f"{path}: 'probs' must be a float array [tokens, layers, n_experts] matching 'experts'")
        if (limit is not None and probs.shape[2] != limit) or (experts.size and probs.shape[2] <= experts.max()):
            raise BadTrace(f"{path}: 'probs' has {probs.shape[2]} columns; it needs one per expert")
        probs = probs.astype(np.float32)
    events = {}
    for name in ("kind", "pagein_ns", "stall_ns", "compute_ns"):
        if name in arrays:
            a = arrays[name]
            want = experts.shape[:2] if name == "compute_ns" else experts.shape
            if a.shape != want:
                raise BadTrace(f"{path}: '{name}' must have shape {list(want)}")
            events[name] = a
    return weights, guesses, probs, events


def shape_text(n_layers: int, n_experts: int | str, top_k: int) -> str:
    """A routing shape as people read it: ``4 layers × 8 experts, top-2``."""
    return f"{n_layers} layers × {n_experts} experts, top-{top_k}"


def check_fits_model(label, experts: np.ndarray, declared: int | None, model: tuple[int, int, int]) -> None:
    """BadTrace naming both shapes when routing [tokens, layers, top_k] cannot be the routing of a model of
    ``model`` = (n_layers, n_experts, top_k).  ``declared``: the trace's own expert count, if it states one (its
    meta, or its probabilities' columns); without it the highest routed id only bounds the count from below."""
    L, E, k = model
    top = int(experts.max(initial=-1)) + 1
    count = declared if declared is not None else top
    if experts.shape[1] != L or experts.shape[2] != k or top > E or (declared is not None and declared != E):
        have = count if declared is not None else f"{count}+"
        raise BadTrace(f"{label}: routing of another model (trace: {shape_text(experts.shape[1], have, experts.shape[2])}; "
                       f"model: {shape_text(L, E, k)})")


def read_trace(path: str | Path, n_experts: int | None = None, model: tuple[int, int, int] | None = None) -> Trace:
    """Read and validate a trace file; raise BadTrace with one clear line.  ``model`` = (n_layers, n_experts,
    top_k): the routing must fit that model (its expert count then bounds the ids, as ``n_experts`` does)."""
    path = Path(path)
    data = read_user_file(path, BadTrace, "trace file", limit=TRACE_FILE_LIMIT)
    kind = _not_a_zip(data)
    if kind is not None:
        raise BadTrace(f"{path}: not an .npz archive ({kind}); a trace is a zip of named numpy arrays, see docs/design/file-formats.md")
    _check_members(path, data)
    arrays = _load_arrays(path, data)
    _check_routing_shape(path, arrays["experts"])
    meta = _read_meta(path, arrays)
    if model is not None:
        declared = meta.get("n_experts")
        probs = arrays.get("probs")
        if not isinstance(declared, int) or isinstance(declared, bool):
            declared = int(probs.shape[2]) if probs is not None and probs.ndim == 3 else None
        check_fits_model(path, arrays["experts"].astype(np.int64), declared, model)
        n_experts = model[1]
    experts, limit = _checked_experts(path, arrays["experts"], meta, n_experts)
    if limit is not None:
        meta["n_experts"] = int(limit)
    weights, guesses, probs, events = _optional_arrays(path, arrays, experts, limit)
    return Trace(experts, weights, guesses, meta, events, probs)
