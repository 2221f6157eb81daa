"""Pictures of a replay (optional: needs matplotlib, ``pip install 'moerun[plot]'``).

``plot_replay`` draws two things into one PNG: hit rate against slots per
layer for every policy, with the offline optimum as the bound and the
baselines dotted; and, for one layer, which expert is resident at each token
under the first online policy and under the optimum, at one slot count.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from moerun import policies
from moerun.errors import BadOption
from moerun.files.fileio import atomic_path
from moerun.files.trace import Trace
from moerun.sim.report import overall, residency_picture
from moerun.units import SHARED_POOL

PICTURE_TOKENS = 160


def require_matplotlib():
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise BadOption("--plot needs matplotlib, which is not installed: pip install 'moerun[plot]'") from None
    return plt


def _picture_slots(slots: list[int], top_k: int, n_experts: int) -> int:
    """A slot count where policies differ: the middle of those between top_k and n_experts - 1."""
    mid = [c for c in slots if top_k <= c < n_experts] or slots
    return mid[len(mid) // 2]


def plot_replay(path: str | Path, trace: Trace, doc: dict, layer: int = 0, force: bool = True, inputs=()) -> dict:
    plt = require_matplotlib()
    from matplotlib.colors import ListedColormap
    from matplotlib.patches import Patch

    slots = doc["slots"]
    names = doc["policies"]
    online = [n for n in names if getattr(policies.get(n), "online", True)]
    offline = [n for n in names if n not in online]
    E = trace.n_experts
    fig = plt.figure(figsize=(11, 8.5), dpi=110)
    grid = fig.add_gridspec(2, 2, height_ratios=[1.1, 1], hspace=0.45, wspace=0.25)

    ax = fig.add_subplot(grid[0, :])
    markers = "osD^v<>p*hx"
    for i, name in enumerate(online):
        by = overall(doc["results"], name)
        ax.plot(slots, [100 * (by[c]["hit_rate"] or 0) for c in slots], marker=markers[i % len(markers)], label=name)
    for name in offline:
        by = overall(doc["results"], name)
        ys = [100 * (by[c]["hit_rate"] or 0) for c in slots]
        ax.plot(slots, ys, color="black", linewidth=2, linestyle="--", label=f"{name} (offline bound)")
        ax.fill_between(slots, ys, 100, color="0.9", zorder=0, label="unreachable by any policy")
    for key, label in (("shuffled", "lru, tokens shuffled in time"), ("random", "lru, random routing")):
        by = overall(doc.get("baselines", []), baseline=key)
        if by:
            ax.plot(slots, [100 * (by[c]["hit_rate"] or 0) for c in slots], linestyle=":", marker=".", label=label)
    shared = doc["split"] == "shared"
    ax.set_xlabel(f"expert slots of the {SHARED_POOL} (one for all layers)" if shared else "expert slots per layer")
    ax.set_ylabel("hit rate (% of decode accesses)")
    ax.set_xticks(slots)
    ax.set_ylim(0, 100)
    ax.grid(True, color="0.85")
    tr = doc["trace"]
    ax.set_title(f"hit rate against slots: {tr['tokens']} tokens x {tr['layers']} layers, top-{tr['top_k']} of {E} experts")
    ax.legend(fontsize=8, loc="upper left")

    info: dict = {"file": str(path), "layer": layer}
    P = int(tr["prefill_tokens"])
    t0 = P
    t1 = min(trace.n_tokens, P + PICTURE_TOKENS)
    L = trace.n_layers
    c = _picture_slots(slots, L * trace.top_k, L * E) if shared else _picture_slots(slots, trace.top_k, E)
    shown = ([online[0]] if online else []) + offline[:1]
    cmap = ListedColormap(["white", "#c9d6e8", "#2e8b57", "#d1495b"])
    for j, name in enumerate(shown[:2]):
        axr = fig.add_subplot(grid[1, j])
        pic = residency_picture(trace, layer, name, c, t0, t1, shared) if t1 > t0 else np.zeros((E, 0), np.int8)
        axr.imshow(pic, aspect="auto", interpolation="nearest", cmap=cmap, vmin=0, vmax=3, origin="lower",
                   extent=(t0 - 0.5, t1 - 0.5, -0.5, E - 0.5))
        axr.set_xlabel("token index (decode steps)")
        axr.set_ylabel("expert id")
        if E <= 16:
            axr.set_yticks(range(E))
        misses = int((pic == 3).sum())
        used = int((pic >= 2).sum())
        where = f"{c} slots, {SHARED_POOL}" if shared else f"{c} slots"
        axr.set_title(f"layer {layer}, {name}, {where}: {misses} misses in {used} accesses", fontsize=10)
        info[f"picture_{j}"] = {"policy": name, "slots": c, "tokens": [t0, t1], "misses": misses, "accesses": used}
    fig.legend(
        handles=[
            Patch(facecolor="#c9d6e8", label="resident, not used"),
            Patch(facecolor="#2e8b57", label="used, was resident (hit)"),
            Patch(facecolor="#d1495b", label="used, loaded (miss)"),
        ],
        loc="lower center",
        ncol=3,
        fontsize=8,
        frameon=False,
    )
    try:
        with atomic_path(path, suffix=".png", force=force, inputs=inputs, what="--plot") as tmp:
            fig.savefig(tmp, format="png")
    finally:
        plt.close(fig)
    return info
