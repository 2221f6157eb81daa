"""moerun synth: write a model directory of any size with random weights (routing meaningless)."""

from __future__ import annotations

import shlex
import sys

from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, table
from moerun.errors import BadModelFile, BadOption
from moerun.makers.synthetic import BITS, RANDOM_NOTE, synth_config, synthesize
from moerun.model.config import ModelConfig
from moerun.units import fmt_bytes

HELP = (
    "write a model directory with random weights at any size (F32, or F16 with --bits 16) for page-in, "
    "budget and planning studies; its routing is meaningless"
)

EPILOG = (
    "Weights are random, so the model's text is noise and its routing is meaningless: use it to study "
    "sizes, page-in and budgets, never eviction or prefetch policies. Low-bit quantized experts are not "
    "written here: run 'moerun quantize --model OUT NEW_OUT' on the result. The directory appears under "
    "OUT only when complete; a failed or interrupted run leaves nothing there, and the next run to the "
    "same OUT removes what a killed one left beside it."
)


def add_arguments(p) -> None:
    p.epilog = EPILOG
    p.add_argument("out", metavar="OUT", help="new model directory to create (absent or empty; its parent must exist)")
    cli.add_force_dir(p)
    g = p.add_argument_group("shape (required)")
    g.add_argument("--layers", type=int, required=True, metavar="N", help="transformer layers")
    g.add_argument("--experts", type=int, required=True, metavar="N", help="experts per layer")
    g.add_argument("--d-model", type=int, required=True, metavar="N", help="width of the residual stream")
    g.add_argument("--d-expert", type=int, required=True, metavar="N", help="hidden width of one expert")
    o = p.add_argument_group("shape (optional)")
    o.add_argument("--top-k", type=int, default=2, metavar="K", help="experts chosen per token (default 2)")
    o.add_argument("--heads", type=int, metavar="N", help="attention heads (default: d_model / 64, at least 1)")
    o.add_argument("--kv-heads", type=int, metavar="N", help="key/value heads (default: as many as --heads)")
    o.add_argument("--head-dim", type=int, metavar="N", help="width of one head (default: d_model / heads)")
    o.add_argument("--vocab", type=int, default=257, metavar="N", help="vocabulary size, at least 257 for the byte tokenizer (default 257)")
    o.add_argument("--context", type=int, default=256, metavar="N", help="longest sequence, in tokens (default 256)")
    o.add_argument("--untied", action="store_true", help="a separate lm_head instead of reusing the embedding")
    o.add_argument("--d-shared", type=int, default=0, metavar="N",
                   help="hidden width of an always-on shared expert in every layer (default 0: none)")
    o.add_argument("--no-renorm", action="store_true",
                   help="weigh the chosen experts by their router probabilities as they are, not renormalised to sum to 1")
    p.add_argument("--bits", type=int, default=32, choices=sorted(BITS), help="16 = F16 weights, 32 = F32 (default); "
                   "for low-bit experts run 'moerun quantize' on the result")
    cli.add_seed(p, "random seed")
    p.add_argument("--name", metavar="TEXT", help="model name in config.json (default: the directory name)")
    cli.add_json(p)


def config_from_args(args) -> ModelConfig:
    def positive(value, option: str) -> int:
        if value is None or value < 1:
            raise BadOption(f"{option} must be a positive whole number, got {value}")
        return value

    layers = positive(args.layers, "--layers")
    experts = positive(args.experts, "--experts")
    d_model = positive(args.d_model, "--d-model")
    d_expert = positive(args.d_expert, "--d-expert")
    top_k = positive(args.top_k, "--top-k")
    if top_k > experts:
        raise BadOption(f"--top-k {top_k} is more than --experts {experts}")
    heads = positive(args.heads, "--heads") if args.heads is not None else max(1, d_model // 64)
    if args.head_dim is not None:
        head_dim = positive(args.head_dim, "--head-dim")
    else:
        if d_model % heads:
            raise BadOption(f"--d-model {d_model} is not a multiple of {heads} heads; give --head-dim")
        head_dim = d_model // heads
    if head_dim % 2:
        raise BadOption(f"head width {head_dim} must be even (rotary embeddings); give --heads or --head-dim")
    kv_heads = positive(args.kv_heads, "--kv-heads") if args.kv_heads is not None else heads
    if heads % kv_heads:
        raise BadOption(f"--heads {heads} must be a multiple of --kv-heads {kv_heads}")
    vocab = positive(args.vocab, "--vocab")
    if vocab < 257:
        raise BadOption(f"--vocab must be at least 257 (the byte tokenizer's 256 bytes and <doc>), got {vocab}")
    context = positive(args.context, "--context")
    if args.d_shared < 0:
        raise BadOption(f"--d-shared must be 0 (no shared expert) or a positive whole number, got {args.d_shared}")
    name = args.name if args.name is not None else args.out.rstrip("/").split("/")[-1] or "synthetic"
    try:
        return synth_config(
            layers=layers, experts=experts, top_k=top_k, d_model=d_model, d_expert=d_expert, n_heads=heads,
            n_kv_heads=kv_heads, head_dim=head_dim, max_seq_len=context, vocab_size=vocab, name=name,
            dtype=BITS[args.bits], tied_embeddings=not args.untied, seed=args.seed,
            d_shared=args.d_shared, norm_topk=not args.no_renorm,
        )
    except BadModelFile as e:  # the config's own checks, phrased for options
        raise BadOption(str(e).replace("config.json: ", "")) from None


def command_line(args, c: ModelConfig) -> str:
    """The command that rebuilds this model, every shape option spelled out (for CARD.md)."""
    parts = [
        "moerun", "synth", args.out, "--layers", c.n_layers, "--experts", c.n_experts, "--d-model", c.d_model,
        "--d-expert", c.d_expert, "--top-k", c.top_k, "--heads", c.n_heads, "--kv-heads", c.n_kv_heads,
        "--head-dim", c.head_dim, "--vocab", c.vocab_size, "--context", c.max_seq_len, "--bits", args.bits,
        "--seed", args.seed, "--name", c.name,
    ]
    if not c.tied_embeddings:
        parts.append("--untied")
    if c.d_shared:
        parts += ["--d-shared", c.d_shared]
    if not c.norm_topk:
        parts.append("--no-renorm")
    return " ".join(shlex.quote(str(p)) for p in parts)


def run(args) -> int:
    config = config_from_args(args)
    progress = Progress(f"synth {args.out}")
    megabyte = float(1 << 20)

    def report(done: int, total: int) -> None:
        progress.total = int(total / megabyte)
        progress.update(int(done / megabyte), "MiB written")

    command = command_line(args, config)
    try:
        doc = synthesize(args.out, config, seed=args.seed, progress=report, command=command, force=args.force)
    finally:
        progress.close()
    if args.json:
        emit_json(doc)
        return 0
    c = config
    out = sys.stdout
    out.write(f"wrote {doc['model_dir']} in {doc['seconds']:.1f} s\n")
    out.write(f"note: {RANDOM_NOTE}; use it for sizes, page-in and budgets, not for policies\n")
    out.write(
        f"{c.n_layers} layers, d_model {c.d_model}, {c.n_heads} heads ({c.n_kv_heads} KV) of {c.head_dim}, "
        f"{c.n_experts} experts top-{c.top_k}, d_expert {c.d_expert}, vocab {c.vocab_size}, context {c.max_seq_len}, {c.dtype}\n"
    )
    if c.d_shared or not c.norm_topk:
        out.write(f"shared expert d_shared {c.d_shared}; norm_topk {str(c.norm_topk).lower()}\n")
    share = doc["experts_total_bytes"] / doc["file_bytes"]
    rows = [
        ["weights file", fmt_bytes(doc["file_bytes"])],
        [f"one expert ({c.dtype})", f"{doc['expert_bytes']:,} B"],
        [f"all experts ({c.n_layers} x {c.n_experts})", f"{fmt_bytes(doc['experts_total_bytes'])} ({100 * share:.1f}% of the file)"],
    ]
    out.write(table(["", "size"], rows) + "\n")
    return 0
