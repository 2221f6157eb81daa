"""The models that ship with moerun, by short name.

They live in the repository's tiny_models/ and are installed as the package ``moerun_models``
(pyproject.toml maps one to the other), so a wheel or ``pip install .`` carries them; they are found
through importlib.resources in any install, and in the source tree when moerun runs uninstalled.
"""

from __future__ import annotations

import os
from pathlib import Path

DEFAULT = "pebble"


def bundled_root() -> Path:
    """The directory holding the bundled models."""
    try:
        from importlib.resources import files

        found = Path(str(files("moerun_models")))
        if (found / DEFAULT / "config.json").is_file():
            return found
    except (ImportError, TypeError, ValueError):
        pass
    return Path(__file__).resolve().parents[2] / "tiny_models"


def bundled_models() -> dict[str, Path]:
    """Short name -> directory of every bundled model (a directory of the root holding a config.json)."""
    root = bundled_root()
    if not root.is_dir():
        return {}
    return {d.name: d for d in sorted(root.iterdir()) if d.is_dir() and (d / "config.json").is_file()}


def resolve_model(model: str | os.PathLike | None) -> Path:
    """The model directory a ``--model`` value (or ``load``'s first argument) names.

    None: ``$MOERUN_MODEL`` if set, else the bundled default.  A path object, or text that names an
    existing path or holds a separator, is taken as a path; a bare name that is not a path here but names
    a bundled model is that model (``--model scree`` after a normal install); anything else is returned
    as a path, for the caller's own error about it.
    """
    if model is None:
        env = os.environ.get("MOERUN_MODEL")
        if env:
            return Path(env)
        return bundled_root() / DEFAULT
    path = Path(model)
    if not isinstance(model, str) or path.exists() or os.sep in model or (os.altsep and os.altsep in model):
        return path  # a path object, or text that names a path, is a path
    return bundled_models().get(model, path)
