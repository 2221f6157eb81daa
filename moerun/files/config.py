"""The model's ``config.json``: reading, validating and describing it."""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass, field
from pathlib import Path

from moerun.errors import BadModelFile
from moerun.files.fileio import read_user_file

FORMAT_TAG = "moerun/1"
# Upper bound on the tensors a config may imply (7 dense, 3 per expert and 3 for a shared expert, per layer).  Large
# published mixture-of-experts checkpoints hold tens of thousands; a million is implausible.
MAX_TENSORS = 1 << 20
FLOAT32_MAX = 3.4028234663852886e38  # the largest finite float32 (IEEE 754 binary32)
CONFIG_LIMIT = 16 << 20  # bytes of a config.json (a real one is a few hundred)
# What every output about a model with random weights (config.json "synthetic": true, made by moerun synth) says
RANDOM_NOTE = "random weights: routing is meaningless"

# the open-checkpoint fields (ModelConfig) and their defaults, which a moerun model has; to_json leaves them out
_OPEN_DEFAULTS = {"arch": "", "dense_layers": (), "d_dense": 0, "qk_norm": "none", "qkv_bias": False, "clip_qkv": None,
                  "shared_gate": False, "eos_token_ids": ()}

_INT_FIELDS = (
    "vocab_size",
    "d_model",
    "n_layers",
    "n_heads",
    "n_kv_heads",
    "head_dim",
    "n_experts",
    "top_k",
    "d_expert",
    "max_seq_len",
)


@dataclass(frozen=True)
class ModelConfig:
    """Shape and hyper-parameters of a model (docs/design/architecture.md, model spec)."""

    vocab_size: int
    d_model: int
    n_layers: int
    n_heads: int
    n_kv_heads: int
    head_dim: int
    n_experts: int
    top_k: int
    d_expert: int
    max_seq_len: int
    rope_theta: float
    norm_eps: float
    tied_embeddings: bool
    format: str = FORMAT_TAG
    name: str = ""
    bos_token_id: int | None = None
    dtype: str = "F32"
    d_shared: int = 0  # hidden width of the always-on shared expert; 0 = none
    norm_topk: bool = True  # True: chosen weights p / sum(p); False: the chosen probabilities as they are
    # The optional parts of open checkpoints' architectures (moerun.files.ckpt_store); a moerun model has none of
    # them, and config.json cannot ask for them.  ``n_layers`` counts the layers that route to experts (all of a
    # moerun model's); ``dense_layers`` names the places in the stack of layers with a dense MLP of ``d_dense``
    # instead, so the stack has ``n_blocks`` layers and the routed ones are numbered 0..n_layers-1 in order.
    arch: str = ""  # an open checkpoint's model_type ("" for a moerun model)
    dense_layers: tuple[int, ...] = ()
    d_dense: int = 0
    qk_norm: str = "none"  # "per_head" (RMSNorm of each head of q and of k) or "full" (of all of q and of k)
    qkv_bias: bool = False
    clip_qkv: float | None = None  # q, k and v clamped to [-clip, clip]
    shared_gate: bool = False  # the shared expert's term is scaled by sigmoid(u @ shared_gate)
    eos_token_ids: tuple[int, ...] = ()  # generation stops at any of these
    extra: dict = field(default_factory=dict, compare=False)

    @property
    def q_dim(self) -> int:
        return self.n_heads * self.head_dim

    @property
    def kv_dim(self) -> int:
        return self.n_kv_heads * self.head_dim

    @property
    def n_blocks(self) -> int:
        """Layers in the stack: the routed ones and the dense ones (each has attention and a KV cache)."""
        return self.n_layers + len(self.dense_layers)

    def routed_blocks(self) -> tuple[int, ...]:
        """The place in the stack of each routed layer, in order (routed layer i is block routed_blocks()[i])."""
        dense = set(self.dense_layers)
        return tuple(b for b in range(self.n_blocks) if b not in dense)

    def to_json(self) -> dict:
        d = asdict(self)
        extra = d.pop("extra")
        d.update(extra)
        if d["bos_token_id"] is None:
            d.pop("bos_token_id")
        # the optional fields are written only when they differ from their defaults, so a config
        # without them (every model made before them) round-trips unchanged
        if not d["d_shared"]:
            d.pop("d_shared")
        if d["norm_topk"]:
            d.pop("norm_topk")
        for k, default in _OPEN_DEFAULTS.items():
            if d[k] == default:
                d.pop(k)
            elif isinstance(d[k], tuple):
                d[k] = list(d[k])
        return d

    @classmethod
    def from_dict(cls, raw: object, where: str = "config.json") -> ModelConfig:
        if not isinstance(raw, dict):
            raise BadModelFile(f"{where}: expected a JSON object")
        try:  # JSON escapes can spell lone surrogates, which no output can print
            json.dumps(raw, ensure_ascii=False).encode("utf-8")
        except (UnicodeEncodeError, RecursionError, ValueError):
            raise BadModelFile(f"{where}: holds text that is not valid UTF-8") from None
        missing = [k for k in (*_INT_FIELDS, "rope_theta", "norm_eps", "tied_embeddings") if k not in raw]
        if missing:
            raise BadModelFile(f"{where}: missing field(s) {', '.join(missing)}")
        vals: dict = {}
        for k in _INT_FIELDS:
            v = raw[k]
            if isinstance(v, bool) or not isinstance(v, int) or v <= 0:
                raise BadModelFile(f"{where}: {k} must be a positive integer, got {v!r:.40}")
            vals[k] = v
        for k in ("rope_theta", "norm_eps"):
            v = raw[k]
            try:
                ok = not isinstance(v, bool) and isinstance(v, (int, float)) and math.isfinite(float(v)) and v > 0
            except OverflowError:  # an integer too large for a float
                ok = False
            if not ok:
                raise BadModelFile(f"{where}: {k} must be a positive number, got {v!r:.40}")
            vals[k] = float(v)
        if not vals["norm_eps"] <= FLOAT32_MAX:  # the model computes in float32, where it would be infinite
            raise BadModelFile(f"{where}: norm_eps {vals['norm_eps']:g} does not fit in float32 (at most {FLOAT32_MAX:.6g})")
        if not isinstance(raw["tied_embeddings"], bool):
            raise BadModelFile(f"{where}: tied_embeddings must be true or false")
        vals["tied_embeddings"] = raw["tied_embeddings"]
        fmt = raw.get("format", FORMAT_TAG)
        if not isinstance(fmt, str) or not fmt.startswith("moerun/"):
            raise BadModelFile(f"{where}: unknown format tag {fmt!r} (expected {FORMAT_TAG!r})")
        if vals["n_heads"] % vals["n_kv_heads"]:
            raise BadModelFile(f"{where}: n_heads ({vals['n_heads']}) must be a multiple of n_kv_heads ({vals['n_kv_heads']})")
        if vals["head_dim"] % 2:
            raise BadModelFile(f"{where}: head_dim must be even for rotary embeddings, got {vals['head_dim']}")
        d_shared = raw.get("d_shared", 0)
        if isinstance(d_shared, bool) or not isinstance(d_shared, int) or d_shared < 0:
            raise BadModelFile(f"{where}: d_shared must be a whole number, 0 for no shared expert, got {d_shared!r:.40}")
        norm_topk = raw.get("norm_topk", True)
        if not isinstance(norm_topk, bool):
            raise BadModelFile(f"{where}: norm_topk must be true (renormalise the chosen weights) or false, got {norm_topk!r:.40}")
        implied = vals["n_layers"] * (7 + 3 * vals["n_experts"] + (3 if d_shared else 0))
        if implied > MAX_TENSORS:  # refuse before anything enumerates them (a 200-byte config could ask for billions)
            raise BadModelFile(
                f"{where}: n_layers {vals['n_layers']} x n_experts {vals['n_experts']} implies {implied:,} tensors, "
                f"more than any plausible model (limit {MAX_TENSORS:,})"
            )
        if vals["top_k"] > vals["n_experts"]:
            raise BadModelFile(f"{where}: top_k ({vals['top_k']}) exceeds n_experts ({vals['n_experts']})")
        bos = raw.get("bos_token_id")
        if bos is not None and (isinstance(bos, bool) or not isinstance(bos, int) or not 0 <= bos < vals["vocab_size"]):
            raise BadModelFile(f"{where}: bos_token_id must be a token id below vocab_size, got {bos!r}")
        dtype = raw.get("dtype", "F32")
        name = raw.get("name", "")
        known = {*_INT_FIELDS, "rope_theta", "norm_eps", "tied_embeddings", "format", "name", "bos_token_id", "dtype",
                 "d_shared", "norm_topk"}
        extra = {k: v for k, v in raw.items() if k not in known}
        return cls(**vals, format=fmt, name=str(name), bos_token_id=bos, dtype=str(dtype), d_shared=d_shared,
                   norm_topk=norm_topk, extra=extra)

    @classmethod
    def load(cls, model_dir: Path) -> ModelConfig:
        path = Path(model_dir) / "config.json"
        data = read_user_file(path, BadModelFile, "config file", limit=CONFIG_LIMIT,
                              missing=f"{path}: missing (every model directory needs a config.json)")
        try:
            raw = json.loads(data.decode("utf-8"))
        except ValueError as e:  # JSONDecodeError, UnicodeDecodeError, integers past Python's digit limit
            raise BadModelFile(f"{path}: not valid JSON ({str(e).splitlines()[0][:160]})") from None
        except RecursionError:
            raise BadModelFile(f"{path}: not valid JSON (nested too deeply)") from None
        return cls.from_dict(raw, where=str(path))

    # Expected dense tensors and their shapes (docs/design/architecture.md, model spec).
    def dense_shapes(self) -> dict[str, tuple[int, ...]]:
        d = self.d_model
        shapes: dict[str, tuple[int, ...]] = {"embed": (self.vocab_size, d), "final_norm": (d,)}
        if not self.tied_embeddings:
            shapes["lm_head"] = (d, self.vocab_size)
        for layer in range(self.n_layers):
            p = f"layers.{layer}."
            shapes[p + "attn_norm"] = (d,)
            shapes[p + "moe_norm"] = (d,)
            shapes[p + "attn.wq"] = (d, self.q_dim)
            shapes[p + "attn.wk"] = (d, self.kv_dim)
            shapes[p + "attn.wv"] = (d, self.kv_dim)
            shapes[p + "attn.wo"] = (self.q_dim, d)
            shapes[p + "router"] = (d, self.n_experts)
            if self.d_shared:  # the shared expert is dense: always resident, part of the fixed budget
                for part, shape in self.shared_shapes().items():
                    shapes[p + "shared." + part] = shape
        return shapes

    def expert_shapes(self) -> dict[str, tuple[int, int]]:
        """Shapes of one expert's matrices, keyed by the suffix after ``experts.{e}.``."""
        return _swiglu_shapes(self.d_model, self.d_expert)

    def shared_shapes(self) -> dict[str, tuple[int, int]]:
        """Shapes of the shared expert's matrices, keyed by the suffix after ``shared.`` (empty when d_shared is 0)."""
        return _swiglu_shapes(self.d_model, self.d_shared) if self.d_shared else {}


def _swiglu_shapes(d_model: int, width: int) -> dict[str, tuple[int, int]]:
    return {"w_gate": (d_model, width), "w_up": (d_model, width), "w_down": (width, d_model)}


def expert_tensor_name(layer: int, expert: int, part: str) -> str:
    return f"layers.{layer}.experts.{expert}.{part}"
