"""Fuzzing the readers of files that come from outside: the weight file, config.json and routing traces.

Whatever the bytes, every input ends in exactly one of two ways (docs/design/architecture.md, invariants: files are trusted only after validation):

- a model that loads and computes logits, bit-identical to the untouched model's whenever the tensors
  it uses hold the same bytes; or
- one clear error, a ``moerun.errors.MoerunError`` subclass (which ``moerun.cli.main`` prints as one line with
  exit 2),

and never another exception, a read outside the file, or an allocation larger than the file justifies
(tracemalloc sees numpy's buffers as well as Python objects).  Non-finite logits are accepted here only
when the weights' bytes really changed and ``inspect --check`` names a tensor; that the engine should
refuse them outright is pinned, as a known gap, in tests/test_faults.py.

Inputs are valid small files mutated in the ways real damage and hostile writers produce: bit flips,
truncation, the header length field, JSON edits (dtype, shape, data_offsets, ``__metadata__``, missing,
renamed, duplicated and extra tensors), and for traces both damaged archives and well-formed archives
holding the wrong arrays.  The default runs are derandomized (the same examples every run, so CI is
stable) and take a few seconds each; ``-m slow`` runs the same properties at length with fresh examples.

Format facts used below:
- safetensors format specification (the safetensors project's README, "Format"): an 8-byte little-endian
  unsigned header length N, then N bytes of UTF-8 JSON mapping tensor names to ``dtype``, ``shape`` and
  ``data_offsets`` [begin, end) relative to the byte after the header, with optional ``__metadata__``
  mapping strings to strings; the header may be padded with spaces (0x20).
- .npz: numpy's ``numpy.lib.format`` documentation (numpy 2.x): a zip archive of ``.npy`` members, each
  starting with the magic ``\\x93NUMPY``, a version, a header length and a Python-literal dict with
  ``descr``, ``fortran_order`` and ``shape``; ``savez`` stores members, ``savez_compressed`` deflates them.
- deflate cannot expand more than about 1032:1 (zlib's technical details, "Maximum compression factor"),
  which bounds what a compressed member may honestly decompress to.
"""

from __future__ import annotations

import contextlib
import copy
import io
import json
import os
import shutil
import struct
import tempfile
import tracemalloc
import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

import moerun
from moerun.cli import main as cli
from moerun.cli.commands.inspect import check_digests
from moerun.errors import BadModelFile, BadTrace, MoerunError
from moerun.files.config import ModelConfig
from moerun.files.modelfile import DIGEST_KEY, DTYPE_SIZES, MAX_HEADER_BYTES, Header, read_header, recorded_digests
from moerun.files.store import ModelStore
from moerun.files.trace import Trace, read_trace, write_trace
from moerun.makers.synthetic import synth_config, write_model

# A model small enough that one load + forward pass costs about a millisecond: 2 layers, 4 experts, top-2.
SHAPE = dict(layers=2, experts=4, top_k=2, d_model=16, d_expert=16, n_heads=2, n_kv_heads=1, head_dim=8, max_seq_len=16)
PROMPT = [0, 5, 17, 200]

FAST = dict(deadline=None, derandomize=True, database=None, suppress_health_check=list(HealthCheck))
SLOW = dict(deadline=None, derandomize=False, database=None, suppress_health_check=list(HealthCheck))

# Bounds on what a parse may allocate.  Python's json builds a few objects per token of the header
# (measured: about 6 bytes of objects per header byte for moerun's headers, at most about 40 for a
# header of tiny numbers); the bound is generous and still catches any allocation sized by a number
# *inside* the file rather than by the file's length.
PARSE_BYTES_PER_FILE_BYTE = 64
PARSE_SLACK = 256 * 1024
LOAD_SLACK = 1 << 20
TRACE_BYTES_PER_JUSTIFIED_BYTE = 32  # int16 ids widen to int64 (4x), plus a sorted copy and masks
TRACE_SLACK = 1 << 20
DEFLATE_MAX_RATIO = 1032


def _bits(a) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float32).view(np.uint32)


@contextlib.contextmanager
def _peak_allocation():
    """Yield a one-item list that holds tracemalloc's peak (bytes) once the block ends."""
    out = [0]
    tracemalloc.start()
    try:
        yield out
    finally:
        out[0] = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()


@contextlib.contextmanager
def _reads_inside_files():
    """Record every positional read (os.pread, os.preadv) that asks for bytes past the end of its file.

    The store reads the weight file only through these two calls (header via a bounded file read,
    dense tensors via os.pread, experts via os.preadv), so this sees every data read it makes.
    """
    real_pread, real_preadv = os.pread, os.preadv
    outside: list[tuple[int, int, int]] = []

    def check(fd: int, n: int, offset: int) -> None:
        size = os.fstat(fd).st_size
        if offset < 0 or offset + n > size:
            outside.append((offset, n, size))

    def pread(fd, n, offset):
        check(fd, n, offset)
        return real_pread(fd, n, offset)

    def preadv(fd, buffers, offset, *rest):
        check(fd, sum(memoryview(b).nbytes for b in buffers), offset)
        return real_preadv(fd, buffers, offset, *rest)

    os.pread, os.preadv = pread, preadv
    try:
        yield outside
    finally:
        os.pread, os.preadv = real_pread, real_preadv


# ---------------------------------------------------------------------------- the untouched model


@dataclass(repr=False)
class BaseModel:
    dir: Path
    work: Path
    blob: bytes
    doc: dict  # the header as written
    header: Header
    names: list[str]  # tensor names, sorted
    logits: np.ndarray  # resident logits of PROMPT
    load_peak: int  # tracemalloc peak of loading it and computing PROMPT's logits

    def __repr__(self) -> str:  # keep hypothesis' failure reports short
        return f"BaseModel({self.dir})"

    def _repr_pretty_(self, p, cycle) -> None:  # hypothesis' pretty printer would list every field
        p.text(repr(self))

    @property
    def data_start(self) -> int:
        return self.header.data_start

    def tensor_bytes(self, name: str) -> bytes:
        t = self.header.tensors[name]
        return self.blob[t.start : t.end]


@pytest.fixture(scope="module")
def base(tmp_path_factory) -> BaseModel:
    root = tmp_path_factory.mktemp("fuzz")
    d = write_model(root / "model", synth_config(**SHAPE), seed=11)
    blob = (d / "model.safetensors").read_bytes()
    (n,) = struct.unpack("<Q", blob[:8])
    doc = json.loads(blob[8 : 8 + n])
    header = read_header(d / "model.safetensors")
    with _peak_allocation() as peak:
        with moerun.load(d, tokenizer=False) as eng:
            logits = eng.logits(PROMPT)
    work = root / "work"
    work.mkdir()
    return BaseModel(d, work, blob, doc, header, sorted(header.tensors), logits, peak[0])


def _model_dir_with(base: BaseModel, blob: bytes, config: dict | None = None) -> Path:
    d = Path(tempfile.mkdtemp(dir=base.work))
    if config is None:
        shutil.copyfile(base.dir / "config.json", d / "config.json")
    else:
        (d / "config.json").write_text(json.dumps(config))
    (d / "model.safetensors").write_bytes(blob)
    return d


def _same_weights(base: BaseModel, header: Header, blob: bytes) -> bool:
    """True when every tensor of the untouched file is present with the same dtype, shape and bytes."""
    for name, t0 in base.header.tensors.items():
        t = header.tensors.get(name)
        if t is None or t.dtype != t0.dtype or t.shape != t0.shape or blob[t.start : t.end] != base.tensor_bytes(name):
            return False
    return True


def _digest_check_names_a_tensor(d: Path) -> bool | None:
    """Whether ``inspect --check`` would name a tensor; None when the file records no usable digests."""
    store = ModelStore.open(d)
    try:
        try:
            if recorded_digests(store.header) is None:
                return None
        except BadModelFile:
            return None
        bad, _ = check_digests(store)
        return bool(bad)
    finally:
        store.close()


def _logits_or_error(d: Path, **kw) -> np.ndarray | None:
    """Logits of PROMPT from the model in d, or None if loading or running it raised a MoerunError."""
    try:
        eng = moerun.load(d, tokenizer=False, **kw)
    except MoerunError:
        return None
    with eng:
        try:
            return eng.logits(PROMPT)
        except MoerunError:
            return None


def _check_model_outcome(base: BaseModel, blob: bytes) -> str:
    """The fuzz property for one weight file; returns what happened (for hypothesis' statistics)."""
    d = _model_dir_with(base, blob)
    try:
        path = d / "model.safetensors"
        with _peak_allocation() as peak:
            try:
                header = read_header(path)
            except MoerunError:
                header = None
        assert peak[0] <= PARSE_BYTES_PER_FILE_BYTE * len(blob) + PARSE_SLACK, (
            f"parsing a {len(blob)}-byte file allocated {peak[0]} bytes"
        )
        if header is None:
            return "refused by the header parser"
        with _reads_inside_files() as outside, _peak_allocation() as peak, np.errstate(all="ignore"):
            resident = _logits_or_error(d)
            # a small slot list makes the forward pass page experts in through the store's read path
            paged = _logits_or_error(d, slots=[SHAPE["top_k"]] * SHAPE["layers"]) if resident is not None else None
        assert not outside, f"reads outside the file (offset, length, file size): {outside}"
        assert peak[0] <= base.load_peak + PARSE_BYTES_PER_FILE_BYTE * len(blob) + LOAD_SLACK
        if resident is None:
            return "refused when loaded"
        assert resident.dtype == np.float32 and resident.shape == base.logits.shape
        assert paged is not None and np.array_equal(_bits(resident), _bits(paged))  # offloading changes nothing
        if _same_weights(base, header, blob):
            assert np.array_equal(_bits(resident), _bits(base.logits))
            return "loaded, same weights, same logits"
        if np.isfinite(resident).all():
            return "loaded, changed weights, finite logits"
        # Corrupted values (a flipped exponent bit, say) pass every structural check; the digests catch them.
        assert _digest_check_names_a_tensor(d) is not False, "non-finite logits, yet inspect --check finds nothing"
        return "loaded, changed weights, non-finite logits, named by inspect --check"
    finally:
        shutil.rmtree(d, ignore_errors=True)


# ---------------------------------------------------------------------------- mutations of the weight file

JSON_LEAVES = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-(2**70), 2**70),
    st.floats(),  # json writes NaN and Infinity, which Python's reader accepts
    st.text(max_size=8),
)
JSON_VALUES = st.recursive(JSON_LEAVES, lambda c: st.lists(c, max_size=4) | st.dictionaries(st.text(max_size=6), c, max_size=4), max_leaves=10)
INTERESTING_INTS = st.sampled_from([0, 1, 2, 3, 4, 255, 256, 2**31 - 1, 2**31, 2**32, 2**53 + 1, 2**63 - 1, 2**63, 2**64, 10**30, -1, -(2**63)])
INTS = st.one_of(st.integers(-3, 300), INTERESTING_INTS, st.integers(-(2**70), 2**70))
DTYPE_NAMES = sorted(DTYPE_SIZES) + ["F31", "f32", "", "float32", "Q4_0", "F32 ", "__proto__"]
EDIT_KINDS = ["dtype", "shape", "offsets", "entry", "drop", "rename", "swap", "extra", "meta", "digests", "duplicate", "doc"]


def _perturbed_shape(draw, shape: list[int]) -> list:
    how = draw(st.sampled_from(["one dim", "reverse", "append", "drop", "any"]))
    shape = list(shape)
    if how == "one dim" and shape:
        i = draw(st.integers(0, len(shape) - 1))
        d = shape[i] if isinstance(shape[i], int) else 0  # an earlier edit may have put anything there
        shape[i] = draw(st.one_of(st.sampled_from([0, d - 1, d + 1, 2 * d]), INTS))
    elif how == "reverse":
        shape.reverse()
    elif how == "append":
        shape.append(draw(st.sampled_from([0, 1, 2])))
    elif how == "drop" and shape:
        shape.pop()
    else:
        shape = draw(st.lists(INTS, max_size=4))
    return shape


def _perturbed_offsets(draw, offsets: list[int]) -> object:
    how = draw(st.sampled_from(["shift", "one end", "wrong length", "any ints", "any json"]))
    ok = isinstance(offsets, list) and len(offsets) == 2 and all(type(x) is int for x in offsets)
    b, e = offsets if ok else (0, 0)  # an earlier edit of the same entry may have replaced them already
    if how == "shift":
        d = draw(st.one_of(st.integers(-64, 64), INTS))
        return [b + d, e + d]
    if how == "one end":
        return [b + draw(st.integers(-8, 8)), e] if draw(st.booleans()) else [b, e + draw(st.one_of(st.integers(-8, 8), INTS))]
    if how == "wrong length":
        return draw(st.sampled_from([[], [b], [b, e, e], [e, b]]))
    if how == "any ints":
        return draw(st.lists(INTS, min_size=2, max_size=2))
    return draw(JSON_VALUES)


def _edit_digests(draw, meta: dict) -> None:
    how = draw(st.sampled_from(["change one", "drop key", "garbage", "other algo", "drop one", "deep"]))
    raw = meta.get(DIGEST_KEY)
    if how == "drop key":
        meta.pop(DIGEST_KEY, None)
    elif how == "garbage":
        meta[DIGEST_KEY] = draw(st.one_of(st.text(max_size=20), JSON_VALUES.map(json.dumps)))
    elif how == "deep":  # nested past Python's recursion limit
        meta[DIGEST_KEY] = "[" * 100_000 + "]" * 100_000
    elif raw is not None:
        try:  # an earlier edit may have left something that is not the writer's digest record
            doc = json.loads(raw)
            names = sorted(doc["tensors"])
        except (ValueError, RecursionError, KeyError, TypeError):
            return
        if not names:
            return
        if how == "change one":
            doc["tensors"][draw(st.sampled_from(names))] = draw(st.sampled_from(["0" * 32, "", "zz"]))
        elif how == "drop one":
            del doc["tensors"][draw(st.sampled_from(names))]
        else:
            doc["algo"] = draw(st.sampled_from(["sha256", "", "blake2b-256"]))
        meta[DIGEST_KEY] = json.dumps(doc)


@st.composite
def header_edits(draw, base: BaseModel) -> bytes:
    """The weight file with its JSON header edited (the data bytes kept), re-serialised with a length field."""
    doc: object = copy.deepcopy(base.doc)
    duplicate = None
    for _ in range(draw(st.integers(1, 3))):
        kind = draw(st.sampled_from(EDIT_KINDS))
        if not isinstance(doc, dict):
            break
        names = sorted(k for k in doc if k != "__metadata__" and isinstance(doc[k], dict))
        name = draw(st.sampled_from(names)) if names else None
        entry = doc.get(name) if name is not None else None
        if kind == "dtype" and entry is not None:
            entry["dtype"] = draw(st.one_of(st.sampled_from(DTYPE_NAMES), JSON_VALUES))
        elif kind == "shape" and entry is not None and isinstance(entry.get("shape"), list):
            entry["shape"] = _perturbed_shape(draw, entry["shape"]) if draw(st.booleans()) else draw(JSON_VALUES)
        elif kind == "offsets" and entry is not None and isinstance(entry.get("data_offsets"), list) and len(entry["data_offsets"]) == 2:
            entry["data_offsets"] = _perturbed_offsets(draw, entry["data_offsets"])
        elif kind == "entry" and name is not None:
            doc[name] = draw(JSON_VALUES)
        elif kind == "drop" and name is not None:
            del doc[name]
        elif kind == "rename" and name is not None:
            new = draw(st.one_of(st.sampled_from(["layers.0.experts.9.w_up", "layers.2.router", name + "x", name.upper(), "", "__metadata__"]), st.text(max_size=10)))
            doc[new] = doc.pop(name)
        elif kind == "swap" and len(names) >= 2:
            a, b = draw(st.lists(st.sampled_from(names), min_size=2, max_size=2, unique=True))
            doc[a]["data_offsets"], doc[b]["data_offsets"] = doc[b].get("data_offsets"), doc[a].get("data_offsets")
        elif kind == "extra":
            doc[draw(st.text(max_size=12))] = {
                "dtype": draw(st.sampled_from(DTYPE_NAMES)),
                "shape": draw(st.lists(INTS, max_size=3)),
                "data_offsets": draw(st.lists(INTS, min_size=2, max_size=2)),
            }
        elif kind == "meta":
            doc["__metadata__"] = draw(st.one_of(JSON_VALUES, st.dictionaries(st.text(max_size=6), st.text(max_size=6), max_size=3)))
        elif kind == "digests" and isinstance(doc.get("__metadata__"), dict):
            _edit_digests(draw, doc["__metadata__"])
        elif kind == "duplicate" and entry is not None:
            # a second entry under the same name; Python's json keeps the later one
            twin = copy.deepcopy(entry)
            if isinstance(twin.get("data_offsets"), list) and len(twin["data_offsets"]) == 2:
                twin["data_offsets"] = _perturbed_offsets(draw, twin["data_offsets"])
            duplicate = (name, twin, draw(st.booleans()))
        elif kind == "doc":
            doc = draw(JSON_VALUES)
    body = json.dumps(doc, ensure_ascii=draw(st.booleans())).encode("utf-8")
    if duplicate is not None and isinstance(doc, dict) and body.endswith(b"}") and len(body) > 2:
        name, twin, first = duplicate
        pair = json.dumps({name: twin})[1:-1].encode()
        body = b"{" + pair + b", " + body[1:] if first else body[:-1] + b", " + pair + b"}"
    body += b" " * draw(st.integers(0, 16))
    length = len(body)
    if draw(st.integers(0, 9)) == 0:  # now and then, a length field that disagrees
        length = draw(st.one_of(st.integers(max(0, length - 16), length + 16), st.integers(0, 2**64 - 1)))
    return struct.pack("<Q", length) + body + base.blob[base.data_start :]


@st.composite
def byte_damage(draw, base: BaseModel) -> bytes:
    """The weight file with raw damage: bit flips (header-weighted), truncation, the length field, splices."""
    blob = bytearray(base.blob)
    kind = draw(st.sampled_from(["flip", "flip", "truncate", "length", "splice", "append"]))
    if kind == "flip":
        for _ in range(draw(st.integers(1, 8))):
            pos = draw(st.one_of(st.integers(0, base.data_start - 1), st.integers(0, len(blob) - 1)))
            blob[pos] ^= 1 << draw(st.integers(0, 7))
    elif kind == "truncate":
        blob = blob[: draw(st.one_of(st.integers(0, 16), st.integers(0, len(blob) - 1)))]
    elif kind == "length":
        special = [0, 1, 7, 8, base.data_start - 9, base.data_start - 7, len(blob) - 8, len(blob) - 7,
                   MAX_HEADER_BYTES, MAX_HEADER_BYTES + 1, 2**63, 2**64 - 1]
        blob[:8] = struct.pack("<Q", draw(st.one_of(st.sampled_from(special), st.integers(0, 2**64 - 1))))
    elif kind == "splice":
        pos = draw(st.integers(0, len(blob) - 1))
        n = draw(st.integers(0, 32))
        blob[pos : pos + n] = draw(st.binary(max_size=32))
    else:
        blob += draw(st.binary(min_size=1, max_size=64))
    return bytes(blob)


def model_file_mutations(base: BaseModel):
    return st.one_of(header_edits(base), byte_damage(base))


@settings(max_examples=250, **FAST)
@given(data=st.data())
def test_mutated_weight_file_loads_or_fails_with_one_clear_error(base, data):
    blob = data.draw(model_file_mutations(base), label="weight file")
    event(_check_model_outcome(base, blob))


@pytest.mark.slow
@settings(max_examples=4000, **SLOW)
@given(data=st.data())
def test_mutated_weight_file_loads_or_fails_with_one_clear_error_at_length(base, data):
    blob = data.draw(model_file_mutations(base), label="weight file")
    event(_check_model_outcome(base, blob))


def _run_cli(*argv) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            code = cli.main(list(argv))
        except SystemExit as e:
            code = e.code
    return code, out.getvalue(), err.getvalue()


@settings(max_examples=60, **FAST)
@given(data=st.data())
def test_inspect_check_on_a_mutated_file_exits_0_1_or_2_with_one_line(base, data):
    blob = data.draw(model_file_mutations(base), label="weight file")
    d = _model_dir_with(base, blob)
    try:
        code, out, err = _run_cli("inspect", "--model", str(d), "--check", "--json")
    finally:
        shutil.rmtree(d, ignore_errors=True)
    assert "Traceback" not in err
    if code == 2:
        assert out == ""
        lines = err.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("moerun inspect: ")
        return
    doc = json.loads(out)  # exit 0 or 1: one JSON document on stdout
    check = doc["check"]
    if code == 1:
        assert check["differ"] or not check["recorded"]
        return
    assert code == 0 and check["recorded"] and check["differ"] == []
    # exit 0 means every tensor holds the bytes it was written with (digests of the untouched file)
    header = _header_of(base, blob)
    assert set(header.tensors) == set(base.names)
    for name in base.names:
        t = header.tensors[name]
        assert blob[t.start : t.end] == base.tensor_bytes(name)


def _header_of(base: BaseModel, blob: bytes) -> Header:
    d = _model_dir_with(base, blob)
    try:
        return read_header(d / "model.safetensors")
    finally:
        shutil.rmtree(d, ignore_errors=True)


# ---------------------------------------------------------------------------- config.json


CONFIG_KEYS = ["vocab_size", "d_model", "n_layers", "n_heads", "n_kv_heads", "head_dim", "n_experts", "top_k", "d_expert",
               "max_seq_len", "rope_theta", "norm_eps", "tied_embeddings", "format", "name", "bos_token_id", "dtype",
               "d_shared", "norm_topk", "quant"]


@st.composite
def config_edits(draw, base: BaseModel) -> dict:
    raw = json.loads((base.dir / "config.json").read_text())
    for _ in range(draw(st.integers(1, 3))):
        key = draw(st.sampled_from(CONFIG_KEYS))
        if draw(st.integers(0, 5)) == 0:
            raw.pop(key, None)
        elif key == "max_seq_len":
            # the declared context sizes the KV cache and rotary tables with no cap given (see docs/guide/hardening.md):
            # keep it small here so a "valid" draw cannot take the machine's memory
            raw[key] = draw(st.one_of(st.integers(-2, 4096), st.none(), st.booleans(), st.floats(), st.text(max_size=8)))
        else:
            raw[key] = draw(st.one_of(INTS, JSON_VALUES, st.sampled_from([1, 2, 3, 8, 16, "moerun/1", "moerun/2", "F16"])))
    return raw


def _check_config_outcome(base: BaseModel, raw: dict) -> str:
    d = _model_dir_with(base, base.blob, config=raw)
    try:
        with _peak_allocation() as peak, np.errstate(all="ignore"):
            try:
                config = ModelConfig.load(d)
            except MoerunError:
                config = None
            logits = _logits_or_error(d) if config is not None else None
        if config is None:
            return "refused by the config reader"
        # What a config may make the loader allocate before the weight file contradicts it: the KV cache
        # and rotary tables for its context (at most 4096 here) and the names of the tensors it implies
        # (about 160 bytes each, measured; at most moerun.files.config.MAX_TENSORS of them).
        implied = config.n_layers * (7 + 3 * config.n_experts + (3 if config.d_shared else 0))
        assert peak[0] <= base.load_peak + 64 * 4096 * SHAPE["d_model"] + 256 * implied + LOAD_SLACK
        if logits is None:
            return "refused when loaded"
        base_config = ModelConfig.load(base.dir)
        same = {k: getattr(config, k) for k in CONFIG_KEYS[:-1] if hasattr(config, k) and k not in ("name", "format", "dtype")} == {
            k: getattr(base_config, k) for k in CONFIG_KEYS[:-1] if hasattr(base_config, k) and k not in ("name", "format", "dtype")
        }
        if same and config.extra.get("quant") is None:
            assert np.array_equal(_bits(logits), _bits(base.logits))
            return "loaded, same shape, same logits"
        return "loaded with another reading of the same file"
    finally:
        shutil.rmtree(d, ignore_errors=True)


@settings(max_examples=120, **FAST)
@given(data=st.data())
def test_mutated_config_loads_or_fails_with_one_clear_error(base, data):
    raw = data.draw(config_edits(base), label="config.json")
    event(_check_config_outcome(base, raw))


@pytest.mark.slow
@settings(max_examples=2000, **SLOW)
@given(data=st.data())
def test_mutated_config_loads_or_fails_with_one_clear_error_at_length(base, data):
    raw = data.draw(config_edits(base), label="config.json")
    event(_check_config_outcome(base, raw))


# ---------------------------------------------------------------------------- findings of the fuzzer, pinned


def test_header_integer_too_long_for_python_to_parse_is_bad_model_file(base):
    # Python 3.11 refuses to convert integers of more than 4300 digits (a ValueError, not a JSONDecodeError)
    head = json.dumps({"embed": {"dtype": "F32", "shape": [1], "data_offsets": [0, 4]}}).replace("[1]", "[1" + "0" * 5000 + "]")
    d = _model_dir_with(base, struct.pack("<Q", len(head)) + head.encode() + b"\0" * 4)
    with pytest.raises(BadModelFile, match="not valid JSON"):
        read_header(d / "model.safetensors")


def test_digest_metadata_nested_past_the_recursion_limit_is_bad_model_file(base):
    doc = copy.deepcopy(base.doc)
    doc["__metadata__"][DIGEST_KEY] = "[" * 100_000 + "]" * 100_000
    body = json.dumps(doc).encode()
    d = _model_dir_with(base, struct.pack("<Q", len(body)) + body + base.blob[base.data_start :])
    code, out, err = _run_cli("inspect", "--model", str(d), "--check")
    assert code == 2 and out == ""
    assert err.strip().count("\n") == 0 and "malformed" in err


@pytest.mark.parametrize(("key", "value"), [("rope_theta", 10**400), ("norm_eps", 10**400), ("rope_theta", "1e4")])
def test_config_number_that_is_not_a_usable_float_is_bad_model_file(base, key, value):
    raw = json.loads((base.dir / "config.json").read_text())
    raw[key] = value
    with pytest.raises(BadModelFile, match=key):
        ModelConfig.from_dict(raw)


def test_config_integer_too_long_for_python_to_parse_is_bad_model_file(base):
    d = _model_dir_with(base, base.blob)
    text = (d / "config.json").read_text()
    (d / "config.json").write_text(text.replace('"d_model": 16', '"d_model": 1' + "0" * 5000))
    with pytest.raises(BadModelFile, match="not valid JSON"):
        ModelConfig.load(d)


@pytest.mark.parametrize(("key", "value"), [("n_layers", 10**9), ("n_experts", 10**8)])
def test_config_implying_more_tensors_than_any_model_is_refused_before_enumerating_them(base, key, value):
    raw = json.loads((base.dir / "config.json").read_text())
    raw[key] = value
    d = _model_dir_with(base, base.blob, config=raw)
    with _peak_allocation() as peak, pytest.raises(BadModelFile, match="plausible"):
        moerun.load(d, tokenizer=False)
    assert peak[0] < 4 << 20  # a billion expected tensor names would take hundreds of GB


# ---------------------------------------------------------------------------- traces


@dataclass(repr=False)
class BaseTrace:
    path: Path
    blob: bytes
    arrays: dict[str, np.ndarray]
    work: Path

    def __repr__(self) -> str:
        return f"BaseTrace({self.path})"

    def _repr_pretty_(self, p, cycle) -> None:
        p.text(repr(self))


@pytest.fixture(scope="module")
def base_trace(tmp_path_factory, base) -> BaseTrace:
    """A trace written by the live engine (routing, weights, guesses, per-access events, meta)."""
    root = tmp_path_factory.mktemp("fuzz-trace")
    with moerun.load(base.dir, tokenizer=False, slots=[2, 2], prefetch=1) as eng:
        eng.start_trace()
        eng.generate(prompt_ids=PROMPT, max_new=6)
        trace = eng.finish_trace()
    path = root / "live.npz"
    write_trace(path, trace)
    with np.load(path, allow_pickle=False) as z:
        arrays = {k: z[k] for k in z.files}
    work = root / "work"
    work.mkdir()
    return BaseTrace(path, path.read_bytes(), arrays, work)


TRACE_NAMES = ["experts", "weights", "guesses", "probs", "meta", "kind", "pagein_ns", "stall_ns", "compute_ns", "other"]
ANY_DTYPE = st.one_of(
    hnp.integer_dtypes(),
    hnp.unsigned_integer_dtypes(),
    hnp.floating_dtypes(),
    hnp.boolean_dtypes(),
    hnp.complex_number_dtypes(),
    hnp.unicode_string_dtypes(max_len=4),
    hnp.byte_string_dtypes(max_len=4),
)
ANY_ARRAY = hnp.arrays(ANY_DTYPE, hnp.array_shapes(min_dims=0, max_dims=5, min_side=0, max_side=5))
ID_DTYPES = st.sampled_from([np.int8, np.int16, np.int32, np.int64, np.uint8, np.uint16, np.uint64])


@st.composite
def id_arrays(draw, like: np.ndarray) -> np.ndarray:
    """An integer array shaped like ``like`` (or nearly), with ids around the valid range: gets past the first checks."""
    shape = list(like.shape)
    if draw(st.integers(0, 3)) == 0 and shape:
        i = draw(st.integers(0, len(shape) - 1))
        shape[i] = draw(st.integers(0, 4))
    dtype = draw(ID_DTYPES)
    lo = 0 if np.dtype(dtype).kind == "u" else -3
    return draw(hnp.arrays(dtype, tuple(shape), elements=st.integers(lo, 6)))


META_KEYS = ["n_experts", "prefill_tokens", "expert_bytes", "top_k", "partial", "source", "lookahead"]


@st.composite
def trace_array_edits(draw, base: BaseTrace) -> dict[str, np.ndarray]:
    arrays = dict(base.arrays)
    for _ in range(draw(st.integers(1, 3))):
        name = draw(st.sampled_from(TRACE_NAMES))
        kind = draw(st.sampled_from(["any array", "ids", "drop", "one value", "meta", "dtype"]))
        if kind == "any array":
            arrays[name] = draw(ANY_ARRAY)
        elif kind == "ids" and name in arrays and name != "meta":
            arrays[name] = draw(id_arrays(arrays[name]))
        elif kind == "drop":
            arrays.pop(name, None)
        elif kind == "one value" and name in arrays and arrays[name].size and arrays[name].dtype.kind in "iuf":
            a = arrays[name].copy()
            idx = draw(st.integers(0, a.size - 1))
            info = np.iinfo(a.dtype) if a.dtype.kind in "iu" else np.finfo(a.dtype)
            value = draw(st.one_of(st.integers(-3, 9), st.sampled_from([int(info.min), int(info.max)] if a.dtype.kind in "iu" else [np.nan, np.inf, -np.inf])))
            if a.dtype.kind in "iu":  # numpy 2 refuses an out-of-range Python int (a small negative into uint8)
                value = min(max(value, int(info.min)), int(info.max))
            a.reshape(-1)[idx] = value
            arrays[name] = a
        elif kind == "meta":
            meta = json.loads(str(base.arrays["meta"]))
            for _ in range(draw(st.integers(1, 3))):
                meta[draw(st.sampled_from(META_KEYS))] = draw(st.one_of(INTS, JSON_VALUES))
            choice = draw(st.sampled_from(["json", "json", "not an object", "bytes", "1-d", "number"]))
            if choice == "json":
                arrays["meta"] = np.array(json.dumps(meta))
            elif choice == "not an object":
                arrays["meta"] = np.array(json.dumps(draw(JSON_VALUES)))
            elif choice == "bytes":
                arrays["meta"] = np.array(json.dumps(meta).encode())
            elif choice == "1-d":
                arrays["meta"] = np.array([json.dumps(meta)])
            else:
                arrays["meta"] = np.array(draw(st.integers(-5, 5)))
        elif kind == "dtype" and name in arrays and arrays[name].dtype.kind in "iufb":
            arrays[name] = arrays[name].astype(draw(st.sampled_from([np.int8, np.uint8, np.int64, np.float32, np.float16, np.bool_])))
    return arrays


def _save_npz(arrays: dict[str, np.ndarray], compressed: bool) -> bytes:
    buf = io.BytesIO()
    (np.savez_compressed if compressed else np.savez)(buf, **arrays)
    return buf.getvalue()


@st.composite
def trace_mutations(draw, base: BaseTrace) -> bytes:
    if draw(st.booleans()):
        return _save_npz(draw(trace_array_edits(base)), compressed=draw(st.booleans()))
    blob = bytearray(base.blob if draw(st.booleans()) else _save_npz(base.arrays, compressed=False))
    kind = draw(st.sampled_from(["flip", "truncate", "splice", "append"]))
    if kind == "flip":
        for _ in range(draw(st.integers(1, 8))):
            blob[draw(st.integers(0, len(blob) - 1))] ^= 1 << draw(st.integers(0, 7))
    elif kind == "truncate":
        blob = blob[: draw(st.integers(0, len(blob) - 1))]
    elif kind == "splice":
        pos = draw(st.integers(0, len(blob) - 1))
        blob[pos : pos + draw(st.integers(0, 32))] = draw(st.binary(max_size=32))
    else:
        blob += draw(st.binary(min_size=1, max_size=64))
    return bytes(blob)


def _justified_bytes(blob: bytes) -> int:
    """What the archive may honestly expand to: each member's declared size, capped by deflate's ratio."""
    try:
        with zipfile.ZipFile(io.BytesIO(blob)) as z:
            total = 0
            for info in z.infolist():
                cap = info.compress_size * (DEFLATE_MAX_RATIO if info.compress_type == zipfile.ZIP_DEFLATED else 1) + 1024
                total += min(info.file_size, cap)
            return max(total, len(blob))
    except (zipfile.BadZipFile, OSError, ValueError, EOFError, NotImplementedError):
        return len(blob)


def _assert_is_a_valid_trace(t: Trace) -> None:
    """What read_trace promises to its callers (docs/design/file-formats.md)."""
    assert isinstance(t.meta, dict)
    e = t.experts
    assert e.dtype == np.int64 and e.ndim == 3 and e.shape[1] > 0 and e.shape[2] > 0
    n = t.meta.get("n_experts")
    if n is not None:
        assert isinstance(n, int) and not isinstance(n, bool) and n > 0
        assert (e < n).all()
    assert (e >= -1).all()
    ids = np.where(e < 0, np.iinfo(np.int64).max, e)
    rows = np.sort(ids, axis=-1)
    assert not ((rows[..., 1:] == rows[..., :-1]) & (rows[..., 1:] != np.iinfo(np.int64).max)).any()
    p = t.meta.get("prefill_tokens")
    if p is not None:
        assert isinstance(p, int) and 0 <= p <= t.n_tokens
    if t.weights is not None:
        assert t.weights.dtype == np.float32 and t.weights.shape == e.shape
    if t.guesses is not None:
        assert t.guesses.dtype == np.int64 and t.guesses.ndim == 4 and t.guesses.shape[:2] == e.shape[:2]
        assert (t.guesses >= -1).all() and (n is None or (t.guesses < n).all())
    probs = getattr(t, "probs", None)  # router probabilities, optional (newer traces)
    if probs is not None:
        assert probs.dtype == np.float32 and probs.ndim == 3 and probs.shape[:2] == e.shape[:2]
        assert probs.shape[2] > (e.max() if e.size else -1)
    for name, a in t.events.items():
        assert a.shape == (e.shape[:2] if name == "compute_ns" else e.shape)
    assert t.n_experts >= 0


def _check_trace_outcome(base: BaseTrace, blob: bytes) -> str:
    path = Path(tempfile.mkdtemp(dir=base.work)) / "t.npz"
    try:
        path.write_bytes(blob)
        with _peak_allocation() as peak:
            try:
                t = read_trace(path)
            except BadTrace:
                t = None
        bound = TRACE_BYTES_PER_JUSTIFIED_BYTE * _justified_bytes(blob) + TRACE_SLACK
        assert peak[0] <= bound, f"reading a {len(blob)}-byte trace allocated {peak[0]} bytes"
        if t is None:
            return "refused"
        _assert_is_a_valid_trace(t)
        return "accepted"
    finally:
        shutil.rmtree(path.parent, ignore_errors=True)


@settings(max_examples=300, **FAST)
@given(data=st.data())
def test_mutated_trace_reads_as_a_valid_trace_or_bad_trace(base_trace, data):
    blob = data.draw(trace_mutations(base_trace), label="trace archive")
    event(_check_trace_outcome(base_trace, blob))


@pytest.mark.slow
@settings(max_examples=5000, **SLOW)
@given(data=st.data())
def test_mutated_trace_reads_as_a_valid_trace_or_bad_trace_at_length(base_trace, data):
    blob = data.draw(trace_mutations(base_trace), label="trace archive")
    event(_check_trace_outcome(base_trace, blob))


def test_untouched_live_trace_is_accepted(base_trace):
    assert _check_trace_outcome(base_trace, base_trace.blob) == "accepted"


# Known gaps in moerun/files/trace.py found by this fuzzing, pinned as strict expected failures so they stay visible.


def _npz_with_member(name: str, npy: bytes) -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:  # stored, as numpy.savez writes
        z.writestr(name + ".npy", npy)
    return buf.getvalue()


def _npy_claiming(shape: tuple[int, ...], data: np.ndarray) -> bytes:
    """A .npy member whose header claims ``shape`` but which holds only ``data``'s bytes."""
    out = io.BytesIO()
    np.lib.format.write_array_header_1_0(out, {"descr": np.lib.format.dtype_to_descr(data.dtype), "fortran_order": False, "shape": shape})
    return out.getvalue() + data.tobytes()


def test_array_header_claiming_more_than_the_archive_holds_is_refused_without_allocating_it(tmp_path):
    path = tmp_path / "t.npz"
    path.write_bytes(_npz_with_member("experts", _npy_claiming((2**26, 4, 2), np.zeros((3, 4, 2), np.int16))))
    with _peak_allocation() as peak, pytest.raises(BadTrace):
        read_trace(path)
    assert peak[0] < 64 << 20


def test_array_header_with_an_impossible_element_count_is_bad_trace(tmp_path):
    path = tmp_path / "t.npz"
    path.write_bytes(_npz_with_member("experts", _npy_claiming((2**40, 4, 2), np.zeros((3, 4, 2), np.int16))))
    with pytest.raises(BadTrace):
        read_trace(path)


def test_meta_nested_past_the_recursion_limit_is_bad_trace(tmp_path):
    path = tmp_path / "t.npz"
    np.savez(path, experts=np.zeros((2, 1, 1), np.int16), meta=np.array("[" * 100_000 + "]" * 100_000))
    with pytest.raises(BadTrace):
        read_trace(path)


def test_implausible_declared_expert_count_is_one_clear_error_in_replay(tmp_path):
    path = tmp_path / "t.npz"
    np.savez(path, experts=np.zeros((3, 1, 1), np.int16), meta=np.array(json.dumps({"n_experts": 10**30})))
    code, out, err = _run_cli("replay", "--routing", str(path), "--json")
    assert code == 2 and err.strip().count("\n") == 0 and "Traceback" not in err
