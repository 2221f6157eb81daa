"""One module per ``moerun`` command: ``HELP``, ``add_arguments(p)`` and ``run(args)``."""

__all__ = ["generate", "inspect", "plan", "probe", "quantize", "record", "replay", "score", "synth", "verify"]
