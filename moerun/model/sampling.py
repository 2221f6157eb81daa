"""Choosing the next token from logits: greedy, temperature and top-p, seeded."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from moerun.errors import BadOption


@dataclass(frozen=True)
class Sampling:
    temperature: float = 0.8
    top_p: float = 0.95
    seed: int = 0

    def __post_init__(self):
        for name in ("temperature", "top_p"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, float, np.floating, np.integer)):
                raise BadOption(f"{name.replace('_', '-')} takes a number, got {v!r}")
        if not (self.temperature >= 0 and np.isfinite(self.temperature)):
            raise BadOption(f"temperature must be 0 (greedy) or positive, got {self.temperature}")
        if isinstance(self.seed, bool) or not isinstance(self.seed, int) or not 0 <= self.seed < 2**63:
            raise BadOption(f"seed must be a whole number, 0 or more, got {self.seed!r}")
        if not 0 < self.top_p <= 1:
            raise BadOption(f"top-p must be in (0, 1], got {self.top_p}")


class Sampler:
    def __init__(self, sampling: Sampling):
        self.s = sampling
        self.rng = np.random.default_rng(sampling.seed)

    def __call__(self, logits: np.ndarray) -> int:
        if self.s.temperature == 0:
            return int(np.argmax(logits))
        with np.errstate(over="ignore", invalid="ignore"):
            z = logits.astype(np.float64) / self.s.temperature
            p = np.exp(z - z.max())
            p /= p.sum()
        if not np.isfinite(p).all():
            # a temperature so small that logits / temperature overflows (5e-324, say): the limit of
            # sampling as the temperature goes to 0, which is choosing among the largest logits
            top = logits == logits.max()
            p = top / top.sum()
        if self.s.top_p < 1:
            order = np.argsort(-p, kind="stable")
            cum = np.cumsum(p[order])
            keep = order[: int(np.searchsorted(cum, self.s.top_p)) + 1]
            q = np.zeros_like(p)
            q[keep] = p[keep]
            p = q / q.sum()
        return int(self.rng.choice(len(p), p=p))
