"""The opened model file: validated tensors, dense weights, expert byte ranges, page-in.

``ModelStore.open(dir)`` checks the config and every tensor against it before
anything is used.  Dense weights are read once into float32 arrays.  Experts
stay in the file: each is one contiguous byte range, and ``page_in`` copies
one into a caller's buffer (a pool slot) and returns the real time it took in
nanoseconds.

Page-in mechanisms (measured by ``scripts/bench_pagein.py``, see docs/guide/offload.md):
``pread`` (default) reads exactly the expert's bytes with ``os.preadv`` into
the slot; nothing of the file is mapped into the process, so copied pages
never count towards its resident set.  ``mmap`` copies from a read-only map
of the file and then releases the copied range of the map with
``madvise(MADV_DONTNEED)`` so the mapped pages do not stay resident either.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import mmap
import os
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from moerun.errors import BadModelFile, BadOption, ModelFileChanged, PageInError
from moerun.files.checkpoint import STORED_DTYPES, widen_into
from moerun.files.ckpt_config import is_open_checkpoint
from moerun.files.codec import Codec, codec_for, packed_dense_tensors
from moerun.files.config import ModelConfig
from moerun.files.modelfile import NUMPY_DTYPES, Header, TensorInfo, expert_span, read_header
from moerun.files.packed import read_packed_dense, recorded_quant_problem
from moerun.files.pagecache import drop_pages, drop_problem

PAGE = mmap.PAGESIZE
# Linux maps up to this many bytes of already-cached file pages around a read fault
# (fault_around_bytes, default 64 KiB; a multiple of the page size).
FAULT_AROUND = max(PAGE, 64 * 1024)
MECHANISMS = ("pread", "mmap")
DENSE_DTYPES = ("F32", "F16", "BF16")  # BF16: a model quantized from an open checkpoint keeps its dense tensors as stored
WIDEN_CHUNK = 1 << 20  # elements of a 16-bit dense tensor read and widened at a time (2 MiB read, 4 MiB written)


def file_stamp(st: os.stat_result) -> tuple[int, int, int, int, int, int]:
    """What identifies an opened file and moves when anything writes to it: device and inode, size,
    modification time, change time (which the kernel sets on every write, and also when a writer puts the
    modification time back with ``utime``), and the link count (whose changes move the change time too)."""
    return st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns, st.st_ctime_ns, st.st_nlink


def file_change(was: tuple, now: tuple) -> str | None:
    """How an opened file changed between two ``file_stamp``s, or None when no byte can have: the same stamp, or
    only its links changed (a new file renamed over the path unlinks this one; a hard link was made or removed),
    which moves the change time with them and no byte."""
    if now == was or (now[:4] == was[:4] and now[5] != was[5]):
        return None
    if now[:2] != was[:2]:
        return "its descriptor now names another file"
    if now[2] != was[2]:
        return f"{was[2]:,} bytes when opened, {now[2]:,} now"
    return "rewritten in place: the same size, but its modification or change time moved"


@dataclass(frozen=True)
class ExpertRange:
    layer: int
    expert: int
    start: int
    nbytes: int


class _Iovec(ctypes.Structure):
    _fields_ = [("iov_base", ctypes.c_void_p), ("iov_len", ctypes.c_size_t)]


_vm_readv = None


def _process_vm_readv():
    """process_vm_readv(2) from the C library, or False where it is missing."""
    global _vm_readv  # a cache that is safe to drop
    if _vm_readv is None:
        try:
            fn = ctypes.CDLL(None, use_errno=True).process_vm_readv
            fn.argtypes = [ctypes.c_int, ctypes.POINTER(_Iovec), ctypes.c_ulong, ctypes.POINTER(_Iovec), ctypes.c_ulong, ctypes.c_ulong]
            fn.restype = ctypes.c_ssize_t
            _vm_readv = fn
        except (OSError, AttributeError):
            _vm_readv = False
    return _vm_readv


def safe_copy(src_addr: int, dst, nbytes: int) -> int:
    """Copy ``nbytes`` from address ``src_addr`` of this process (a mapped file) into the buffer ``dst``.

    The kernel copies (process_vm_readv on this very process), so a page past the end of a file that shrank
    makes the call stop short and return fewer bytes, where a plain memory copy would die of SIGBUS.
    Returns the bytes copied; OSError where the system refuses the call.
    """
    fn = _process_vm_readv()
    if not fn:
        raise OSError(errno.ENOSYS, "process_vm_readv is not available")
    view = np.frombuffer(memoryview(dst).cast("B"), np.uint8)
    if view.size < nbytes or not view.flags.writeable:
        raise ValueError(f"the destination holds {view.size} writable bytes, fewer than {nbytes}")
    local = _Iovec(view.ctypes.data, nbytes)
    remote = _Iovec(src_addr, nbytes)
    got = fn(os.getpid(), ctypes.byref(local), 1, ctypes.byref(remote), 1, 0)
    if got < 0:
        err = ctypes.get_errno()
        if err == errno.EFAULT:  # nothing could be copied: the first page is already past the end
            return 0
        raise OSError(err, os.strerror(err))
    return int(got)


def pread_into(fd: int, offset: int, dst) -> None:
    """Read exactly len(dst) bytes at ``offset`` into the writable buffer ``dst`` (os.preadv; releases the GIL).

    This is the engine's page-in read; ``moerun probe`` times the same function.
    Raises EOFError if the file ends first.
    """
    view = memoryview(dst).cast("B")
    n = len(view)
    got = os.preadv(fd, [view], offset)
    while got < n:  # short reads are legal; finish or fail
        more = os.preadv(fd, [view[got:]], offset + got)
        if more == 0:
            raise EOFError
        got += more


def _check_dense_tensors(config: ModelConfig, header: Header) -> None:
    """Every dense tensor config.json implies is in the file with its shape and a float dtype; no stray shared expert.

    Quantized attention is stored as packed blobs and checked when it is decoded (``moerun.files.packed``).
    """
    tensors = header.tensors
    packed = packed_dense_tensors(config)
    for name, shape in config.dense_shapes().items():
        if name in packed:
            continue
        t = tensors.get(name)
        if t is None:
            raise BadModelFile(f"{header.path}: missing tensor {name!r}")
        if t.shape != shape:
            raise BadModelFile(f"{header.path}: tensor {name!r} has shape {list(t.shape)}, config.json implies {list(shape)}")
        if t.dtype not in DENSE_DTYPES:
            raise BadModelFile(f"{header.path}: tensor {name!r} has dtype {t.dtype}; dense weights must be F32, F16 or BF16")
    if not config.d_shared:
        stray = next((n for n in tensors if n.startswith("layers.") and ".shared." in n), None)
        if stray is not None:  # computing without it would silently give other numbers
            raise BadModelFile(f"{header.path}: tensor {stray!r} is a shared expert's, but config.json has no d_shared")


def _expert_ranges(config: ModelConfig, header: Header, codec: Codec) -> tuple[list[list[ExpertRange]], dict[str, int]]:
    """Each expert's one byte range, and where its parts lie inside it (the same for every expert).

    A page-in is one read of one range into one slot, and the codec reads the parts at fixed offsets of the
    slot: so every part must have the codec's dtype and shape, and every expert the same layout.
    """
    tensors = header.tensors
    nbytes = sum(p.nbytes for p in codec.parts)
    ranges: list[list[ExpertRange]] = []
    layout: dict[str, int] | None = None
    for layer in range(config.n_layers):
        row = []
        for e in range(config.n_experts):
            infos: list[tuple[TensorInfo, object]] = []
            for part in codec.parts:
                name = config.expert_name(layer, e, part.suffix)
                t = tensors.get(name)
                if t is None:
                    raise BadModelFile(f"{header.path}: missing tensor {name!r}")
                if t.shape != part.shape or t.dtype != part.dtype:
                    raise BadModelFile(
                        f"{header.path}: tensor {name!r} is {t.dtype} {list(t.shape)}, expected {part.dtype} {list(part.shape)}"
                    )
                infos.append((t, part))
            start, span = expert_span(header.path, layer, e, [t for t, _ in infos])
            if span != nbytes:
                raise BadModelFile(f"{header.path}: expert {e} of layer {layer} is not stored as one contiguous byte range")
            rel = {p.suffix: t.start - start for t, p in infos}
            if layout is None:
                layout = rel
            elif rel != layout:
                raise BadModelFile(f"{header.path}: experts are not all stored in the same layout (layer {layer}, expert {e})")
            row.append(ExpertRange(layer, e, start, nbytes))
        ranges.append(row)
    return ranges, layout or {}


class _EmbeddingRows:
    """``rows[ids]`` -> float32 [len(ids), d_model]: the embedding rows of ``ids``, each read from the weights file
    (``ModelStore._read``, os.pread: nothing is mapped) and widened when asked for; the table is never held."""

    def __init__(self, store: ModelStore, t: TensorInfo):
        self.store = store
        self.t = t
        self.row_bytes = t.nbytes // t.shape[0]

    def __getitem__(self, ids) -> np.ndarray:
        ids = np.atleast_1d(np.asarray(ids))
        t = self.t
        out = np.empty((ids.size, t.shape[1]), np.float32)
        for i, tok in enumerate(ids.tolist()):
            if not 0 <= tok < t.shape[0]:
                raise IndexError(f"token {tok} out of range 0..{t.shape[0] - 1}")
            raw = self.store._read(t.start + int(tok) * self.row_bytes, self.row_bytes)
            if t.dtype == "F32":
                out[i] = np.frombuffer(raw, "<f4")
            else:
                widen_into(np.frombuffer(raw, STORED_DTYPES[t.dtype]), t.dtype, out[i])
            if not np.all(np.isfinite(out[i])):
                raise BadModelFile(f"{self.store.path}: tensor 'embed' holds NaN or infinite values (row {tok})")
        return out


class ModelStore:
    """A validated, opened model directory (weights file, config, paths)."""

    def __init__(self, model_dir: Path, config: ModelConfig, header: Header, codec: Codec, ranges, expert_nbytes: int):
        self.model_dir = model_dir
        self.config = config
        self.header = header
        self.codec = codec
        self.ranges: list[list[ExpertRange]] = ranges
        self.expert_nbytes = expert_nbytes
        self.path = header.path
        self.mechanism = "pread"
        # bytes/s of an emulated link, None = real speed: a setting only; the expert source that reads
        # the experts owns the link (moerun.runtime.sources.ExpertSource.link)
        self.link_rate: float | None = None
        self.cold_reads = False  # drop each expert's pages from the page cache after reading it: every read is cold
        # the one fault seam (tests): hook(layer, expert, guess) before every expert read; for a guess the
        # reader process reads, when it is handed over.  Raising fails that read.
        self.fault_hook = None
        self._fd = os.open(self.path, os.O_RDONLY)
        self._stamp = file_stamp(os.fstat(self._fd))  # the file as opened (check_unchanged)
        self._map: mmap.mmap | None = None
        self._map_addr = 0
        self.dense: dict[str, np.ndarray] = {}
        # the embedding table is dense["embed"]; an open checkpoint's store, and this one for a model quantized from an
        # untied one, read rows on demand (dense["embed"] is None then)
        self.embed = None
        self._dense_nbytes = 0

    # ---------------------------------------------------------------- opening
    @classmethod
    def open(cls, model_dir: str | os.PathLike) -> ModelStore:
        """Open a model directory, trusting nothing in it before it is checked (docs/design/architecture.md, invariants).

        config.json, the header, every dense tensor's shape and dtype, the quantization recorded in the file against
        config.json's, and each expert's byte range are validated; then the dense weights are read (BadModelFile for
        anything wrong, with the file named).
        """
        model_dir = Path(model_dir)
        if not model_dir.exists():
            raise BadModelFile(f"{model_dir}: no such model directory")
        if not model_dir.is_dir():
            raise BadModelFile(f"{model_dir}: not a directory (--model takes a model directory)")
        if is_open_checkpoint(model_dir):  # the callers that take one open it with moerun.files.ckpt_store.open_store
            raise BadModelFile(
                f"{model_dir}: an open checkpoint (config.json names a model_type); this command does not run on "
                "open checkpoints yet (generate, verify, inspect, probe, plan, record, score and quantize do)"
            )
        config = ModelConfig.load(model_dir)
        header = read_header(model_dir / "model.safetensors")
        _check_dense_tensors(config, header)
        problem = recorded_quant_problem(config, header.metadata)
        if problem is not None:  # decoding with another layout than the one written would give other numbers
            raise BadModelFile(f"{header.path}: {problem}")
        first = header.tensors.get(config.expert_name(0, 0, "w_gate"))
        expert_dtype = first.dtype if first is not None and first.dtype in ("F32", "F16") else "F32"
        codec = codec_for(config, expert_dtype)
        ranges, layout = _expert_ranges(config, header, codec)
        store = cls(model_dir, config, header, codec.with_offsets(layout), ranges, sum(p.nbytes for p in codec.parts))
        try:
            store._load_dense()
        except BaseException:
            store.close()
            raise
        return store

    def _read(self, start: int, nbytes: int) -> bytes:
        data = os.pread(self._fd, nbytes, start)
        if len(data) != nbytes:
            raise BadModelFile(f"{self.path}: file ended early (changed while open?)")
        self.check_unchanged()
        return data

    def check_unchanged(self) -> None:
        """ModelFileChanged if the opened file has been written to since it was opened.

        One ``fstat`` of the open descriptor (about a microsecond), compared with ``file_stamp`` at opening.
        Called after every read (a read that returned rewritten bytes ran after the write, and the write had
        already moved the change time) and by the engine after every forward pass of a run with the reader (which covers the reader
        process's reads: they were done before the pass ended).  A new file renamed over the path changes
        nothing here: the descriptor keeps the file that was opened, whose link count alone changes.
        Other changes of the file's status also move its change time (chmod, chown, renaming the file
        itself) and are taken for a change: a run is stopped rather than trusted.  (On a kernel with coarse timestamps, a rewrite of the same size within one clock tick, a few
        milliseconds, of the file's previous change would leave both times as they were.)
        """
        if self._fd < 0:
            return
        try:
            now = file_stamp(os.fstat(self._fd))
        except OSError as e:
            raise PageInError(f"{self.path}: cannot check the file ({e.strerror or e})") from None
        what = file_change(self._stamp, now)
        if what is None:
            self._stamp = now
            return
        raise ModelFileChanged(
            f"{self.path}: the model file changed while this run was using it ({what}); results computed from it "
            f"cannot be trusted. Replace a model by renaming a new file over it, never by writing into it"
        )

    def _load_dense(self) -> None:
        packed = packed_dense_tensors(self.config)
        rows_on_demand = bool(self.config.arch) and not self.config.tied_embeddings
        for name in self.config.dense_shapes():
            if name == "embed" and rows_on_demand:
                # a model quantized from an open checkpoint reads embedding rows when a token needs them, as the
                # checkpoint's store does: the table (150k x 2048 is 1.2 GB as float32) is never held
                self.dense["embed"] = None
                self.embed = _EmbeddingRows(self, self.header.tensors["embed"])
                continue
            if name in packed:  # a quantized attention matrix, dequantized once here
                self.dense[name] = read_packed_dense(self.config, self.header, name, packed[name], self._read)
                continue
            t = self.header.tensors[name]
            if t.dtype == "F32":  # the bytes read are the array: held once
                raw = self._read(t.start, t.nbytes)
                self.dense[name] = np.frombuffer(raw, dtype="<f4").reshape(t.shape)
            else:
                self.dense[name] = self._read_widened(t)
            if not np.all(np.isfinite(self.dense[name])):
                raise BadModelFile(f"{self.path}: tensor {name!r} holds NaN or infinite values")
        self._dense_nbytes = sum(a.nbytes for a in self.dense.values() if a is not None)

    def _read_widened(self, t: TensorInfo) -> np.ndarray:
        """A 16-bit (F16 or BF16) tensor as a new float32 array, read and widened WIDEN_CHUNK elements at a time: the
        stored bytes are never held whole beside the float32 copy (an embedding table of 150k x 2048 would be 0.6
        GB of them)."""
        out = np.empty(t.shape, np.float32)
        flat = out.reshape(-1)
        for i in range(0, flat.size, WIDEN_CHUNK):
            n = min(WIDEN_CHUNK, flat.size - i)
            src = np.frombuffer(self._read(t.start + 2 * i, 2 * n), STORED_DTYPES[t.dtype])
            widen_into(src, t.dtype, flat[i : i + n])
        return out

    def release_dense(self, names) -> None:
        """Let go of dense weights the model now holds in another form (the engine fuses wq, wk, wv into one matrix).

        The store keeps no second float32 copy that nothing reads; ``dense_nbytes`` stays the figure the budget
        was planned with, since the fused copy takes the same bytes.
        """
        for name in names:
            self.dense.pop(name, None)

    # ---------------------------------------------------------------- sizes
    @property
    def dense_nbytes(self) -> int:
        """Bytes the dense weights take in memory (as float32), fixed at load."""
        return self._dense_nbytes

    @property
    def expert_total_nbytes(self) -> int:
        return self.expert_nbytes * self.config.n_layers * self.config.n_experts

    @property
    def slot_nbytes(self) -> int:
        """What a pool slot must hold for one expert: here its bytes as stored (``expert_nbytes``)."""
        return self.expert_nbytes

    def finish_read(self, dst) -> None:
        """Make a slot's freshly read bytes ready for the codec: nothing to do for a moerun model."""

    def expert_range(self, layer: int, expert: int) -> ExpertRange:
        return self.ranges[layer][expert]

    def tensor_bytes(self, name: str) -> bytes:
        """A tensor's bytes exactly as stored (what its recorded digest covers); BadModelFile if the file ended."""
        t = self.header.tensors[name]
        return self._read(t.start, t.nbytes) if t.nbytes else b""

    def read_tensor(self, name: str) -> np.ndarray:
        """Any tensor of the file as a numpy array (a copy; BF16 as its uint16 bits), for inspection and tests."""
        t = self.header.tensors[name]
        raw = self.tensor_bytes(name)
        dtype = STORED_DTYPES["BF16"] if t.dtype == "BF16" else np.dtype(NUMPY_DTYPES[t.dtype]).newbyteorder("<")
        return np.frombuffer(raw, dtype=dtype).reshape(t.shape).copy()

    # ---------------------------------------------------------------- page-in
    @property
    def fds(self) -> tuple[int, ...]:
        """The weight files' open descriptors (one here), as ``read_pieces`` numbers them."""
        return (self._fd,)

    def read_pieces(self, layer: int, expert: int) -> tuple[tuple[int, int, int, int], ...]:
        """How the reader process copies an expert: ((file, offset, nbytes, slot offset),): one range here."""
        r = self.ranges[layer][expert]
        return ((0, r.start, r.nbytes, 0),)

    def set_mechanism(self, mechanism: str) -> None:
        if mechanism not in MECHANISMS:
            raise ValueError(f"unknown page-in mechanism {mechanism!r}")
        if mechanism == "mmap" and self._map is None:
            m = mmap.mmap(self._fd, 0, prot=mmap.PROT_READ)
            view = np.frombuffer(m, np.uint8)
            self._map_addr = view.ctypes.data  # valid while the map is open; the view is dropped so close() works
            del view
            probe = np.empty(1, np.uint8)
            try:  # the copy must be SIGBUS-safe; where the kernel refuses the safe copy, refuse mmap
                safe_copy(self._map_addr, probe, 1)
            except OSError as e:
                m.close()
                raise BadOption(
                    f"page-in mechanism 'mmap' is not available here: its SIGBUS-safe copy (process_vm_readv) "
                    f"is refused ({e.strerror or e}); use 'pread'"
                ) from None
            self._map = m
        self.mechanism = mechanism

    def page_in(self, layer: int, expert: int, dst: np.ndarray) -> int:
        """Copy one expert's bytes into ``dst`` (uint8, at least expert_nbytes) at the storage's real
        speed; return ns.  (An emulated link is its expert source's: ``ExpertSource.page_in``.)"""
        t0 = time.monotonic_ns()
        self.copy_in(layer, expert, dst)
        return time.monotonic_ns() - t0

    def fault(self, layer: int, expert: int, guess: bool = False) -> None:
        """The fault seam: runs ``fault_hook`` (if set) before a read of the expert; ``guess`` for a guess's read."""
        if self.fault_hook is not None:
            self.fault_hook(layer, expert, guess)

    def copy_in(self, layer: int, expert: int, dst: np.ndarray, guess: bool = False) -> int:
        """Copy one expert's bytes into ``dst`` at the storage's real speed (no emulated link); return ns.
        ``guess``: the read is a guess's (as the fault seam is told)."""
        r = self.ranges[layer][expert]
        t0 = time.monotonic_ns()
        try:
            if self.fault_hook is not None:
                self.fault_hook(layer, expert, guess)
            if self.mechanism == "pread":
                try:
                    pread_into(self._fd, r.start, dst[: r.nbytes])
                except EOFError:
                    raise PageInError(
                        f"{self.path}: file ended while reading expert {expert} of layer {layer} (file changed while open?)"
                    ) from None
            else:
                m = self._map
                if m is None or r.start + r.nbytes > len(m) or r.start + r.nbytes > os.fstat(self._fd).st_size:
                    # touching mapped pages past the end of a file that shrank would kill the process (SIGBUS)
                    raise PageInError(f"{self.path}: expert {expert} of layer {layer} lies outside the file (file changed while open?)")
                # the kernel copies: a file that shrinks during the copy stops it short (no SIGBUS)
                got = safe_copy(self._map_addr + r.start, dst, r.nbytes)
                if got != r.nbytes or r.start + r.nbytes > os.fstat(self._fd).st_size:  # (the last page reads zeros past the end)
                    raise PageInError(
                        f"{self.path}: file ended while reading expert {expert} of layer {layer} (file changed while open?)"
                    )
                # Release the copied range, widened to the kernel's fault-around windows:
                # a read fault maps the cached pages of the whole aligned window around it,
                # and those would otherwise stay in the resident set, one window per expert.
                lo = r.start - r.start % FAULT_AROUND
                hi = min(len(m), -(-(r.start + r.nbytes) // FAULT_AROUND) * FAULT_AROUND)
                try:
                    m.madvise(mmap.MADV_DONTNEED, lo, hi - lo)
                except (OSError, ValueError):
                    pass
        except OSError as e:
            raise PageInError(f"{self.path}: reading expert {expert} of layer {layer} failed ({e.strerror or e})") from None
        ns = time.monotonic_ns() - t0
        self.check_unchanged()  # after the read: a write that reached the bytes read had moved the stamp first
        if self.cold_reads:
            if drop_problem() is None:
                with contextlib.suppress(OSError):  # advice only: a refused drop leaves a warm read, not a wrong one
                    drop_pages(self._fd, r.start, r.nbytes)
        return ns

    def drop_cache(self) -> bool:
        """Ask the OS to drop this file's pages from its cache (for cold runs). True if advised."""
        if drop_problem() is not None:
            return False
        if self._map is not None:
            try:
                self._map.madvise(mmap.MADV_DONTNEED)
            except (OSError, ValueError):
                pass
        drop_pages(self._fd)
        return True

    def close(self) -> None:
        if self._map is not None:
            try:
                self._map.close()
            except (BufferError, ValueError):
                pass
            self._map = None
        if self._fd >= 0:
            os.close(self._fd)
            self._fd = -1

    def __del__(self):
        try:
            self.close()
        except Exception:
            pass
