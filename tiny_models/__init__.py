"""The bundled model directories, shipped with moerun as package data (the package ``moerun_models``).

pyproject.toml maps ``moerun_models`` to this directory and ships every file of every model directory in
it; ``moerun.runtime.engine.default_model_dir`` finds them through importlib.resources in any install.
"""
