"""An open MoE checkpoint read in place: its shards validated and mapped, each expert's byte spans, page-in, dtypes.

``Checkpoint.open(dir)`` reads a directory in the open layout (/work/shared/OPEN-CHECKPOINTS.md):
``config.json`` (``moerun.files.ckpt_config``), ``model.safetensors`` or shards with
``model.safetensors.index.json``, ``tokenizer.json``, and the BOS/EOS ids.  Nothing is trusted before it is
checked (docs/design/architecture.md, invariants): every shard's header goes through ``modelfile.read_header`` (bounded
header, offsets inside the file, no overlaps, sizes that match shapes), the index may name only plain file names
inside the directory, every tensor must be expected by the config with the shape it implies and every expected
tensor present (``moerun.files.ckpt_tensors``), and the index and the shards must agree tensor for tensor.
Any problem is one ``BadModelFile`` line naming the file and the field.

The checkpoint is never converted or copied.  Shards stay open (one descriptor each) and are memory-mapped
read-only on demand (``tensor`` gives a view of a tensor as stored).  Routed experts are described by a
span map built from the headers alone: for each (layer, expert) the byte spans of its gate, up and down
matrices, which may lie in several shard files, grouped into reads (one ``os.preadv`` per run of spans in one
file, in offset order; gaps of up to GAP_LIMIT bytes inside a run are read and dropped).  A per-expert file has
one run per file; a fused layer two (the expert's gate and up rows, and its down rows, lie a whole tensor apart).  ``read_expert`` performs exactly those reads into a caller's buffer and
returns the three matrices as views of it, [out, in] as stored.  ``widen_into`` turns a stored part (BF16,
F16, F32) into float32 in a caller's scratch without allocating.
"""

from __future__ import annotations

import contextlib
import mmap
import os
import stat
import threading
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from moerun.errors import BadModelFile, PageInError
from moerun.files import ckpt_tensors as names
from moerun.files.ckpt_config import (
    CheckpointConfig,
    is_open_checkpoint,
    parse_checkpoint_config,
    read_config_json,
    special_token_ids,
)
from moerun.files.fileio import open_regular, read_json_file
from moerun.files.modelfile import DTYPE_SIZES, Header, TensorInfo, natural_key, read_header

__all__ = [
    "Checkpoint",
    "CheckpointSizes",
    "ExpertSpans",
    "Read",
    "Span",
    "SINGLE_FILE",
    "DISCARD",
    "GAP_LIMIT",
    "INDEX_FILE",
    "STORED_DTYPES",
    "decode_bf16",
    "is_open_checkpoint",
    "open_checkpoint",
    "read_expert",
    "stored_view",
    "widen_into",
]

SINGLE_FILE = "model.safetensors"
INDEX_FILE = "model.safetensors.index.json"
TOKENIZER_FILE = "tokenizer.json"
INDEX_LIMIT = 64 << 20  # bytes of an index (a 100k-tensor index is a few MB)
SLOT_ALIGN = 64  # each part of an expert starts at a multiple of this in a page-in destination
# Parts of one expert in one file separated by at most this many bytes (padding, a small tensor between them) are
# fetched by one preadv that reads the gap into a throwaway buffer; farther apart, each run gets its own call.
GAP_LIMIT = 4096
DISCARD = -1  # the destination offset of a gap's piece in a Read
_DISCARD_BUF = memoryview(bytearray(GAP_LIMIT))  # gaps land here; nobody reads it, so concurrent reads may share it
# The dtypes a checkpoint's tensors may have, and their little-endian numpy types as stored (BF16 as its raw bits).
STORED_DTYPES = {"BF16": np.dtype("<u2"), "F16": np.dtype("<f2"), "F32": np.dtype("<f4")}


# ---------------------------------------------------------------------------- dtypes


def decode_bf16(bits: np.ndarray) -> np.ndarray:
    """BF16 bits (uint16) as float32, exactly: the 16 bits become the top half of a 32-bit word (a new array)."""
    out = np.empty(bits.shape, np.float32)
    return widen_into(bits, "BF16", out)


def widen_into(src: np.ndarray, dtype: str, out: np.ndarray) -> np.ndarray:
    """Write the stored part ``src`` (dtype tag ``dtype``: BF16 as uint16 bits, F16, F32) into the float32 array
    ``out`` of the same shape, and return ``out``.  No array of the tensor's size is allocated (numpy casts through a
    buffer of its own, tens of KB): BF16 is widened by copying the bits
    into ``out``'s 32-bit words shifted left by 16 (one pass), F16 and F32 by one casting copy."""
    if out.dtype != np.float32 or out.shape != src.shape or not out.flags.c_contiguous or not out.flags.writeable:
        raise ValueError(f"out must be a writable C-contiguous float32 array of shape {src.shape}")
    want = STORED_DTYPES.get(dtype)
    if want is None:
        raise ValueError(f"unknown stored dtype {dtype!r} (expected one of {', '.join(STORED_DTYPES)})")
    if src.dtype != want:
        raise ValueError(f"a {dtype} part must be a {want} array, got {src.dtype}")
    if dtype == "BF16":  # one pass: each 16-bit word widened and shifted into its 32-bit word
        np.left_shift(src, np.uint32(16), out=out.view(np.uint32), dtype=np.uint32)
    else:
        np.copyto(out, src, casting="safe")
    return out


def stored_view(buffer, dtype: str, shape: tuple[int, ...], offset: int = 0) -> np.ndarray:
    """A view of ``buffer`` at byte ``offset`` as a stored tensor of ``dtype`` and ``shape`` (BF16 as uint16)."""
    count = 1
    for s in shape:
        count *= s
    return np.frombuffer(buffer, STORED_DTYPES[dtype], count, offset).reshape(shape)


# ---------------------------------------------------------------------------- spans


@dataclass(frozen=True)
class Span:
    """One stored matrix of an expert: ``nbytes`` at absolute byte ``offset`` of shard ``file`` (an index into
    ``Checkpoint.files``), of ``dtype`` and ``shape`` [out, in]; ``tensor`` is the tensor it is (part of)."""

    file: int
    offset: int
    nbytes: int
    dtype: str
    shape: tuple[int, ...]
    tensor: str


@dataclass(frozen=True)
class Read:
    """One ``os.preadv``: ``nbytes`` from byte ``offset`` of shard ``file``, scattered as ``pieces``
    ((destination offset, nbytes), in file order) into the page-in destination.  A piece whose destination
    offset is ``DISCARD`` is a small gap between two parts (at most ``GAP_LIMIT`` bytes), read and dropped so
    that the parts around it take one call."""

    file: int
    offset: int
    nbytes: int
    pieces: tuple[tuple[int, int], ...]


@dataclass(frozen=True)
class ExpertSpans:
    """Where one routed expert lies: its parts (gate, up, down), their offsets in a page-in destination, and
    the reads that fetch them, ordered by file and offset (adjacent spans of a file share one read)."""

    layer: int
    expert: int
    parts: tuple[Span, Span, Span]
    dst_offsets: tuple[int, int, int]
    reads: tuple[Read, ...]

    @property
    def gate(self) -> Span:
        return self.parts[0]

    @property
    def up(self) -> Span:
        return self.parts[1]

    @property
    def down(self) -> Span:
        return self.parts[2]

    @property
    def nbytes(self) -> int:
        """Bytes as stored (what a page-in reads)."""
        return sum(p.nbytes for p in self.parts)

    @property
    def slot_nbytes(self) -> int:
        """Bytes a page-in destination must hold (the parts, each aligned to SLOT_ALIGN)."""
        return _align(self.dst_offsets[2] + self.parts[2].nbytes)

    @property
    def files(self) -> tuple[int, ...]:
        return tuple(dict.fromkeys(r.file for r in self.reads))

    def reads_in(self, file: int) -> tuple[Read, ...]:
        return tuple(r for r in self.reads if r.file == file)

    def views(self, dst) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(gate, up, down)`` as views of the destination ``dst`` (stored dtype, [out, in]), without reading:
        what a pool binds to a slot once, to find the parts after each ``read_expert`` into it."""
        view = memoryview(dst).cast("B")
        if len(view) < self.slot_nbytes:
            raise ValueError(f"the destination must hold at least {self.slot_nbytes} bytes, got {len(view)}")
        g, u, d = (stored_view(view, p.dtype, p.shape, o) for p, o in zip(self.parts, self.dst_offsets))
        return g, u, d


def _align(n: int) -> int:
    return -(-n // SLOT_ALIGN) * SLOT_ALIGN


def make_expert_spans(layer: int, expert: int, parts: Sequence[Span], gap_limit: int = GAP_LIMIT,
                      dst_offsets: Sequence[int] | None = None) -> ExpertSpans:
    """Destination offsets (gate, up, down, each aligned; or ``dst_offsets`` as given) and the reads for an expert's
    three spans: one read per run of parts in one file whose gaps are at most ``gap_limit`` bytes (at most
    GAP_LIMIT)."""
    gap_limit = min(gap_limit, GAP_LIMIT)
    dst = []
    pos = 0
    for p in parts:
        dst.append(pos)
        pos = _align(pos + p.nbytes)
    if dst_offsets is not None:
        dst = list(dst_offsets)
    order = sorted(range(3), key=lambda i: (parts[i].file, parts[i].offset))
    reads: list[Read] = []
    cur: list | None = None  # [file, offset, nbytes, pieces]
    for i in order:
        p = parts[i]
        if p.nbytes == 0:
            continue
        if cur is not None and cur[0] == p.file and 0 <= p.offset - (cur[1] + cur[2]) <= gap_limit:
            gap = p.offset - (cur[1] + cur[2])
            if gap:
                cur[3].append((DISCARD, gap))
            cur[2] += gap + p.nbytes
            cur[3].append((dst[i], p.nbytes))
        else:
            if cur is not None:
                reads.append(Read(cur[0], cur[1], cur[2], tuple(cur[3])))
            cur = [p.file, p.offset, p.nbytes, [(dst[i], p.nbytes)]]
    if cur is not None:
        reads.append(Read(cur[0], cur[1], cur[2], tuple(cur[3])))
    return ExpertSpans(layer, expert, (parts[0], parts[1], parts[2]), (dst[0], dst[1], dst[2]), tuple(reads))


def preadv_exact(fd: int, bufs: list[memoryview], offset: int) -> None:
    """Fill ``bufs`` from ``offset`` of ``fd`` with os.preadv, going on after short reads; EOFError if the file ends."""
    while bufs:
        got = os.preadv(fd, bufs, offset)
        if got == 0:
            raise EOFError
        offset += got
        while bufs and got >= len(bufs[0]):
            got -= len(bufs[0])
            bufs = bufs[1:]
        if got:
            bufs = [bufs[0][got:], *bufs[1:]]


def read_expert(fds: Sequence[int], spans: ExpertSpans, dst, paths: Sequence | None = None):
    """Page one expert in: perform ``spans.reads`` (one ``os.preadv`` each) on the shard descriptors ``fds`` into
    the writable buffer ``dst`` (at least ``spans.slot_nbytes`` bytes; a pool slot) and return ``(gate, up, down)``
    as views of ``dst`` in their stored dtype (BF16 as uint16 bits) and shape [out, in].  No array is allocated
    and nothing transposed.  PageInError, naming the shard (``paths``), if a file ended or a read failed."""
    view = memoryview(dst).cast("B")
    if view.readonly or len(view) < spans.slot_nbytes:
        raise ValueError(f"the destination must be a writable buffer of at least {spans.slot_nbytes} bytes, got {len(view)}")
    for r in spans.reads:
        try:
            preadv_exact(fds[r.file], [view[o : o + n] if o != DISCARD else _DISCARD_BUF[:n] for o, n in r.pieces], r.offset)
        except (EOFError, OSError) as e:
            where = paths[r.file] if paths is not None else f"shard {r.file}"
            why = "file ended" if isinstance(e, EOFError) else f"read failed ({e.strerror or e})"
            raise PageInError(
                f"{where}: {why} while reading expert {spans.expert} of layer {spans.layer} (file changed while open?)"
            ) from None
    return spans.views(view)


# ---------------------------------------------------------------------------- sizes


@dataclass(frozen=True)
class CheckpointSizes:
    """What a memory budget needs, in bytes.  ``dense_*`` counts every tensor but the routed experts and the
    embedding table (attention, norms, routers, shared experts, dense MLP layers, ``lm_head`` when untied);
    with tied embeddings the table is also the output matrix, counted once, in ``embed_*``."""

    expert_stored: int  # one routed expert as stored (gate + up + down)
    expert_f32: int  # one routed expert widened to float32
    expert_slot: int  # a page-in destination for one expert (parts aligned)
    experts: int  # routed experts in all MoE layers
    dense_stored: int
    dense_f32: int
    embed_stored: int
    embed_f32: int
    tied: bool

    @property
    def experts_stored(self) -> int:
        return self.expert_stored * self.experts

    @property
    def experts_f32(self) -> int:
        return self.expert_f32 * self.experts


# ---------------------------------------------------------------------------- the checkpoint


@dataclass(frozen=True)
class TensorLoc:
    file: int
    info: TensorInfo


def _plain_name(directory: Path, name: object, where: Path) -> str:
    """A weight file name the index (or the layout) names, checked: a plain name of a regular file inside
    ``directory``, reached by no link that leads out of it."""
    if not isinstance(name, str) or not name:
        raise BadModelFile(f"{where}: weight_map names file {name!r:.60}; expected a plain file name")
    try:
        name.encode("utf-8")
        printable = not any(ord(ch) < 32 or ord(ch) == 127 for ch in name)
    except UnicodeEncodeError:  # a lone surrogate spelled with a JSON escape
        printable = False
    if not printable or "/" in name or "\\" in name or name in (".", "..") or os.path.isabs(name):
        raise BadModelFile(f"{where}: weight_map names {name!r:.80}; only plain file names inside the checkpoint directory are allowed")
    path = directory / name
    try:
        st = os.lstat(path)
    except FileNotFoundError:
        raise BadModelFile(f"{path}: missing (named by {where.name})") from None
    except OSError as e:
        raise BadModelFile(f"{path}: cannot read ({e.strerror or e})") from None
    if stat.S_ISLNK(st.st_mode):
        real = Path(os.path.realpath(path))
        home = Path(os.path.realpath(directory))
        if home not in real.parents:
            raise BadModelFile(f"{path}: a link to {real}, outside the checkpoint directory {directory}")
    return name


def _natural(names_) -> list[str]:
    return sorted(names_, key=natural_key)


class Checkpoint:
    """An open checkpoint directory, validated; shards open, mapped on demand; experts as span maps.

    Attributes: ``directory``, ``config`` (CheckpointConfig), ``files`` (shard paths; a span's ``file`` indexes
    it), ``headers`` (one modelfile.Header per shard), ``tensors`` (name -> TensorLoc), ``layouts`` (per layer:
    "per_expert", "fused" or None for a dense layer), ``expert_dtype``, ``bos_ids``/``eos_ids``,
    ``tokenizer_path`` (None when not required and absent).  Use as a context manager or call ``close()``.
    """

    def __init__(self, directory: Path, config: CheckpointConfig):
        self.directory = directory
        self.config = config
        self.files: tuple[Path, ...] = ()
        self.headers: tuple[Header, ...] = ()
        self.tensors: dict[str, TensorLoc] = {}
        self.layouts: tuple[str | None, ...] = ()
        self.expert_dtype: str | None = None
        self.bos_ids: tuple[int, ...] = ()
        self.eos_ids: tuple[int, ...] = ()
        self.tokenizer_path: Path | None = None
        self.random_weights = False
        self._files: list = []  # open file objects, one per shard
        self._fds: tuple[int, ...] = ()
        self._maps: dict[int, mmap.mmap] = {}
        self._map_lock = threading.Lock()
        self._spans: list[list[ExpertSpans] | None] = []

    # ---------------------------------------------------------------- opening
    @classmethod
    def open(cls, directory: str | os.PathLike, require_tokenizer: bool = True) -> Checkpoint:
        """Open and validate the open checkpoint in ``directory``; BadModelFile (one line) for anything wrong."""
        directory = Path(directory)
        if not directory.exists():
            raise BadModelFile(f"{directory}: no such checkpoint directory")
        if not directory.is_dir():
            raise BadModelFile(f"{directory}: not a directory (expected a checkpoint directory)")
        raw = read_config_json(directory)
        config = parse_checkpoint_config(raw, where=str(directory / "config.json"))
        ck = cls(directory, config)
        try:
            tok = directory / TOKENIZER_FILE
            if tok.exists() or require_tokenizer:
                with open_regular(tok, BadModelFile, "tokenizer file", missing=f"{tok}: missing (an open checkpoint needs a tokenizer.json)"):
                    pass
                ck.tokenizer_path = tok
            ck.bos_ids, ck.eos_ids = special_token_ids(directory, config.vocab_size, raw)
            ck.random_weights = raw.get("moerun_random_weights") is True  # moerun synth --open-type wrote it
            weight_map = ck._open_files()
            ck._check_tensors(weight_map)
        except BaseException:
            ck.close()
            raise
        return ck

    def _open_files(self) -> dict[str, str] | None:
        """Open and validate every shard; the index's weight map (None for a single file)."""
        d = self.directory
        index_path, single = d / INDEX_FILE, d / SINGLE_FILE
        weight_map: dict[str, str] | None = None
        if os.path.lexists(index_path):
            if os.path.lexists(single):
                raise BadModelFile(f"{d}: holds both {SINGLE_FILE} and {INDEX_FILE}; which weights are meant is unclear (remove one)")
            doc = read_json_file(index_path, BadModelFile, "safetensors index", limit=INDEX_LIMIT)
            if not isinstance(doc, dict):
                raise BadModelFile(f"{index_path}: expected a JSON object")
            wm = doc.get("weight_map")
            if not isinstance(wm, dict) or not wm:
                raise BadModelFile(f"{index_path}: weight_map must be a non-empty object mapping tensor names to file names")
            if not isinstance(doc.get("metadata", {}), (dict, type(None))):
                raise BadModelFile(f"{index_path}: metadata must be an object")
            for v in wm.values():
                _plain_name(d, v, index_path)
            weight_map = wm
            file_names = _natural(set(wm.values()))
        elif os.path.lexists(single):
            file_names = [_plain_name(d, SINGLE_FILE, single)]
        else:
            raise BadModelFile(f"{d}: no weights ({SINGLE_FILE}, or shards with {INDEX_FILE})")
        files, headers = [], []
        for name in file_names:
            path = d / name
            named = f" (named by {INDEX_FILE})" if weight_map is not None else " (a link to nothing?)"
            f = open_regular(path, BadModelFile, "safetensors shard", missing=f"{path}: missing{named}")
            self._files.append(f)
            header = read_header(path)
            st, now = os.fstat(f.fileno()), os.stat(path)
            if (st.st_dev, st.st_ino, st.st_size) != (now.st_dev, now.st_ino, header.file_size):
                raise BadModelFile(f"{path}: changed while being opened")
            files.append(path)
            headers.append(header)
        self.files, self.headers = tuple(files), tuple(headers)
        self._fds = tuple(f.fileno() for f in self._files)
        return weight_map

    def _check_tensors(self, weight_map: dict[str, str] | None) -> None:
        c = self.config
        for i, h in enumerate(self.headers):
            for name, t in h.tensors.items():
                if name in self.tensors:
                    raise BadModelFile(f"{h.path}: tensor {name!r} is also in {self.files[self.tensors[name].file]}")
                if weight_map is not None and weight_map.get(name) != h.path.name:
                    mapped = weight_map.get(name)
                    why = "does not name it" if mapped is None else f"maps it to {mapped}"
                    raise BadModelFile(f"{h.path}: holds tensor {name!r}, but {INDEX_FILE} {why}")
                if t.dtype not in STORED_DTYPES:
                    raise BadModelFile(f"{h.path}: tensor {name!r} has dtype {t.dtype}; expected BF16, F16 or F32")
                self.tensors[name] = TensorLoc(i, t)
        if weight_map is not None:
            for name in _natural(weight_map):
                if name not in self.tensors:
                    raise BadModelFile(f"{self.directory / weight_map[name]}: lacks tensor {name!r}, which {INDEX_FILE} maps to it")
        expected = names.dense_tensors(c)
        for name in _natural(expected):
            self._expect(name, expected[name])
        used = set(expected)
        layouts: list[str | None] = []
        for layer in range(c.num_layers):
            if not c.is_moe_layer(layer):
                layouts.append(None)
                self._spans.append(None)
                continue
            fused = names.fused_gate_up(layer) in self.tensors or names.fused_down(layer) in self.tensors
            if fused:
                prefix = f"model.layers.{layer}.mlp.experts."
                loose = next((n for n in self.tensors if n.startswith(prefix) and n[len(prefix):].split(".")[0].isdigit()), None)
                if loose is not None:
                    raise BadModelFile(
                        f"{self._path_of(loose)}: layer {layer} holds its experts in both layouts, fused and per expert ({loose!r})"
                    )
            row, used_here = (self._fused_layer if fused else self._per_expert_layer)(layer)
            layouts.append("fused" if fused else "per_expert")
            used.update(used_here)
            self._spans.append(row)
        self.layouts = tuple(layouts)
        stray = [n for n in self.tensors if n not in used]
        if stray:
            name = _natural(stray)[0]
            more = f" (and {len(stray) - 1} more)" if len(stray) > 1 else ""
            raise BadModelFile(f"{self._path_of(name)}: tensor {name!r} is not part of the {c.model_type} model config.json describes{more}")

    def _path_of(self, name: str) -> Path:
        return self.files[self.tensors[name].file]

    def _expect(self, name: str, shape: tuple[int, ...]) -> TensorLoc:
        loc = self.tensors.get(name)
        if loc is None:
            where = self.files[0] if len(self.files) == 1 else self.directory
            raise BadModelFile(f"{where}: missing tensor {name!r} (config.json implies a {self.config.model_type} model with it, shape {list(shape)})")
        if loc.info.shape != shape:
            raise BadModelFile(
                f"{self._path_of(name)}: tensor {name!r} has shape {list(loc.info.shape)}, config.json implies {list(shape)}"
            )
        return loc

    def _expert_dtype(self, name: str, dtype: str) -> None:
        if self.expert_dtype is None:
            self.expert_dtype = dtype
        elif dtype != self.expert_dtype:
            raise BadModelFile(
                f"{self._path_of(name)}: expert tensor {name!r} is {dtype}, other experts are {self.expert_dtype} "
                "(all routed experts must share one dtype)"
            )

    def _per_expert_layer(self, layer: int) -> tuple[list[ExpertSpans], set[str]]:
        shapes = names.per_expert_shapes(self.config)
        row, used = [], set()
        for e in range(self.config.num_experts):
            parts = []
            for part in names.PARTS:
                name = names.expert_tensor(layer, e, part)
                loc = self._expect(name, shapes[part])
                self._expert_dtype(name, loc.info.dtype)
                t = loc.info
                parts.append(Span(loc.file, t.start, t.nbytes, t.dtype, t.shape, name))
                used.add(name)
            row.append(make_expert_spans(layer, e, parts))
        return row, used

    def _fused_layer(self, layer: int) -> tuple[list[ExpertSpans], set[str]]:
        c = self.config
        shapes = names.fused_shapes(c)
        gu_name, down_name = names.fused_gate_up(layer), names.fused_down(layer)
        gu = self._expect(gu_name, shapes["gate_up_proj"])
        down = self._expect(down_name, shapes["down_proj"])
        self._expert_dtype(gu_name, gu.info.dtype)
        self._expert_dtype(down_name, down.info.dtype)
        i, h = c.expert_width, c.hidden_size
        gsize = DTYPE_SIZES[gu.info.dtype]
        dsize = DTYPE_SIZES[down.info.dtype]
        row = []
        for e in range(c.num_experts):
            base = gu.info.start + e * 2 * i * h * gsize
            g = Span(gu.file, base, i * h * gsize, gu.info.dtype, (i, h), gu_name)
            u = Span(gu.file, base + i * h * gsize, i * h * gsize, gu.info.dtype, (i, h), gu_name)
            dn = Span(down.file, down.info.start + e * h * i * dsize, h * i * dsize, down.info.dtype, (h, i), down_name)
            row.append(make_expert_spans(layer, e, (g, u, dn)))
        return row, {gu_name, down_name}

    # ---------------------------------------------------------------- experts
    def expert_spans(self, layer: int, expert: int) -> ExpertSpans:
        """The span map of one routed expert (IndexError/ValueError for a dense layer or a number out of range)."""
        row = self._spans[layer]
        if row is None:
            raise ValueError(f"layer {layer} is a dense layer; it has no routed experts")
        if not 0 <= expert < len(row):
            raise IndexError(f"expert {expert} out of range 0..{len(row) - 1}")
        return row[expert]

    @property
    def span_map(self) -> tuple[tuple[ExpertSpans, ...] | None, ...]:
        """Every routed expert's spans, per layer (None for a dense layer)."""
        return tuple(None if row is None else tuple(row) for row in self._spans)

    @property
    def fds(self) -> tuple[int, ...]:
        """The open descriptor of each shard (valid until ``close``)."""
        return self._fds

    def page_in(self, layer: int, expert: int, dst):
        """Read one expert into ``dst`` (at least ``sizes().expert_slot`` bytes); ``(gate, up, down)`` views as stored."""
        if not self._fds:
            raise ValueError("the checkpoint is closed")
        return read_expert(self._fds, self.expert_spans(layer, expert), dst, self.files)

    # ---------------------------------------------------------------- dense tensors
    def mapping(self, file: int) -> mmap.mmap:
        """Shard ``file`` mapped read-only (made on first use, kept until ``close``)."""
        with self._map_lock:
            m = self._maps.get(file)
            if m is None:
                if not self._fds:
                    raise ValueError("the checkpoint is closed")
                m = mmap.mmap(self._fds[file], 0, prot=mmap.PROT_READ)
                self._maps[file] = m
            return m

    def tensor(self, name: str) -> np.ndarray:
        """A read-only view of a tensor as stored (BF16 as uint16 bits), on the shard's read-only mapping.

        Nothing is copied: pages are read when touched.  The view is valid while the checkpoint is open and its
        files unchanged (a shard truncated under a mapping makes a later touch fault)."""
        loc = self.tensors[name]
        t = loc.info
        m = self.mapping(loc.file)
        if t.end > len(m):
            raise BadModelFile(f"{self.files[loc.file]}: tensor {name!r} lies past the end of the file (changed while open?)")
        return stored_view(m, t.dtype, t.shape, t.start)

    def tensor_f32(self, name: str, out: np.ndarray | None = None) -> np.ndarray:
        """A tensor widened to float32, into ``out`` when given (a float32 array of its shape), else a new array."""
        t = self.tensors[name].info
        if out is None:
            out = np.empty(t.shape, np.float32)
        return widen_into(self.tensor(name), t.dtype, out)

    def rows_f32(self, name: str, rows, out: np.ndarray) -> np.ndarray:
        """Rows ``rows`` of a 2-D tensor (the embedding table) widened into ``out`` [len(rows), width], read from the
        mapping on demand: only the pages of those rows are touched.  IndexError for a row out of range."""
        v = self.tensor(name)
        dtype = self.tensors[name].info.dtype
        if v.ndim != 2 or out.shape != (len(rows), v.shape[1]):
            raise ValueError(f"out must have shape ({len(rows)}, {v.shape[1] if v.ndim == 2 else '?'}) for tensor {name!r}")
        for i, r in enumerate(rows):
            if not 0 <= int(r) < v.shape[0]:
                raise IndexError(f"row {r} of tensor {name!r} out of range 0..{v.shape[0] - 1}")
            widen_into(v[int(r)], dtype, out[i])
        return out

    # ---------------------------------------------------------------- sizes
    def sizes(self) -> CheckpointSizes:
        c = self.config
        first = next((row[0] for row in self._spans if row), None)
        experts = sum(len(row) for row in self._spans if row)
        expert_elems = 3 * c.expert_width * c.hidden_size
        dense = [n for n in names.dense_tensors(c) if n != names.EMBED]
        emb = self.tensors[names.EMBED].info
        return CheckpointSizes(
            expert_stored=first.nbytes if first else 0,
            expert_f32=4 * expert_elems if first else 0,
            expert_slot=first.slot_nbytes if first else 0,
            experts=experts,
            dense_stored=sum(self.tensors[n].info.nbytes for n in dense),
            dense_f32=sum(4 * (self.tensors[n].info.nbytes // DTYPE_SIZES[self.tensors[n].info.dtype]) for n in dense),
            embed_stored=emb.nbytes,
            embed_f32=4 * (emb.nbytes // DTYPE_SIZES[emb.dtype]),
            tied=c.tie_word_embeddings,
        )

    def summary(self) -> dict:
        """What ``inspect`` will show, as plain JSON values: the architecture, the shards, the expert layout and
        the bytes as stored and as float32."""
        s = self.sizes()
        return {
            "directory": str(self.directory),
            "config": asdict(self.config),
            "shards": [{"file": p.name, "bytes": h.file_size, "tensors": len(h.tensors)} for p, h in zip(self.files, self.headers)],
            "layouts": list(self.layouts),
            "expert_dtype": self.expert_dtype,
            "experts_straddling_files": sum(len(sp.files) > 1 for row in self._spans if row for sp in row),
            "reads_per_expert": max((len(sp.reads) for row in self._spans if row for sp in row), default=0),
            "sizes": {**asdict(s), "experts_stored": s.experts_stored, "experts_f32": s.experts_f32},
            "bos_ids": list(self.bos_ids),
            "eos_ids": list(self.eos_ids),
        }

    # ---------------------------------------------------------------- closing
    def close(self) -> None:
        for m in self._maps.values():
            with contextlib.suppress(BufferError, ValueError):  # views still alive: the map goes with the last of them
                m.close()
        self._maps.clear()
        for f in self._files:
            with contextlib.suppress(OSError):
                f.close()
        self._files.clear()
        self._fds = ()

    def __enter__(self) -> Checkpoint:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __del__(self):
        with contextlib.suppress(Exception):
            self.close()


def open_checkpoint(directory: str | os.PathLike, require_tokenizer: bool = True) -> Checkpoint:
    """``Checkpoint.open``: the validated checkpoint in ``directory``."""
    return Checkpoint.open(directory, require_tokenizer)
