"""``moerun.probe``: page-in latency and bandwidth on this machine's storage, as a library function.

The result's ``to_json()`` is what ``moerun probe --json`` prints (and ``--save`` writes, schema moerun-probe/2).
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

from moerun.errors import BadModelFile
from moerun.files.bundled import resolve_model
from moerun.files.fileio import check_output
from moerun.prober.pagein import DEFAULT_RUNS, parse_sizes, run_probe
from moerun.prober.saved import load_probe, save_probe
from moerun.runtime.engine import default_model_dir
from moerun.units import parse_size


@dataclass
class ProbeResult:
    """The measured page-in figures: one entry in ``blocks`` per block size, each with its warm and cold regime."""

    schema: str
    created: str
    machine: dict
    read: str
    cold_method: str
    cold_scope: str
    check_method: str
    runs: int
    ceiling: dict  # the memory-copy speed the page-in rates are set against
    blocks: list[dict]
    note: str | None = None  # a synthetic model's warning

    def to_json(self) -> dict:
        doc = {
            "schema": self.schema,
            "created": self.created,
            "machine": self.machine,
            "read": self.read,
            "cold_method": self.cold_method,
            "cold_scope": self.cold_scope,
            "check_method": self.check_method,
            "runs": self.runs,
            "ceiling": self.ceiling,
            "blocks": self.blocks,
        }
        if self.note is not None:
            doc["note"] = self.note
        return doc


def _model_inputs(model_dir) -> list[Path]:
    try:
        return [p for p in Path(model_dir).iterdir() if p.is_file()]
    except OSError:
        return []


def probe(model_dir: str | os.PathLike | None = None, sizes: str | Sequence[int | str] | None = None, *,
          runs: int = DEFAULT_RUNS, work_dir: str | os.PathLike | None = None, save: str | os.PathLike | None = None,
          force: bool = False, progress: Callable[[int, int, str], None] | None = None) -> ProbeResult:
    """Time the engine's page-in read for the model's experts and for each of ``sizes`` (``moerun probe``).

    With neither ``model_dir`` nor ``sizes``, the default model's experts are timed.  ``sizes``: bytes or
    sizes like "16MiB" (or one text "1MiB,16MiB").  ``save``: also write the result there for
    ``moerun.plan(probe=...)``, refused before any measuring if it may not be written (``force`` replaces a
    file).  ``progress(done, total, what)`` is called after each timed read.
    """
    if sizes is None:
        sizes = []
    elif isinstance(sizes, str):
        sizes = parse_sizes(sizes)
    else:
        sizes = [parse_size(s, "--sizes entry") for s in sizes]
    if model_dir is None and not sizes:
        model_dir = default_model_dir()
        if not Path(model_dir).is_dir():
            raise BadModelFile(f"{model_dir}: the default model is not there; give --model DIR or --sizes LIST")
    if model_dir is not None:
        model_dir = resolve_model(model_dir)
    inputs = _model_inputs(model_dir) if model_dir is not None else []
    if save:  # refused now, not after minutes of measuring
        check_output(save, force, inputs, "--save")
    doc = run_probe(model_dir, sizes, runs=runs, work_dir=work_dir, report=progress)
    if save:
        save_probe(save, doc, force=force, inputs=inputs)
        load_probe(save)  # what a planner will read must validate
    return ProbeResult(**doc)
