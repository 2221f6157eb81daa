"""moerun: a CPU-only reference engine and workbench for offloaded mixture-of-experts inference."""

import os as _os

# Batch-1 decode multiplies small matrices: one BLAS thread is faster and far steadier than two
# on a shared 2-core machine (DEVELOPERS.md, Benchmarks).  This only takes effect when moerun is imported
# before numpy; set OPENBLAS_NUM_THREADS (or OMP_NUM_THREADS) yourself to choose otherwise.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_var, "1")

from moerun.errors import BadInput, BadModelFile, BadOption, BadTrace, ImpossibleBudget, MoerunError  # noqa: E402
from moerun.model.sampling import Sampling  # noqa: E402
from moerun.runtime.engine import Engine, Generation, default_model_dir, load  # noqa: E402

from ._version import __version__  # noqa: E402

__all__ = [
    "__version__",
    "BadInput",
    "BadModelFile",
    "BadOption",
    "BadTrace",
    "Engine",
    "Generation",
    "ImpossibleBudget",
    "MoerunError",
    "Sampling",
    "default_model_dir",
    "load",
]
