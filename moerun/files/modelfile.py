"""The safetensors weight file: parse and validate its header, and write it.

moerun parses the header itself (the reference library exposes no byte
offsets) and trusts nothing before it is checked (docs/design/architecture.md, invariants: files are trusted only after validation): header
length bound, well-formed JSON, known dtypes, sizes that match shapes, offsets
inside the file and no overlaps.  The writer orders tensors so that each
expert's matrices form one contiguous byte range and records a digest per
tensor in the metadata, which ``moerun inspect --check`` verifies.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import struct
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from moerun.errors import BadModelFile
from moerun.files.fileio import atomic_path, open_regular

# Item sizes of the dtypes of the safetensors format (safetensors format specification).
DTYPE_SIZES = {
    "BOOL": 1,
    "U8": 1,
    "I8": 1,
    "F8_E4M3": 1,
    "F8_E5M2": 1,
    "I16": 2,
    "U16": 2,
    "F16": 2,
    "BF16": 2,
    "I32": 4,
    "U32": 4,
    "F32": 4,
    "I64": 8,
    "U64": 8,
    "F64": 8,
}
NUMPY_DTYPES = {
    "BOOL": np.bool_,
    "U8": np.uint8,
    "I8": np.int8,
    "I16": np.int16,
    "U16": np.uint16,
    "F16": np.float16,
    "I32": np.int32,
    "U32": np.uint32,
    "F32": np.float32,
    "I64": np.int64,
    "U64": np.uint64,
    "F64": np.float64,
}
_NP_TO_TAG = {np.dtype(v).str: k for k, v in NUMPY_DTYPES.items()}

MAX_HEADER_BYTES = 100 * 1024 * 1024
DIGEST_KEY = "moerun.digests"
DIGEST_ALGO = "blake2b-128"


@dataclass(frozen=True)
class TensorInfo:
    name: str
    dtype: str
    shape: tuple[int, ...]
    start: int  # absolute byte offset in the file
    end: int

    @property
    def nbytes(self) -> int:
        return self.end - self.start


@dataclass(frozen=True)
class Header:
    path: Path
    file_size: int
    data_start: int
    tensors: dict[str, TensorInfo]
    metadata: dict[str, str]


def digest(data: bytes | memoryview | np.ndarray) -> str:
    h = hashlib.blake2b(digest_size=16)
    h.update(memoryview(data).cast("B") if not isinstance(data, np.ndarray) else np.ascontiguousarray(data).view(np.uint8).data)
    return h.hexdigest()


def read_header(path: str | os.PathLike) -> Header:
    """Read and validate a safetensors header; raise BadModelFile naming the problem."""
    path = Path(path)
    try:
        with open_regular(path, BadModelFile, "safetensors file", missing=f"{path}: missing") as f:  # never a FIFO or device
            size = os.fstat(f.fileno()).st_size
            if size < 8:
                raise BadModelFile(f"{path}: truncated ({size} bytes; a safetensors file starts with an 8-byte header length)")
            (n,) = struct.unpack("<Q", f.read(8))
            if n > size - 8:
                raise BadModelFile(f"{path}: header length {n} runs past the end of the file ({size} bytes)")
            if n > MAX_HEADER_BYTES:
                raise BadModelFile(f"{path}: header length {n} is implausibly large (limit {MAX_HEADER_BYTES})")
            raw = f.read(n)
    except FileNotFoundError:
        raise BadModelFile(f"{path}: missing") from None
    except IsADirectoryError:
        raise BadModelFile(f"{path}: is a directory, expected a safetensors file") from None
    except OSError as e:
        raise BadModelFile(f"{path}: cannot read ({e.strerror})") from None
    try:
        doc = json.loads(raw.decode("utf-8"))
    except (ValueError, RecursionError):  # also integers too long to convert (Python's 4300-digit limit)
        raise BadModelFile(f"{path}: header is not valid JSON") from None
    if not isinstance(doc, dict):
        raise BadModelFile(f"{path}: header is not a JSON object")
    try:  # JSON escapes can spell lone surrogates (tensor names, metadata) that no output can print
        json.dumps(doc, ensure_ascii=False).encode("utf-8")
    except (UnicodeEncodeError, RecursionError, ValueError):
        raise BadModelFile(f"{path}: header holds text that is not valid UTF-8") from None
    data_start = 8 + n
    data_len = size - data_start
    metadata = doc.pop("__metadata__", None) or {}
    if not isinstance(metadata, dict) or not all(isinstance(k, str) and isinstance(v, str) for k, v in metadata.items()):
        raise BadModelFile(f"{path}: __metadata__ must map strings to strings")
    tensors: dict[str, TensorInfo] = {}
    for name, entry in doc.items():
        if not isinstance(entry, dict):
            raise BadModelFile(f"{path}: entry for tensor {name!r} is not an object")
        dtype = entry.get("dtype")
        shape = entry.get("shape")
        offsets = entry.get("data_offsets")
        if not isinstance(dtype, str) or dtype not in DTYPE_SIZES:  # a list or object is unhashable: no TypeError
            raise BadModelFile(f"{path}: tensor {name!r} has unknown dtype {dtype!r}")
        if not isinstance(shape, list) or not all(isinstance(s, int) and not isinstance(s, bool) and s >= 0 for s in shape):
            raise BadModelFile(f"{path}: tensor {name!r} has an invalid shape {shape!r}")
        if (
            not isinstance(offsets, list)
            or len(offsets) != 2
            or not all(isinstance(o, int) and not isinstance(o, bool) for o in offsets)
        ):
            raise BadModelFile(f"{path}: tensor {name!r} has invalid data_offsets {offsets!r}")
        begin, end = offsets
        if not 0 <= begin <= end <= data_len:
            raise BadModelFile(f"{path}: tensor {name!r} offsets [{begin}, {end}] lie outside the data ({data_len} bytes)")
        count = 1
        for s in shape:
            count *= s
        if count * DTYPE_SIZES[dtype] != end - begin:
            raise BadModelFile(
                f"{path}: tensor {name!r} holds {end - begin} bytes but {dtype} {shape} needs {count * DTYPE_SIZES[dtype]}"
            )
        tensors[name] = TensorInfo(name, dtype, tuple(shape), data_start + begin, data_start + end)
    prev: TensorInfo | None = None
    for t in sorted(tensors.values(), key=lambda t: (t.start, t.end)):
        if prev is not None and t.start < prev.end:
            raise BadModelFile(f"{path}: tensors {prev.name!r} and {t.name!r} overlap")
        if t.nbytes:
            prev = t
    return Header(path, size, data_start, tensors, metadata)


def expert_span(path, layer: int, expert: int, parts) -> tuple[int, int]:
    """(start, nbytes) of the one byte range an expert's tensors ``parts`` fill together; BadModelFile if they leave a gap.

    An expert is paged in with one read of one range (the writer below stores its parts side by side); the
    store and the page-in probe both take an expert's range from here.
    """
    start, end = min(t.start for t in parts), max(t.end for t in parts)
    if sum(t.nbytes for t in parts) != end - start:
        raise BadModelFile(f"{path}: expert {expert} of layer {layer} is not one contiguous byte range")
    return start, end - start


_NUM = re.compile(r"(\d+)")


def natural_key(name: str) -> list:
    return [int(p) if p.isdigit() else p for p in _NUM.split(name)]


_EXPERT = re.compile(r"^layers\.(\d+)\.experts\.(\d+)\.(.+)$")
_PART_ORDER = {"w_gate": 0, "w_up": 1, "w_down": 2}


def storage_order(names) -> list[str]:
    """Dense tensors first (natural order), then experts by layer, expert, part."""

    def key(name: str):
        m = _EXPERT.match(name)
        if m is None:
            return (0, natural_key(name), 0, 0, 0, "")
        layer, expert, part = int(m.group(1)), int(m.group(2)), m.group(3)
        return (1, [], layer, expert, _PART_ORDER.get(part, 9), part)

    return sorted(names, key=key)


def header_bytes(entries, digests: dict[str, str], metadata: dict[str, str] | None = None) -> bytes:
    """The safetensors header moerun writes: ``entries`` (name, dtype tag, shape, nbytes) in file order.

    The 8-byte little-endian length is not included.  Offsets follow from the order (no gaps), ``metadata`` gains
    moerun's format tag and the per-tensor ``digests``, and the JSON is padded with spaces to a multiple of 8 bytes
    so the data starts aligned.  The one writer of headers: ``save_model_file`` and the streaming writer of
    ``moerun.makers.synthetic`` both build theirs here, so their files are byte for byte the same for the same tensors.
    """
    meta = {"format": "moerun/1", **(metadata or {})}
    record: dict = {"algo": DIGEST_ALGO, "tensors": digests}
    if metadata:  # descriptive records that change the numbers (a quantization's layout) are covered too
        record["metadata"] = {k: digest(v.encode("utf-8", "surrogatepass")) for k, v in sorted(metadata.items())}
    header: dict = {}
    offset = 0
    for name, tag, shape, nbytes in entries:
        header[name] = {"dtype": tag, "shape": list(shape), "data_offsets": [offset, offset + nbytes]}
        offset += nbytes
    meta[DIGEST_KEY] = json.dumps(record, separators=(",", ":"))
    blob = json.dumps({"__metadata__": meta, **header}, separators=(",", ":")).encode("utf-8")
    return blob + b" " * (-len(blob) % 8)


def save_model_file(
    path: str | os.PathLike, tensors: dict[str, np.ndarray], metadata: dict[str, str] | None = None
) -> None:
    """Write ``tensors`` as a safetensors file, atomically, with a digest per tensor.

    Each expert's parts are stored contiguously (dense tensors first, then
    experts in layer, expert, part order), so one expert is one byte range.
    """
    order = storage_order(tensors)
    arrays = {}
    entries = []
    digests = {}
    for name in order:
        a = np.ascontiguousarray(tensors[name])
        tag = _NP_TO_TAG.get(a.dtype.newbyteorder("<").str if a.dtype.byteorder == ">" else a.dtype.str)
        if tag is None:
            raise ValueError(f"tensor {name!r}: dtype {a.dtype} cannot be stored")
        a = a.astype(a.dtype.newbyteorder("<"), copy=False)
        arrays[name] = a
        entries.append((name, tag, a.shape, a.nbytes))
        digests[name] = digest(a)
    blob = header_bytes(entries, digests, metadata)
    with atomic_path(path) as tmp:
        with open(tmp, "wb") as f:
            f.write(struct.pack("<Q", len(blob)))
            f.write(blob)
            for name in order:
                f.write(arrays[name].data)


def _digest_record(header: Header) -> dict | None:
    raw = header.metadata.get(DIGEST_KEY)
    if raw is None:
        return None
    try:
        doc = json.loads(raw)
        if doc.get("algo") != DIGEST_ALGO or not isinstance(doc.get("tensors"), dict):
            raise ValueError
        if not isinstance(doc.get("metadata", {}), dict):
            raise ValueError
        return doc
    except (ValueError, AttributeError, RecursionError):
        raise BadModelFile(f"{header.path}: metadata {DIGEST_KEY!r} is malformed") from None


def recorded_digests(header: Header) -> dict[str, str] | None:
    """The recorded digest of each tensor, or None when the file records none."""
    doc = _digest_record(header)
    return None if doc is None else {str(k): str(v) for k, v in doc["tensors"].items()}


def metadata_digest_problems(header: Header) -> list[str]:
    """The metadata records (besides the format tag and the digests) that their recorded digests do not vouch for:
    changed since they were written, missing, or never covered.  A file that records no digests at all has
    nothing to check (empty list); a record written by a moerun that covered only tensors is reported as not
    covered, since nothing proves it unchanged."""
    doc = _digest_record(header)
    if doc is None:
        return []
    want = {str(k): str(v) for k, v in doc.get("metadata", {}).items()}
    have = {k: v for k, v in header.metadata.items() if k not in ("format", DIGEST_KEY)}
    bad = []
    for key in sorted(set(want) | set(have)):
        if key not in have:
            bad.append(f"metadata {key!r} (missing)")
        elif key not in want:
            bad.append(f"metadata {key!r} (not covered by the digests)")
        elif digest(str(have[key]).encode("utf-8", "surrogatepass")) != want[key]:
            bad.append(f"metadata {key!r}")
    return bad
