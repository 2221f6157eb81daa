"""Exactness check: offloaded runs must compute bit-for-bit what the fully resident model computes.

``verify`` runs the same prompts fully resident and under several memory
configurations, and compares every logit (as raw bits) and every sampled token.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from moerun import policies
from moerun.files.ckpt_store import open_store
from moerun.model.sampling import Sampling
from moerun.runtime.budget import minimum_cap, plan_budget
from moerun.runtime.memwatch import RESIDENT_SHARE, available_memory
from moerun.runtime.options import load
from moerun.units import SHARED_POOL, fmt_prefetch


@dataclass
class Setting:
    label: str
    kwargs: dict = field(default_factory=dict)


@dataclass
class Outcome:
    setting: Setting
    slots: list[int]
    logits_equal: bool
    tokens_equal: bool
    max_abs_diff: float
    hit_rate: float | None

    @property
    def ok(self) -> bool:
        return self.logits_equal and self.tokens_equal


def default_settings(min_cap: int, full_cap: int, slot: int) -> list[Setting]:
    """The default set: every online policy at the smallest cap (moerun.policies.names), then other caps,
    a shared pool, prefetch (fixed and auto) and an emulated link."""
    mid = (min_cap + full_cap) // 2
    return [
        *(Setting(f"smallest cap, {name}", {"mem_cap": min_cap, "evict": name}) for name in policies.names(online_only=True)),
        Setting("middle cap, lru", {"mem_cap": mid, "evict": "lru"}),
        Setting(f"smallest cap, {fmt_prefetch(2, 2)}", {"mem_cap": min_cap, "prefetch": 2, "lookahead": 2}),
        Setting(f"middle cap, {SHARED_POOL}, {fmt_prefetch(1, 1)}", {"mem_cap": mid, "split": "shared", "prefetch": 1}),
        Setting(f"smallest cap, {SHARED_POOL}, orbit", {"mem_cap": min_cap, "split": "shared", "evict": "orbit"}),
        Setting(f"smallest cap, {fmt_prefetch(2, 1)}, link 1 GB/s (emulated)", {"mem_cap": min_cap, "prefetch": 2, "link_speed": 1e9}),
        Setting(f"smallest cap, {fmt_prefetch('auto', 1)}, link 1 GB/s (emulated)",
                {"mem_cap": min_cap, "prefetch": "auto", "link_speed": 1e9}),
    ]


# the reference runs every expert resident when that takes at most RESIDENT_SHARE of the memory available now


def _bits(a: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float32).view(np.uint32)


def run_once(model_dir, kwargs: dict, prompts: list[list[int]], max_new: int, sampling: Sampling):
    """Logits of one forward pass per prompt, and generated tokens with per-step logits."""
    with load(model_dir, **kwargs) as eng:
        out = []
        for ids in prompts:
            full = eng.logits(ids)
            gen = eng.generate(prompt_ids=ids, max_new=max_new, sampling=sampling, keep_logits=True)
            out.append((full, gen.new_ids, gen.logits))
        pool = eng.stats.get("pool")
        return out, list(eng.budget.slots), (pool or {}).get("hit_rate")


def compare(ref, got) -> tuple[bool, bool, float]:
    logits_equal = True
    tokens_equal = True
    diff = 0.0
    for (f0, t0, s0), (f1, t1, s1) in zip(ref, got):
        pairs = [(f0, f1)] + list(zip(s0, s1))
        if len(s0) != len(s1):
            logits_equal = False
        for a, b in pairs:
            if a.shape != b.shape or not np.array_equal(_bits(a), _bits(b)):
                logits_equal = False
                if a.shape == b.shape:
                    diff = max(diff, float(np.max(np.abs(a.astype(np.float64) - b))))
        tokens_equal &= t0 == t1
    return logits_equal, tokens_equal, diff


def verify(model_dir, prompts: list[list[int]], settings: list[Setting] | None = None, max_new: int = 24,
           sampling: Sampling | None = None, progress=None, base: dict | None = None) -> tuple[list[Outcome], dict]:
    """Every setting's run against the resident one; ``base``: ``load`` settings of every run (max_context)."""
    sampling = sampling or Sampling(temperature=0.8, top_p=0.95, seed=0)
    base = base or {}
    st = open_store(model_dir, base.get("max_context"))  # the dense weights only: no expert is read here
    try:
        c, scratch = st.config, st.codec.scratch_bytes()
        min_cap = minimum_cap(c, st.dense_nbytes, st.expert_nbytes, "even", scratch, st.slot_nbytes)
        every = plan_budget(c, st.dense_nbytes, st.expert_nbytes, None, "even", scratch, st.slot_nbytes)
        full_cap, slot = every.total, every.slot
    finally:
        st.close()
    room = int(RESIDENT_SHARE * available_memory())
    if settings is None:  # the caps between the smallest and the whole model, as far as memory allows
        settings = default_settings(min_cap, max(min_cap, min(full_cap, room)), slot)
    ref_kwargs = dict(base)
    reference = "resident"
    if full_cap > room:  # too large to hold whole: one layer's experts at a time
        ref_kwargs["baseline"] = reference = "whole-layer"
    ref, ref_slots, _ = run_once(model_dir, ref_kwargs, prompts, max_new, sampling)
    outcomes = []
    for i, s in enumerate(settings):
        if progress:
            progress(i, len(settings), s.label)
        got, slots, hit = run_once(model_dir, {**base, **s.kwargs}, prompts, max_new, sampling)
        le, te, diff = compare(ref, got)
        outcomes.append(Outcome(s, slots, le, te, diff, hit))
    info = {"min_cap": min_cap, "resident_cap": full_cap, "resident_slots": ref_slots, "reference": reference}
    return outcomes, info
