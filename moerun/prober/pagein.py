"""Page-in measurements: how fast this machine moves an expert-sized block into a pool slot.

``run_probe`` times ``moerun.files.store.pread_into`` (``os.preadv`` into a
preallocated 4 KiB-aligned buffer, exactly the engine's page-in read) on

* the experts of a model file, at their real offsets (the block size the
  engine will really ask for), and/or
* temporary files of chosen sizes, written with random bytes, fsynced, and
  removed afterwards whatever happens.

Each block is timed in two regimes.  *Warm*: the file is in the OS page cache
(read once first).  *Cold*: before every read the file's pages are dropped
with ``posix_fadvise(POSIX_FADV_DONTNEED)``.  Before every timed read
``mincore(2)`` (called through ctypes on a fresh read-only map of the range)
counts the range's resident pages; a run counts for a regime only if the
residency matches it (warm: every page resident, cold: none).  Where the drop
or the check is impossible the result says so (``verified: false`` with a
reason) rather than passing a warm figure off as cold.

The memory-copy bandwidth of the machine (``np.copyto`` of 64 MiB, best of a
few) is measured in the same run as the ceiling every figure is compared to.
``load_probe`` reads a saved result back (for ``moerun plan``), validating it.
Library code: raises ``moerun.errors`` exceptions, never prints.
"""

from __future__ import annotations

import contextlib
import datetime
import os
import platform
import re
import shutil
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from moerun._version import __version__
from moerun.errors import BadInput, BadModelFile, BadOption, OutputError, PageInError
from moerun.files.checkpoint import Checkpoint, read_expert
from moerun.files.ckpt_config import is_open_checkpoint
from moerun.files.config import RANDOM_NOTE, ModelConfig
from moerun.files.fileio import SignalsHeld
from moerun.files.modelfile import expert_span, read_header
from moerun.files.pagecache import PAGE, drop_pages, drop_problem, residency_problem, resident_pages
from moerun.files.store import pread_into
from moerun.prober.saved import REGIMES, SCHEMA, STAT_KEYS, load_probe, save_probe  # noqa: F401 - their old home (commands/plan.py, scripts/bench_plan.py)
from moerun.units import parse_size

SLOT_ALIGN = 4096
MEMCPY_BYTES = 64 * 1024 * 1024
MEMCPY_REPEATS = 8
DEFAULT_RUNS = 30
# A temporary file holds several blocks so successive reads hit distinct offsets;
# it is kept near this size (at least 2 and at most 8 blocks).
SCRATCH_TARGET = 256 * 1024 * 1024
MIN_SLOTS, MAX_SLOTS = 2, 8
DROP_METHOD = "posix_fadvise(POSIX_FADV_DONTNEED) on the whole file before each read"
CHECK_METHOD = "mincore(2) on a read-only map of the block's pages before each read"

_EXPERT_NAME = re.compile(r"^layers\.(\d+)\.experts\.(\d+)\.")
Report = Callable[[int, int, str], None]  # progress callback: (done, total, what)


# ---------------------------------------------------------------------- buffers and statistics


def aligned_buffer(nbytes: int) -> np.ndarray:
    """A zero-filled (so already faulted in) uint8 buffer starting on a 4 KiB boundary, like a pool slot."""
    size = max(1, -(-nbytes // SLOT_ALIGN) * SLOT_ALIGN)
    raw = np.empty(size + SLOT_ALIGN, np.uint8)
    off = (-raw.ctypes.data) % SLOT_ALIGN
    buf = raw[off : off + size]
    buf.fill(0)
    return buf


def latency_stats(ns: list[int], nbytes: int, ceiling_gb_s: float | None) -> dict:
    """p50/p95/p99/max/mean in seconds (linear interpolation between order statistics), GB/s at p50, share of
    the ceiling."""
    if not ns:
        return {k: None for k in STAT_KEYS}
    s = np.asarray(ns, dtype=np.float64) / 1e9
    p50, p95, p99 = (float(np.percentile(s, q)) for q in (50, 95, 99))
    gb_s = nbytes / p50 / 1e9 if p50 > 0 else None
    share = gb_s / ceiling_gb_s if gb_s and ceiling_gb_s else None
    return {
        "p50_s": _r(p50),
        "p95_s": _r(p95),
        "p99_s": _r(p99),
        "max_s": _r(float(s.max())),
        "mean_s": _r(float(s.mean())),
        "gb_s": _r(gb_s),
        "of_ceiling": _r(share),
    }


def _r(x: float | None) -> float | None:
    """Six significant digits: far below the noise of any figure here."""
    return None if x is None else float(f"{x:.6g}")


def memcpy_ceiling(nbytes: int = MEMCPY_BYTES, repeats: int = MEMCPY_REPEATS) -> dict:
    """Plain memory-copy bandwidth: ``np.copyto`` between two touched buffers, best of ``repeats``."""
    src = np.ones(nbytes, np.uint8)
    dst = np.zeros(nbytes, np.uint8)
    best = None
    for _ in range(max(1, repeats)):
        t0 = time.monotonic_ns()
        np.copyto(dst, src)
        dt = time.monotonic_ns() - t0
        best = dt if best is None else min(best, dt)
    best = max(best or 1, 1)
    return {"method": "np.copyto", "bytes": nbytes, "repeats": repeats, "best_s": _r(best / 1e9), "gb_s": _r(nbytes / (best / 1e9) / 1e9)}


# ---------------------------------------------------------------------- blocks


@dataclass
class Block:
    """What to read: ``nbytes`` at each of ``offsets`` in ``path`` (read in turn, run after run).

    An open checkpoint's experts (``spans``: one ``ExpertSpans`` per sample) lie in pieces in the files ``paths``;
    each is read as the engine reads it (``moerun.files.checkpoint.read_expert``), and ``offsets`` number the
    samples."""

    label: str
    source: str  # "model" or "tempfile"
    path: Path
    nbytes: int
    offsets: list[int]
    info: dict = field(default_factory=dict)
    spans: list | None = None
    paths: tuple = ()

    def ranges(self, sample: int) -> list[tuple[int, int, int]]:
        """(file, offset, bytes) that one sample's read touches."""
        if self.spans is None:
            return [(0, sample, self.nbytes)]
        return [(r.file, r.offset, r.nbytes) for r in self.spans[sample].reads]

    def read(self, fds: list[int], sample: int, dst: np.ndarray) -> None:
        """The engine's page-in of one sample into ``dst``."""
        if self.spans is None:
            pread_into(fds[0], sample, dst[: self.nbytes])
        else:
            try:
                read_expert(fds, self.spans[sample], dst, self.paths)
            except PageInError:
                raise EOFError from None

    @property
    def buffer_bytes(self) -> int:
        return self.nbytes if self.spans is None else max(self.nbytes, self.spans[0].slot_nbytes)


def model_block(model_dir: str | os.PathLike, max_offsets: int) -> Block:
    """The experts of a model file: their real size and offsets (spread over the file).

    Reads only config.json and the validated header, so a multi-GB model is not loaded.
    """
    model_dir = Path(model_dir)
    if not model_dir.is_dir():
        raise BadModelFile(f"{model_dir}: no such model directory")
    if is_open_checkpoint(model_dir):
        return checkpoint_block(model_dir, max_offsets)
    config = ModelConfig.load(model_dir)
    header = read_header(model_dir / "model.safetensors")
    by_expert: dict[tuple[int, int], list] = {}
    for name, t in header.tensors.items():
        m = _EXPERT_NAME.match(name)
        if m:
            by_expert.setdefault((int(m.group(1)), int(m.group(2))), []).append(t)
    spans: list[tuple[int, int]] = []
    for layer in range(config.n_layers):
        for e in range(config.n_experts):
            parts = by_expert.get((layer, e))
            if not parts:
                raise BadModelFile(f"{header.path}: expert {e} of layer {layer} has no tensors")
            spans.append(expert_span(header.path, layer, e, parts))
    sizes = {n for _, n in spans}
    if len(sizes) != 1:
        raise BadModelFile(f"{header.path}: experts differ in size ({sorted(sizes)[:4]} bytes)")
    pick = np.unique(np.linspace(0, len(spans) - 1, min(len(spans), max(1, max_offsets))).round().astype(int))
    nbytes = sizes.pop()
    name = config.name or model_dir.name
    info = {
        "dir": str(model_dir),
        "name": name,
        "expert_bytes": nbytes,
        "experts": len(spans),
        "dtype": "+".join(sorted({t.dtype for t in by_expert[(0, 0)]})),
        "synthetic": bool(config.extra.get("synthetic")),
    }
    if info["synthetic"]:
        info["note"] = RANDOM_NOTE
    return Block(f"expert of {name}", "model", header.path, nbytes, [spans[i][0] for i in pick], info)


def checkpoint_block(model_dir: Path, max_offsets: int) -> Block:
    """The routed experts of an open checkpoint: each read as the engine reads it, its pieces in the shards
    (``read_expert``), samples spread over the layers.  Reads the headers only."""
    with Checkpoint.open(model_dir, require_tokenizer=False) as ck:
        spans = [sp for row in ck.span_map if row is not None for sp in row]
        files = ck.files
        info = {
            "dir": str(model_dir),
            "name": model_dir.name,
            "expert_bytes": spans[0].nbytes if spans else 0,
            "experts": len(spans),
            "dtype": ck.expert_dtype,
            "model_type": ck.config.model_type,
            "files": len(files),
            "reads_per_expert": max((len(sp.reads) for sp in spans), default=0),
            "synthetic": ck.random_weights,
        }
    if not spans:
        raise BadModelFile(f"{model_dir}: no layer routes to experts; nothing to probe")
    pick = np.unique(np.linspace(0, len(spans) - 1, min(len(spans), max(1, max_offsets))).round().astype(int)).tolist()
    if info["synthetic"]:
        info["note"] = RANDOM_NOTE
    chosen = [spans[i] for i in pick]
    return Block(f"expert of {model_dir.name}", "model", files[chosen[0].reads[0].file], info["expert_bytes"],
                 list(range(len(chosen))), info, spans=chosen, paths=tuple(files))


def scratch_slots(nbytes: int) -> int:
    return int(min(MAX_SLOTS, max(MIN_SLOTS, SCRATCH_TARGET // max(1, nbytes))))


def write_scratch_file(path: Path, nbytes: int, slots: int, seed: int = 0, report: Report | None = None) -> None:
    """Fill ``path`` with ``slots`` blocks of random bytes (incompressible, never sparse) and fsync it.

    fsync matters: dirty pages cannot be dropped, so without it a "cold" read
    would be served from memory.
    """
    rng = np.random.default_rng(seed)
    total = nbytes * slots
    chunk = 8 * 1024 * 1024
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    try:
        done = 0
        while done < total:
            n = min(chunk, total - done)
            data = rng.bytes(n)
            view = memoryview(data)
            while view:
                w = os.write(fd, view)
                view = view[w:]
            done += n
            if report:
                report(done, total, "writing the temporary file")
        os.fsync(fd)
    finally:
        os.close(fd)


def size_label(nbytes: int) -> str:
    for unit, f in (("GiB", 1024**3), ("MiB", 1024**2), ("KiB", 1024)):
        if nbytes >= f and nbytes % f == 0:
            return f"{nbytes // f} {unit}"
    for unit, f in (("GiB", 1024**3), ("MiB", 1024**2), ("KiB", 1024)):
        if nbytes >= f:
            return f"{nbytes / f:.1f} {unit}"
    return f"{nbytes} B"


# ---------------------------------------------------------------------- timing


def _expect(regime: str, resident: int, total: int) -> bool:
    return resident == total if regime == "warm" else resident == 0


def _settle(fds: list[int], block: Block, sample: int, regime: str, dst: np.ndarray) -> tuple[int, int]:
    """Bring one sample's pages into the regime's state and return its (resident, total) pages just before the read.

    Cold: drop the files' pages; pages still under read-ahead I/O from the
    previous read are locked and survive a drop, so wait briefly and drop again
    (a few times) before giving up.  Warm: if memory pressure evicted part of
    the block, read it once more (untimed).
    """
    resident, total = 0, 0
    ranges = block.ranges(sample)
    for wait in (0.0, 0.002, 0.02, 0.1):
        if wait:
            time.sleep(wait)
        if regime == "cold":
            for file in {f for f, _, _ in ranges}:
                drop_pages(fds[file])
        resident = total = 0
        for file, off, nbytes in ranges:
            r, t = resident_pages(fds[file], off, nbytes)
            resident, total = resident + r, total + t
        if _expect(regime, resident, total):
            break
        if regime == "warm":
            block.read(fds, sample, dst)
    return resident, total


def time_regime(fds: list[int], block: Block, regime: str, runs: int, buf: np.ndarray, ceiling_gb_s: float | None,
                check_problem: str | None, drop_problem_: str | None, tick: Callable[[], None] | None = None) -> dict:
    """Time ``runs`` reads of ``block`` in one regime; return its labelled result (see docs/guide/probe.md)."""
    out: dict = {"regime": regime, "verified": False, "reason": None, "runs": 0, "discarded": 0}
    out["method"] = "read once first, then timed" if regime == "warm" else DROP_METHOD
    out["check"] = None if check_problem else CHECK_METHOD
    if regime == "cold" and drop_problem_:
        out["reason"] = f"not measured: {drop_problem_}"
        out.update(latency_stats([], block.nbytes, ceiling_gb_s))
        return out
    dst = buf[: block.buffer_bytes]
    # Offsets in descending order: read-ahead runs forward from a read, so the
    # next read never starts in a range the previous one may have pulled in.
    block = Block(block.label, block.source, block.path, block.nbytes, sorted(block.offsets, reverse=True), block.info,
                  block.spans, block.paths)
    if regime == "warm":
        # Untimed: bring every block into the page cache, then a few more reads so
        # the first timed ones do not carry one-off start-up costs.
        for off in block.offsets + block.offsets[: min(5, runs)]:
            block.read(fds, off, dst)
    times: list[int] = []
    leftovers: list[int] = []  # resident pages found before a cold read (or missing before a warm one)
    attempts = 0
    max_attempts = 2 * runs if check_problem is None else runs
    while len(times) < runs and attempts < max_attempts:
        off = block.offsets[attempts % len(block.offsets)]
        attempts += 1
        if check_problem is None:
            resident, total = _settle(fds, block, off, regime, dst)
            ok = _expect(regime, resident, total)
        else:
            if regime == "cold":
                for fd in fds:
                    drop_pages(fd)
            resident, total, ok = 0, 0, True
        t0 = time.monotonic_ns()
        block.read(fds, off, dst)
        dt = time.monotonic_ns() - t0
        if ok:
            times.append(dt)
        else:
            leftovers.append(resident if regime == "cold" else total - resident)
        if tick:
            tick()
        if not times and len(leftovers) >= 3:  # the regime cannot be reached here (tmpfs, say); stop trying
            break
    out["runs"] = len(times)
    out["discarded"] = len(leftovers)
    out.update(latency_stats(times, block.nbytes, ceiling_gb_s))
    if check_problem:
        out["reason"] = f"unverified: {check_problem}"
    elif not times:
        if regime == "cold":
            out["reason"] = (
                f"not measured: pages stayed resident after the drop in all {len(leftovers)} attempts "
                "(a file system that keeps data in memory, such as tmpfs, cannot drop them; or the file is "
                "mapped by another process) - try --dir on a disk"
            )
        else:
            out["reason"] = f"not measured: the block never stayed fully resident ({len(leftovers)} attempts; memory pressure?)"
    else:
        out["verified"] = True
        if leftovers:
            what = "still resident after the drop" if regime == "cold" else "not resident"
            out["reason"] = f"{len(leftovers)} run(s) discarded: pages {what} before the read"
    return out


# ---------------------------------------------------------------------- the whole probe


def storage_info(path: str | os.PathLike) -> dict:
    """File system type and block-device read-ahead under ``path`` (best effort; unknowns are null)."""
    import psutil

    fs_type = None
    with contextlib.suppress(Exception):
        real = os.path.realpath(path)
        best = ""
        for part in psutil.disk_partitions(all=True):
            mp = part.mountpoint
            if (real == mp or real.startswith(mp.rstrip("/") + "/")) and len(mp) > len(best):
                best, fs_type = mp, part.fstype
    read_ahead = None
    with contextlib.suppress(OSError, ValueError):
        st = os.stat(path)
        base = Path(f"/sys/dev/block/{os.major(st.st_dev)}:{os.minor(st.st_dev)}")
        for q in (base / "queue" / "read_ahead_kb", base / ".." / "queue" / "read_ahead_kb"):
            if q.exists():
                read_ahead = int(q.read_text().strip()) * 1024
                break
    return {"fs_type": fs_type, "read_ahead_bytes": read_ahead}


def machine_info() -> dict:
    """Facts about this machine (best effort; unknowns are null)."""
    import psutil

    cpu = None
    with contextlib.suppress(OSError):
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    return {
        "host": platform.node(),
        "system": platform.platform(),
        "cpu": cpu,
        "cpus": os.cpu_count(),
        "memory_bytes": int(psutil.virtual_memory().total),
        "page_bytes": PAGE,
        "python": platform.python_version(),
        "numpy": np.__version__,
        "moerun": __version__,
    }


def _check_dir(d: Path) -> None:
    if not d.exists():
        raise BadOption(f"--dir {d}: no such directory")
    if not d.is_dir():
        raise BadOption(f"--dir {d}: not a directory")


def _new_scratch(base: Path, nbytes: int, created: list[Path]) -> Path:
    """A scratch file in ``base``, listed in ``created`` (which the caller removes) before any interruption."""
    held = SignalsHeld()
    try:
        fd, name = tempfile.mkstemp(prefix=".moerun-probe-", suffix=".bin", dir=base)
        os.close(fd)
        created.append(Path(name))
    except OSError as e:
        raise OutputError(f"cannot write a scratch file in {base} ({e.strerror or e}); "
                          "probe needs a writable directory (--dir DIR)") from None
    finally:
        held.release()
    return created[-1]


def _fit_slots(base: Path, nbytes: int) -> int:
    """How many blocks the temporary file holds: scratch_slots, fewer if the disk is short, never none."""
    margin = 16 << 20
    free = shutil.disk_usage(base).free
    slots = scratch_slots(nbytes)
    while slots > 1 and nbytes * slots + margin > free:
        slots -= 1
    if nbytes * slots + margin > free:
        raise OutputError(f"{base}: not enough free disk space for a {size_label(nbytes)} temporary file ({size_label(free)} free)")
    return slots


def _measure(block: Block, runs: int, ceiling_gb_s: float, tick: Callable[[str], Callable[[], None]]) -> dict:
    check = residency_problem(block.path)
    buf = aligned_buffer(block.buffer_bytes)
    fds: list[int] = []
    try:
        for path in block.paths or (block.path,):
            fds.append(os.open(path, os.O_RDONLY))
        regimes = {
            r: time_regime(fds, block, r, runs, buf, ceiling_gb_s, check, drop_problem(), tick(f"{block.label}, {r}"))
            for r in REGIMES
        }
    except EOFError:
        raise BadInput(f"{block.path}: file ended early (changed while probing?)") from None
    finally:
        for fd in fds:
            os.close(fd)
    entry = {
        "label": block.label,
        "source": block.source,
        "bytes": block.nbytes,
        "distinct_offsets": len(block.offsets),
        "storage": storage_info(block.path),
    }
    if block.source == "model":
        entry["model"] = block.info
    else:
        entry["file_bytes"] = block.nbytes * len(block.offsets)
    entry.update(regimes)
    return entry


def _check_request(model_dir, sizes, runs: int) -> None:
    """Refuse a probe that would measure nothing or nonsense, before anything is written."""
    if runs < 1:
        raise BadOption(f"--runs must be at least 1, got {runs}")
    if model_dir is None and not sizes:
        raise BadOption("nothing to measure: give --model DIR or --sizes LIST")
    for s in sizes:
        if s < 1:
            raise BadOption(f"--sizes: every size must be at least 1 byte, got {s}")


def _check_memory(largest: int) -> None:
    """The largest block's buffer and the copy ceiling's two buffers fit in the memory available now.

    A block read into swapped-out memory would time the swap, not the page-in.
    """
    import psutil

    avail = psutil.virtual_memory().available
    if largest + MEMCPY_BYTES * 2 > avail * 0.8:
        raise BadOption(f"a {size_label(largest)} block needs a buffer that does not fit in available memory ({size_label(avail)})")


def _progress_ticks(total_steps: int, report: Report | None):
    """(tick, done): ``tick(what)`` makes the step callback of one timed series; ``done()`` counts steps so far."""
    done = 0

    def tick(what: str) -> Callable[[], None]:
        def step() -> None:
            nonlocal done
            done += 1
            if report:
                report(done, total_steps, what)

        return step

    return tick, lambda: done


def _measure_blocks(blocks: list[Block], base: Path, runs: int, seed: int, report: Report | None) -> tuple[dict, list[dict]]:
    """The copy ceiling, then each block timed in both regimes; every temporary file removed whatever happens.

    A temporary file is written just before its block is timed and removed right after, so the disk holds one
    at a time.
    """
    total_steps = len(blocks) * 2 * runs
    tick, done = _progress_ticks(total_steps, report)
    created: list[Path] = []
    results = []
    try:
        ceiling = memcpy_ceiling()
        for block in blocks:
            if block.source == "tempfile":
                path = _new_scratch(base, block.nbytes, created)
                slots = _fit_slots(base, block.nbytes)
                block.path, block.offsets = path, [k * block.nbytes for k in range(slots)]
                progress = None
                if report:
                    def progress(d, t, w, label=block.label):
                        report(done(), total_steps, f"{label}: writing the temporary file {100 * d // t}%")
                write_scratch_file(path, block.nbytes, slots, seed + block.info["index"], progress)
            results.append(_measure(block, runs, ceiling["gb_s"], tick))
            if block.source == "tempfile":  # give the disk space back before the next size
                with contextlib.suppress(OSError):
                    block.path.unlink()
    finally:
        for p in created:
            with contextlib.suppress(FileNotFoundError):
                p.unlink()
    return ceiling, results


def run_probe(
    model_dir: str | os.PathLike | None = None,
    sizes: list[int] | tuple[int, ...] = (),
    runs: int = DEFAULT_RUNS,
    work_dir: str | os.PathLike | None = None,
    report: Report | None = None,
    seed: int = 0,
) -> dict:
    """Measure page-in for the model's experts (if ``model_dir``) and for each of ``sizes``; return the document.

    Temporary files go into ``work_dir`` (default: a new temporary directory)
    and are removed before returning, also on an exception or Ctrl-C.
    """
    _check_request(model_dir, sizes, runs)
    blocks: list[Block] = []
    if model_dir is not None:
        blocks.append(model_block(model_dir, runs))
    _check_memory(max([b.nbytes for b in blocks] + list(sizes)))
    own_dir = work_dir is None
    if not own_dir:
        _check_dir(Path(work_dir))
    for i, nbytes in enumerate(sizes):
        blocks.append(Block(size_label(nbytes), "tempfile", Path(), nbytes, [], {"index": i}))
    held = SignalsHeld()
    try:
        base = Path(tempfile.mkdtemp(prefix="moerun-probe-")) if own_dir else Path(work_dir)
    except OSError as e:
        held.release()
        raise OutputError(f"cannot make a scratch directory in {tempfile.gettempdir()} ({e.strerror or e}); "
                          "give a writable one with --dir DIR") from None
    try:
        held.release()  # an interruption since mkdtemp is raised here, where the directory is removed
        ceiling, results = _measure_blocks(blocks, base, runs, seed, report)
    finally:
        if own_dir:
            shutil.rmtree(base, ignore_errors=True)
    doc = {
        "schema": SCHEMA,
        "created": datetime.datetime.now(datetime.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "machine": machine_info(),
        "read": "moerun.files.store.pread_into: os.preadv into a preallocated 4 KiB-aligned buffer (the engine's page-in); "
                "an open checkpoint's expert: moerun.files.checkpoint.read_expert, one os.preadv per run of its pieces in a shard",
        "cold_method": DROP_METHOD,
        "cold_scope": "out of this machine's page cache; a hypervisor or disk below it may still cache the data",
        "check_method": CHECK_METHOD,
        "runs": runs,
        "ceiling": ceiling,
        "blocks": results,
    }
    if any(b.get("model", {}).get("synthetic") for b in results):
        doc["note"] = RANDOM_NOTE
    return doc


def parse_sizes(text: str) -> list[int]:
    """``1MiB,16MiB,256MiB`` -> bytes (each through moerun.units.parse_size)."""
    items = [s for s in re.split(r"[,\s]+", text or "") if s]
    if not items:
        raise BadOption("--sizes is empty: give sizes like 1MiB,16MiB,256MiB")
    out = [parse_size(s, "--sizes entry") for s in items]
    for s, n in zip(items, out):
        if n < 1:
            raise BadOption(f"--sizes entry {s!r} must be at least 1 byte")
    return out
