"""The measured peak resident-set growth of a run against its memory cap (docs/guide/offload.md, "What the cap covers")."""

from __future__ import annotations

from moerun.units import fmt_bytes

# Peak resident-set growth may exceed the cap by this much before a run is flagged: the interpreter's own
# small allocations (token lists, the routing recorder, numpy's per-call buffers) that no budget line counts.
CAP_ALLOWANCE_BYTES = 2 << 20


def cap_check(engine) -> dict | None:
    """Measured peak resident-set growth against the cap: None without a cap."""
    cap = engine.budget.cap
    if cap is None:
        return None
    growth = engine.memwatch.peak_growth()
    return {"cap_bytes": cap, "allowance_bytes": CAP_ALLOWANCE_BYTES, "peak_rss_growth_bytes": growth,
            "exceeded": growth > cap + CAP_ALLOWANCE_BYTES}


def cap_warning(engine) -> str | None:
    """One line for stderr when the measured peak exceeded the cap (plus the allowance), else None."""
    chk = cap_check(engine)
    if chk is None or not chk["exceeded"]:
        return None
    over = chk["peak_rss_growth_bytes"] - chk["cap_bytes"]
    return (f"peak resident-set growth {fmt_bytes(chk['peak_rss_growth_bytes'])} exceeded the memory cap "
            f"{fmt_bytes(chk['cap_bytes'])} by {fmt_bytes(over)} (allowance {fmt_bytes(CAP_ALLOWANCE_BYTES)})")
