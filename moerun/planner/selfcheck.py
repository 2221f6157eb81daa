"""The plan checks itself: its recommendation run for a few seconds, the way ``moerun generate`` runs it.

A prediction is only as good as the costs it was made from, and costs timed minutes earlier, piece by piece,
need not carry to a run (docs/design/planner.md, "The plan checks itself").  So after choosing, ``plan`` loads
the model with the recommended setting (cap, slots or shared pool, policy, prefetch, the emulated link or cold
reads the plan was made for) and generates ``ROUNDS`` times, each run a fresh engine from the same prompt,
each about ``RUN_S`` seconds long at the predicted speed.  It reports the predicted decode speed beside the
median measured one, and the runs' spread as the noise.

When the two differ by more than that noise (at least ``NOISE_FLOOR``), the compute costs are corrected: every
compute term of ``Costs`` (attention and head, experts and their decoding, copies, guesses, the pool's
bookkeeping) is scaled by one factor, chosen so the time model gives the measured step for the measured hit
rate's stall, and the plan searches again with the corrected costs.  Page-in costs are not scaled: they come
from the link or the probe the user gave.
"""

from __future__ import annotations

import dataclasses
import statistics
from dataclasses import dataclass

from moerun.planner.timeline import Costs, Prediction

ROUNDS = 3  # runs of the recommendation (the median is kept)
RUN_S = 1.5  # seconds of decode per run, at the predicted speed
MIN_TOKENS, MAX_TOKENS = 16, 512  # decode tokens per run, at least and at most
NOISE_FLOOR = 0.05  # a disagreement below this share is never called one, however still the runs were
MAX_FACTOR = 20.0  # a correction beyond this (either way) says the costs are not the problem: none is made


@dataclass
class PlanCheck:
    """Predicted against measured decode speed of the recommended setting."""

    predicted_tok_s: float
    runs_tok_s: list[float]  # each run's decode tok/s, in the order run
    runs_hit_rate: list[float]
    predicted_hit_rate: float
    tokens_per_run: int
    prompt: str = ""  # what the runs started from
    factor: float | None = None  # the compute costs' correction, when one was made
    corrected_tok_s: float | None = None  # the recommendation's prediction with corrected costs

    @property
    def measured_tok_s(self) -> float:
        return statistics.median(self.runs_tok_s)

    @property
    def spread(self) -> float:
        """(fastest - slowest) / median of the runs: the noise a disagreement must exceed."""
        m = self.measured_tok_s
        return (max(self.runs_tok_s) - min(self.runs_tok_s)) / m if m else 0.0

    @property
    def error(self) -> float:
        """predicted / measured - 1: positive when the plan promised more than the runs gave."""
        return self.predicted_tok_s / self.measured_tok_s - 1 if self.measured_tok_s else 0.0

    @property
    def agrees(self) -> bool:
        return abs(self.error) <= max(self.spread, NOISE_FLOOR)

    def to_json(self) -> dict:
        return {
            "predicted_tok_s": self.predicted_tok_s,
            "measured_tok_s": self.measured_tok_s,
            "runs_tok_s": list(self.runs_tok_s),
            "spread": self.spread,
            "error": self.error,
            "agrees": self.agrees,
            "predicted_hit_rate": self.predicted_hit_rate,
            "measured_hit_rate": statistics.median(self.runs_hit_rate) if self.runs_hit_rate else None,
            "tokens_per_run": self.tokens_per_run,
            "prompt": self.prompt,
            "correction_factor": self.factor,
            "corrected_tok_s": self.corrected_tok_s,
        }


PROMPT_TOKENS = 32  # of the model's held-out text, the prompt of every run


def prompt_ids(model_dir, n: int = PROMPT_TOKENS) -> tuple[list[int], str]:
    """The runs' prompt and what it is: the first ``n`` tokens of the model's held-out text, else its BOS token
    alone (an open checkpoint, or a model without text or tokenizer)."""
    from pathlib import Path

    from moerun.files.ckpt_config import is_open_checkpoint
    from moerun.files.config import ModelConfig
    from moerun.model.tokenizer import Tokenizer, read_text_file

    d = Path(model_dir)
    held = d / "heldout.txt"
    if not is_open_checkpoint(d):
        c = ModelConfig.load(d)
        if held.is_file() and (d / "tokenizer.json").is_file():
            ids = Tokenizer.load(d, c.vocab_size, c.bos_token_id).encode_array(read_text_file(held), n).tolist()
            if ids:
                return ids, f"the first {len(ids)} tokens of {held.name}"
        return [c.bos_token_id if c.bos_token_id is not None else 0], "one start token"
    from moerun.files.checkpoint import Checkpoint
    from moerun.files.ckpt_store import leading_special_id, model_config

    with Checkpoint.open(d) as ck:  # its headers only: nothing of the weights is read
        bos = model_config(ck, leading_special_id(ck.tokenizer_path)).bos_token_id
    return [bos if bos is not None else 0], "one start token"


def engine_kwargs(pr: Prediction, cap: int, link_speed: float | None, cold: bool) -> dict:
    """``moerun.load`` settings of a prediction, under ``cap`` (``prefetch="auto"`` for a prediction of prefetch auto)."""
    kw: dict = {"mem_cap": cap, "evict": pr.policy, "prefetch": pr.prefetch_setting, "tokenizer": False}
    if pr.prefetch:
        kw["lookahead"] = pr.lookahead or 1
    if pr.shared:
        kw["split"] = "shared"
    else:
        kw["slots"] = list(pr.slots)
    if link_speed is not None:
        kw["link_speed"] = link_speed
    if cold:
        kw["cold_reads"] = True
    return kw


def tokens_per_run(predicted_tok_s: float) -> int:
    return int(min(MAX_TOKENS, max(MIN_TOKENS, round(predicted_tok_s * RUN_S))))


def run_once(model_dir, kwargs: dict, prompt_ids: list[int], max_new: int, seed: int) -> tuple[float, float]:
    """(decode tok/s, hit rate) of one fresh engine generating ``max_new`` tokens from ``prompt_ids``."""
    from moerun.model.sampling import Sampling
    from moerun.runtime.options import load

    with load(model_dir, **kwargs) as eng:
        gen = eng.generate(prompt_ids=list(prompt_ids), max_new=max_new, sampling=Sampling(temperature=0.8, seed=seed))
        pool = eng.stats.get("pool", {})
    tok_s = gen.decode_steps / (gen.decode_ns / 1e9) if gen.decode_ns else 0.0
    return tok_s, float(pool.get("hit_rate", 1.0) if pool else 1.0)


def measure(model_dir, pr: Prediction, cap: int, prompt_ids: list[int], link_speed: float | None = None,
            cold: bool = False, rounds: int = ROUNDS, progress=None, **extra) -> PlanCheck:
    """Run the prediction's setting ``rounds`` times (``progress(i, rounds)`` before each) and compare.
    ``extra``: more ``moerun.load`` settings (a warm start)."""
    n = tokens_per_run(pr.tok_s)
    kw = {**engine_kwargs(pr, cap, link_speed, cold), **extra}
    speeds, hits = [], []
    for i in range(rounds):
        if progress is not None:
            progress(i, rounds)
        s, h = run_once(model_dir, kw, prompt_ids, n, seed=i)
        speeds.append(s)
        hits.append(h)
    return PlanCheck(pr.tok_s, speeds, hits, pr.hit_rate, n)


def compute_factor(pr: Prediction, measured_tok_s: float) -> float | None:
    """The factor on the compute costs that makes ``pr``'s step the measured one (its stall kept), or None when
    no positive factor within MAX_FACTOR does."""
    if measured_tok_s <= 0 or pr.step_s <= pr.stall_s:
        return None
    f = (1.0 / measured_tok_s - pr.stall_s) / (pr.step_s - pr.stall_s)
    return f if 1.0 / MAX_FACTOR <= f <= MAX_FACTOR else None


def scaled_costs(costs: Costs, factor: float) -> Costs:
    """``costs`` with every compute term scaled by ``factor`` (page-in, waiting and lateness kept)."""
    return dataclasses.replace(
        costs,
        attn=[a * factor for a in costs.attn], expert=costs.expert * factor, head=costs.head * factor,
        copy=costs.copy * factor, decode=costs.decode * factor, guess=costs.guess * factor,
        place=costs.place * factor, policy={k: v * factor for k, v in costs.policy.items()}, pool=costs.pool * factor,
    )
