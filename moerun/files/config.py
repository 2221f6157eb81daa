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

# the open-checkpoint fields (ModelConfig) and their defaults, which a moerun model has; to_json leaves them out, and
# from_dict reads them when a config.json has them (a model quantized from an open checkpoint, moerun-packed/2)
QK_NORMS = ("none", "per_head", "full")
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
    # The optional parts of open checkpoints' architectures (moerun.files.ckpt_store); a model made by train or synth
    # has none of them; a model quantized from an open checkpoint records them in its config.json (the tensors
    # they imply are in ``dense_shapes``).  ``n_layers`` counts the layers that route to experts (all of a
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
        n_dense = len(raw["dense_layers"]) if isinstance(raw.get("dense_layers"), list) else 0
        implied = vals["n_layers"] * (7 + 3 * vals["n_experts"] + (3 if d_shared else 0)) + n_dense * 12
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
        arch = _arch_fields(raw, vals, d_shared, where)
        known = {*_INT_FIELDS, "rope_theta", "norm_eps", "tied_embeddings", "format", "name", "bos_token_id", "dtype",
                 "d_shared", "norm_topk", *_OPEN_DEFAULTS}
        extra = {k: v for k, v in raw.items() if k not in known}
        return cls(**vals, format=fmt, name=str(name), bos_token_id=bos, dtype=str(dtype), d_shared=d_shared,
                   norm_topk=norm_topk, **arch, extra=extra)

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

    # Expected dense tensors and their shapes (docs/design/architecture.md, model spec; docs/design/file-formats.md has
    # the table).  These are the moerun names of every dense tensor, the ones the Transformer takes; ``layers.{b}.``
    # numbers the stack (block b), which for a model without dense layers is the routed layer's number too.  Beyond
    # the seven of every layer, an open checkpoint's architecture adds (when its config says so): the q, k and v biases
    # fused as ``attn.bqkv`` [q_dim + 2 kv_dim]; ``attn.q_norm`` and ``attn.k_norm`` ([head_dim] per head, or
    # [q_dim] / [kv_dim] over the whole of q / k); the shared expert's gate ``shared_gate`` [d_model, 1]; and in a
    # dense layer, in place of the router, a SwiGLU MLP ``mlp.w_gate``, ``mlp.w_up`` [d_model, d_dense] and
    # ``mlp.w_down`` [d_dense, d_model].  Matrices are (in, out).
    def dense_shapes(self) -> dict[str, tuple[int, ...]]:
        d = self.d_model
        shapes: dict[str, tuple[int, ...]] = {"embed": (self.vocab_size, d), "final_norm": (d,)}
        if not self.tied_embeddings:
            shapes["lm_head"] = (d, self.vocab_size)
        dense = set(self.dense_layers)
        for block in range(self.n_blocks):
            p = f"layers.{block}."
            shapes[p + "attn_norm"] = (d,)
            shapes[p + "moe_norm"] = (d,)
            shapes[p + "attn.wq"] = (d, self.q_dim)
            shapes[p + "attn.wk"] = (d, self.kv_dim)
            shapes[p + "attn.wv"] = (d, self.kv_dim)
            shapes[p + "attn.wo"] = (self.q_dim, d)
            if self.qkv_bias:
                shapes[p + "attn.bqkv"] = (self.q_dim + 2 * self.kv_dim,)
            if self.qk_norm == "per_head":
                shapes[p + "attn.q_norm"] = (self.head_dim,)
                shapes[p + "attn.k_norm"] = (self.head_dim,)
            elif self.qk_norm == "full":
                shapes[p + "attn.q_norm"] = (self.q_dim,)
                shapes[p + "attn.k_norm"] = (self.kv_dim,)
            if block in dense:
                for part, shape in _swiglu_shapes(d, self.d_dense).items():
                    shapes[p + "mlp." + part] = shape
                continue
            shapes[p + "router"] = (d, self.n_experts)
            if self.d_shared:  # the shared expert is dense: always resident, part of the fixed budget
                for part, shape in self.shared_shapes().items():
                    shapes[p + "shared." + part] = shape
                if self.shared_gate:
                    shapes[p + "shared_gate"] = (d, 1)
        return shapes

    def expert_name(self, layer: int, expert: int, part: str) -> str:
        """The tensor name of routed layer ``layer``'s expert part in a moerun file: named by its block."""
        block = self.routed_blocks()[layer] if self.dense_layers else layer
        return expert_tensor_name(block, expert, part)

    def expert_shapes(self) -> dict[str, tuple[int, int]]:
        """Shapes of one expert's matrices, keyed by the suffix after ``experts.{e}.``."""
        return _swiglu_shapes(self.d_model, self.d_expert)

    def shared_shapes(self) -> dict[str, tuple[int, int]]:
        """Shapes of the shared expert's matrices, keyed by the suffix after ``shared.`` (empty when d_shared is 0)."""
        return _swiglu_shapes(self.d_model, self.d_shared) if self.d_shared else {}


def _arch_fields(raw: dict, vals: dict, d_shared: int, where: str) -> dict:
    """The open-checkpoint fields of a config.json that has them, checked (their defaults for those it lacks)."""
    out: dict = {}
    arch = raw.get("arch", "")
    if not isinstance(arch, str):
        raise BadModelFile(f"{where}: arch must be text (the model_type of the checkpoint it came from), got {arch!r:.40}")
    out["arch"] = arch
    n_layers = vals["n_layers"]
    dl = raw.get("dense_layers", [])
    if not isinstance(dl, list) or any(isinstance(b, bool) or not isinstance(b, int) for b in dl):
        raise BadModelFile(f"{where}: dense_layers must be a list of layer numbers, got {dl!r:.60}")
    n_blocks = n_layers + len(dl)
    if len(set(dl)) != len(dl) or any(not 0 <= b < n_blocks for b in dl) or dl != sorted(dl):
        raise BadModelFile(f"{where}: dense_layers must be distinct, increasing layer numbers below {n_blocks}, got {dl!r:.60}")
    out["dense_layers"] = tuple(dl)
    d_dense = raw.get("d_dense", 0)
    if isinstance(d_dense, bool) or not isinstance(d_dense, int) or d_dense < 0 or (dl and not d_dense):
        raise BadModelFile(f"{where}: d_dense must be a positive whole number when there are dense_layers, got {d_dense!r:.40}")
    out["d_dense"] = d_dense
    qk = raw.get("qk_norm", "none")
    if qk not in QK_NORMS:
        raise BadModelFile(f"{where}: qk_norm must be one of {', '.join(QK_NORMS)}, got {qk!r:.40}")
    out["qk_norm"] = qk
    for key in ("qkv_bias", "shared_gate"):
        v = raw.get(key, False)
        if not isinstance(v, bool):
            raise BadModelFile(f"{where}: {key} must be true or false, got {v!r:.40}")
        out[key] = v
    if out["shared_gate"] and not d_shared:
        raise BadModelFile(f"{where}: shared_gate is true but there is no shared expert (d_shared is 0)")
    clip = raw.get("clip_qkv")
    try:
        ok = clip is None or (not isinstance(clip, bool) and isinstance(clip, (int, float)) and math.isfinite(float(clip))
                              and 0 < clip <= FLOAT32_MAX)
    except OverflowError:
        ok = False
    if not ok:
        raise BadModelFile(f"{where}: clip_qkv must be null or a positive number, got {clip!r:.40}")
    out["clip_qkv"] = None if clip is None else float(clip)
    eos = raw.get("eos_token_ids", [])
    if not isinstance(eos, list) or any(isinstance(t, bool) or not isinstance(t, int) or not 0 <= t < vals["vocab_size"]
                                        for t in eos):
        raise BadModelFile(f"{where}: eos_token_ids must be a list of token ids below vocab_size, got {eos!r:.60}")
    out["eos_token_ids"] = tuple(eos)
    return out


def _swiglu_shapes(d_model: int, width: int) -> dict[str, tuple[int, int]]:
    return {"w_gate": (d_model, width), "w_up": (d_model, width), "w_down": (width, d_model)}


def expert_tensor_name(layer: int, expert: int, part: str) -> str:
    return f"layers.{layer}.experts.{expert}.{part}"
