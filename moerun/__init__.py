"""moerun: a CPU-only reference engine and workbench for offloaded mixture-of-experts inference."""

from .engine import Engine, Generation, default_model_dir, load
from .errors import BadInput, BadModelFile, BadOption, BadTrace, ImpossibleBudget, MoerunError
from .sampling import Sampling

__version__ = "0.1.0"

__all__ = [
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
