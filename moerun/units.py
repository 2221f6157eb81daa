"""Parsing and formatting of sizes, rates and durations for people."""

from __future__ import annotations

import re

from .errors import BadOption

_SIZE_UNITS = {
    "": 1,
    "b": 1,
    "kb": 1000,
    "mb": 1000**2,
    "gb": 1000**3,
    "tb": 1000**4,
    "kib": 1024,
    "mib": 1024**2,
    "gib": 1024**3,
    "tib": 1024**4,
}

_SIZE_RE = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*([a-zA-Z]*)\s*$")


def parse_size(text: str | int, what: str = "size") -> int:
    """Parse ``48MiB``, ``1.5GB``, ``4096`` into bytes (decimal kB/MB/GB, binary KiB/MiB/GiB)."""
    if isinstance(text, int):
        if text < 0:
            raise BadOption(f"{what} must not be negative, got {text}")
        return text
    m = _SIZE_RE.match(str(text))
    if not m:
        raise BadOption(f"cannot read {what} {text!r}: use forms like 48MiB, 1.5GB or 1048576")
    number, unit = m.groups()
    factor = _SIZE_UNITS.get(unit.lower())
    if factor is None and unit.lower() in ("k", "m", "g", "t"):
        raise BadOption(f"ambiguous unit {unit!r} in {what} {text!r}: write {unit.upper()}B (powers of 1000) or {unit.upper()}iB (powers of 1024)")
    if factor is None:
        raise BadOption(f"unknown unit {unit!r} in {what} {text!r}: use B, kB, MB, GB, KiB, MiB or GiB")
    value = float(number) * factor
    if value != value or value > 2**62:
        raise BadOption(f"{what} {text!r} is out of range")
    return int(round(value))


def parse_rate(text: str | float, what: str = "rate") -> float:
    """Parse ``2GB/s``, ``500MiB/s`` or plain bytes per second into bytes per second (> 0)."""
    if isinstance(text, (int, float)):
        value = float(text)
    else:
        s = str(text).strip()
        if s.lower().endswith("/s"):
            s = s[:-2]
        value = float(parse_size(s, what))
    if not value > 0:
        raise BadOption(f"{what} must be greater than zero, got {text!r}")
    return value


def fmt_bytes(n: float) -> str:
    """Human size in binary units, e.g. ``14.7 MiB``."""
    n = float(n)
    for unit, factor in (("GiB", 1024**3), ("MiB", 1024**2), ("KiB", 1024)):
        if abs(n) >= factor:
            return f"{n / factor:.1f} {unit}"
    return f"{int(n)} B"


def fmt_rate(bytes_per_s: float) -> str:
    return f"{bytes_per_s / 1e9:.2f} GB/s"


def fmt_ms(ns: float) -> str:
    return f"{ns / 1e6:.2f} ms"
