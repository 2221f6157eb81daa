"""moerun: a CPU-only reference engine and workbench for offloaded mixture-of-experts inference.

The public API (docs/guide/api.md): ``load`` and ``EngineOptions`` for the engine, and one function
per job of the command line (``plan``, ``replay``, ``record``, ``profile``, ``verify``, ``score``, ``probe``,
``quantize``, ``synth``), each returning a result whose ``to_json()`` is what the command's ``--json``
prints.  Names are imported on first use (PEP 562), so ``import moerun`` loads neither numpy nor an
offline tool, and changes no environment variable (BLAS threads: docs/guide/api.md).
"""

from __future__ import annotations

import importlib as _importlib

from moerun.errors import BadInput, BadModelFile, BadOption, BadTrace, ImpossibleBudget, MoerunError, OutputError

from ._version import __version__

# public name -> the module that owns it
_LAZY = {
    "Engine": "moerun.runtime.engine",
    "Generation": "moerun.runtime.engine",
    "default_model_dir": "moerun.runtime.engine",
    "EngineOptions": "moerun.runtime.options",
    "load": "moerun.runtime.options",
    "Sampling": "moerun.model.sampling",
    "plan": "moerun.planner.jobs",
    "PlanResult": "moerun.planner.jobs",
    "probe": "moerun.prober.jobs",
    "ProbeResult": "moerun.prober.jobs",
    "profile": "moerun.sim.jobs",
    "ProfileResult": "moerun.sim.jobs",
    "record": "moerun.sim.jobs",
    "RecordResult": "moerun.sim.jobs",
    "replay": "moerun.sim.jobs",
    "ReplayResult": "moerun.sim.jobs",
    "inspect": "moerun.checks.jobs",
    "InspectResult": "moerun.checks.jobs",
    "score": "moerun.checks.jobs",
    "ScoreResult": "moerun.checks.jobs",
    "verify": "moerun.checks.jobs",
    "VerifyResult": "moerun.checks.jobs",
    "quantize": "moerun.makers.jobs",
    "QuantizeResult": "moerun.makers.jobs",
    "synth": "moerun.makers.jobs",
    "SynthResult": "moerun.makers.jobs",
    "synth_open": "moerun.makers.jobs",
    "SynthOpenResult": "moerun.makers.jobs",
}

__all__ = [
    "__version__",
    "BadInput",
    "BadModelFile",
    "BadOption",
    "BadTrace",
    "Engine",
    "EngineOptions",
    "Generation",
    "ImpossibleBudget",
    "InspectResult",
    "MoerunError",
    "OutputError",
    "PlanResult",
    "ProbeResult",
    "ProfileResult",
    "QuantizeResult",
    "RecordResult",
    "ReplayResult",
    "Sampling",
    "ScoreResult",
    "SynthOpenResult",
    "SynthResult",
    "VerifyResult",
    "default_model_dir",
    "inspect",
    "load",
    "plan",
    "probe",
    "profile",
    "quantize",
    "record",
    "replay",
    "score",
    "synth",
    "synth_open",
    "verify",
]


def __getattr__(name: str):
    owner = _LAZY.get(name)
    if owner is None:
        raise AttributeError(f"module 'moerun' has no attribute {name!r}")
    value = getattr(_importlib.import_module(owner), name)
    globals()[name] = value  # later lookups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))
