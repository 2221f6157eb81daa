"""The memory cap, split into dense weights, KV cache, scratch and the expert pool.

Everything is computed before the run.  The pool is the remainder of the cap
after dense weights, the KV cache for the full context and scratch; it holds
fixed-size slots (one expert each, rounded up to a 4 KiB page so every slot
starts page-aligned).  Slots are either split into per-layer quotas (even by
default, or an explicit list) or shared by all layers.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from moerun.errors import ImpossibleBudget
from moerun.files.config import ModelConfig
from moerun.model.transformer import PREFILL_CHUNK, KVCache
from moerun.units import fmt_bytes, fmt_exact

SLOT_ALIGN = 4096


def slot_bytes(expert_nbytes: int) -> int:
    return -(-expert_nbytes // SLOT_ALIGN) * SLOT_ALIGN


def scratch_bytes(config: ModelConfig, codec_scratch: int = 0) -> int:
    """Working memory of one forward pass (float32 activations), or of loading the dense weights, whichever
    is larger (the two never overlap in time).

    A pass is at most T = min(context, PREFILL_CHUNK) tokens (a longer prompt runs in passes,
    moerun.model.transformer), attending to at most S = context positions: residual, normed and attention
    output rows [T, d_model] (x4), the fused q|k|v projection, attention scores and probabilities
    [heads, T, S] (x3 for the mask and softmax temporaries), expert intermediates [T, d_expert] (x3; the
    shared expert's [T, d_shared] and a dense layer's [T, d_dense] are computed apart from them, so the
    widest counts), logits [T, vocab], the rotary tables [S, head_dim], plus the codec's dequantization
    buffers.  Loading: the largest dense tensor's file bytes while it is widened to float32 (2 per element
    when the weights are F16) and its finiteness check (1 per element).
    """
    c = config
    S = c.max_seq_len
    T = min(S, PREFILL_CHUNK)
    floats = (
        T * 4 * c.d_model
        + T * (c.q_dim + 2 * c.kv_dim)
        + 3 * c.n_heads * T * S
        + 3 * T * max(c.d_expert, c.d_shared, c.d_dense)
        + T * c.vocab_size
        + S * c.head_dim  # rotary cos and sin tables
    )
    return max(4 * floats + codec_scratch, load_bytes(config))


def load_bytes(config: ModelConfig) -> int:
    """Transient bytes of loading the dense weights: the largest tensor's raw bytes (F16, or an open checkpoint's
    BF16) and its check."""
    per = 1 + (2 if config.dtype in ("F16", "BF16") else 0)
    largest = max((_elements(s) for s in config.dense_shapes().values()), default=0)
    return per * largest


def _elements(shape) -> int:
    n = 1
    for s in shape:
        n *= s
    return n


@dataclass
class Budget:
    cap: int | None
    dense: int
    kv_cache: int
    scratch: int
    slot: int  # bytes per slot
    expert_nbytes: int  # bytes of one expert in the file
    split: str  # "even", "list", "shared" or "resident"
    slots: list[int] = field(default_factory=list)  # per layer; for "shared" one entry
    unused: int = 0

    @property
    def n_slots(self) -> int:
        return sum(self.slots)

    @property
    def pool(self) -> int:
        return self.n_slots * self.slot

    @property
    def total(self) -> int:
        return self.dense + self.kv_cache + self.scratch + self.pool

    def rows(self) -> list[tuple[str, int]]:
        return [
            ("dense weights", self.dense),
            ("KV cache", self.kv_cache),
            ("scratch", self.scratch),
            (f"expert pool ({self.n_slots} slots x {fmt_bytes(self.slot)})", self.pool),
        ]

    def to_json(self) -> dict:
        return {
            "cap_bytes": self.cap,
            "dense_bytes": self.dense,
            "kv_cache_bytes": self.kv_cache,
            "scratch_bytes": self.scratch,
            "pool_bytes": self.pool,
            "slot_bytes": self.slot,
            "expert_bytes": self.expert_nbytes,
            "split": self.split,
            "slots": list(self.slots),
            "total_bytes": self.total,
        }


def fixed_bytes(config: ModelConfig, dense: int, codec_scratch: int = 0) -> tuple[int, int, int]:
    return dense, KVCache.nbytes_for(config), scratch_bytes(config, codec_scratch)


def minimum_cap(config: ModelConfig, dense: int, expert_nbytes: int, split: str | list[int] = "even", codec_scratch: int = 0,
                slot_nbytes: int | None = None) -> int:
    """The smallest cap that holds the fixed parts and the fewest slots a split needs.  ``slot_nbytes``: what one
    slot holds when it is not the expert as stored (an open checkpoint's experts widened when read)."""
    d, kv, s = fixed_bytes(config, dense, codec_scratch)
    per = slot_bytes(slot_nbytes or expert_nbytes)
    if split == "shared":
        need = config.top_k
    else:
        need = config.n_layers * config.top_k
    return d + kv + s + need * per


def plan_budget(
    config: ModelConfig,
    dense: int,
    expert_nbytes: int,
    mem_cap: int | None,
    split: str | list[int] = "even",
    codec_scratch: int = 0,
    slot_nbytes: int | None = None,
) -> Budget:
    """Size the pool for ``mem_cap`` (None: every expert resident). Raises ImpossibleBudget.

    ``slot_nbytes``: what one slot holds, when it is not the ``expert_nbytes`` a page-in reads."""
    d, kv, s = fixed_bytes(config, dense, codec_scratch)
    per = slot_bytes(slot_nbytes or expert_nbytes)
    L, E, k = config.n_layers, config.n_experts, config.top_k
    if mem_cap is None and not isinstance(split, (list, tuple)):
        return Budget(None, d, kv, s, per, expert_nbytes, "resident", [E] * L)
    if isinstance(split, (list, tuple)):
        slots = [int(n) for n in split]
        if len(slots) != L:
            raise ImpossibleBudget(f"the slot list has {len(slots)} entries but the model has {L} layers")
        bad = [i for i, n in enumerate(slots) if not k <= n <= E]
        if bad:
            raise ImpossibleBudget(
                f"layer {bad[0]} gets {slots[bad[0]]} slots; each layer needs between top_k={k} and n_experts={E}"
            )
        b = Budget(mem_cap, d, kv, s, per, expert_nbytes, "list", slots)
        if mem_cap is None:  # an explicit split with no cap: the cap is whatever it needs
            return b
        if b.total > mem_cap:
            raise ImpossibleBudget(
                f"memory cap {fmt_exact(mem_cap)} cannot hold that slot list; it needs at least {fmt_exact(b.total)}"
            )
        b.unused = mem_cap - b.total
        return b
    minimum = minimum_cap(config, dense, expert_nbytes, split, codec_scratch, slot_nbytes)
    if mem_cap < minimum:
        raise ImpossibleBudget(
            f"memory cap {fmt_exact(mem_cap)} is too small: dense weights, KV cache and scratch take "
            f"{fmt_bytes(d + kv + s)} and the pool needs room for at least "
            f"{k if split == 'shared' else L * k} experts; the smallest cap that works is {fmt_exact(minimum)}"
        )
    n = (mem_cap - d - kv - s) // per
    if split == "shared":
        slots = [min(n, L * E)]
    elif split == "even":
        n = min(n, L * E)
        base, extra = divmod(n, L)
        slots = [min(E, base + (1 if i < extra else 0)) for i in range(L)]
    else:
        raise ImpossibleBudget(f"unknown pool split {split!r}: use even, shared or a list of slots per layer")
    b = Budget(mem_cap, d, kv, s, per, expert_nbytes, split, slots)
    b.unused = mem_cap - b.total
    return b
