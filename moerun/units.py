"""Parsing and formatting of sizes and rates for people, and checks of numbers read from JSON."""

from __future__ import annotations

import math
import re

from moerun.errors import BadOption

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
    if isinstance(text, bool) or not isinstance(text, (int, str)):
        raise BadOption(f"{what} takes bytes (a whole number) or a size such as 48MiB, got {text!r}")
    if isinstance(text, int):
        if text < 0:
            raise BadOption(f"{what} must not be negative, got {text}")
        if text > 2**62:
            raise BadOption(f"{what} {text} is out of range")
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
    if isinstance(text, bool):
        raise BadOption(f"{what} takes a rate such as 2GB/s or 500MiB/s, got {text!r}")
    if isinstance(text, (int, float)):
        value = float(text)
        if value != value or value in (float("inf"), float("-inf")):
            raise BadOption(f"{what} must be a finite rate, got {text!r}")
    else:
        s = str(text).strip()
        per_second = s.lower().endswith("/s")
        if per_second:
            s = s[:-2]
        try:
            value = float(parse_size(s, what))
        except BadOption:
            raise BadOption(f"cannot read {what} {text!r}: use forms like 2GB/s, 500MiB/s or 1e9 (bytes per second)") from None
        if not per_second and not s[-1].isdigit():  # "2GB" is a size; a rate with a unit says per second
            raise BadOption(f"{what} {text!r} is a size, not a rate: write {s}/s")
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


def fmt_exact(n: int) -> str:
    """A size to the byte, then in binary units: ``12374528 bytes (11.80 MiB)``, so two close sizes never read alike
    (the plain digits can be pasted back as an option)."""
    n = int(n)
    for unit, factor in (("GiB", 1024**3), ("MiB", 1024**2), ("KiB", 1024)):
        if abs(n) >= factor:
            return f"{n} bytes ({n / factor:.2f} {unit})"
    return f"{n} bytes"


def fmt_rate(bytes_per_s: float) -> str:
    return f"{bytes_per_s / 1e9:.2f} GB/s"


def fmt_tok_s(tok_s: float) -> str:
    """A speed for people: three significant digits, whole numbers from 100 tok/s up (0.427, 4.27, 42.7, 427,
    4270); JSON documents keep every digit."""
    if not tok_s > 0:
        return "0"
    r = float(f"{tok_s:.3g}")
    if r >= 100:
        return f"{tok_s:.0f}"
    return f"{r:.{2 - math.floor(math.log10(r))}f}"


# How a setting is written for people, the same in every command's text.  In JSON a shared pool is
# ``"split": "shared"`` and a prefetch setting ``"prefetch": N, "lookahead": L`` (the engine's options).
SHARED_POOL = "shared pool"  # one pool shared by all layers (--shared-pool)
NO_PREFETCH = "no prefetch"


def fmt_prefetch(prefetch: int | str, lookahead: int | None = None, prefetch_from: str | None = None) -> str:
    """A prefetch setting as the options that choose it: ``--prefetch 2 --lookahead 1`` or ``--prefetch auto
    --lookahead 1`` (``--prefetch-from output`` added when it is not the default), or ``no prefetch``."""
    if not prefetch:
        return NO_PREFETCH
    text = f"--prefetch {prefetch} --lookahead {lookahead or 1}"
    return text + (f" --prefetch-from {prefetch_from}" if prefetch_from not in (None, "attention") else "")


def whole_number(v, lo: int = 0, hi: int = 2**62) -> bool:
    """A JSON value that is a whole number in [lo, hi] (not a bool, not 1.5, not 10**400)."""
    return isinstance(v, int) and not isinstance(v, bool) and lo <= v <= hi


def finite_number(v, lo: float = 0.0, hi: float = 1e30) -> bool:
    """A JSON value that is a finite number in [lo, hi] (an integer too large for a float is refused)."""
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return False
    try:
        f = float(v)
    except OverflowError:
        return False
    return f == f and lo <= f <= hi
