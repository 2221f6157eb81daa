"""moerun synth: write a model directory of any size with random weights (routing meaningless)."""

from __future__ import annotations

import sys

from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, table, written
from moerun.errors import BadOption
from moerun.files.ckpt_config import SUPPORTED_TYPES
from moerun.makers.jobs import synth, synth_open
from moerun.makers.synthetic import BITS, RANDOM_NOTE
from moerun.units import fmt_bytes, parse_size

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
    o.add_argument("--vocab", type=int, metavar="N",
                   help="vocabulary size, at least 257 for the byte tokenizer (default 257; an open checkpoint: at least and by default 258)")
    o.add_argument("--context", type=int, metavar="N", help="longest sequence, in tokens (default 256; an open checkpoint: 4096)")
    o.add_argument("--untied", action="store_true", help="a separate lm_head instead of reusing the embedding")
    o.add_argument("--d-shared", type=int, default=0, metavar="N",
                   help="hidden width of an always-on shared expert in every layer (default 0: none)")
    o.add_argument("--no-renorm", action="store_true",
                   help="weigh the chosen experts by their router probabilities as they are, not renormalised to sum to 1")
    p.add_argument("--bits", type=int, choices=sorted(BITS), help="16 = F16 weights (BF16 in an open checkpoint), 32 = F32; "
                   "default 32 (16 for an open checkpoint); for low-bit experts run 'moerun quantize' on the result")
    k = p.add_argument_group("an open checkpoint instead (config.json with model_type, safetensors shards, tokenizer.json)")
    k.add_argument("--open-type", choices=SUPPORTED_TYPES, metavar="TYPE",
                   help=f"write an open checkpoint of this model_type ({', '.join(SUPPORTED_TYPES)}) in place of moerun's "
                        "format; its lm_head is untied and its chosen weights not renormalised unless asked")
    k.add_argument("--dense-layers", metavar="LIST", help="qwen types: layers with a dense MLP instead of experts, e.g. 0,3")
    k.add_argument("--dense-width", type=int, default=0, metavar="N", help="hidden width of those dense MLPs")
    k.add_argument("--shard-size", metavar="SIZE", default="4GiB",
                   help="most weight bytes per safetensors file (default 4GiB); an expert may straddle two files")
    k.add_argument("--tied", action="store_true", help="an open checkpoint whose lm_head is its embedding table")
    k.add_argument("--renorm", action="store_true", help="an open checkpoint whose chosen weights are renormalised (norm_topk_prob)")
    cli.add_seed(p, "random seed")
    p.add_argument("--name", metavar="TEXT", help="model name in config.json (default: the directory name)")
    cli.add_json(p)


def run(args) -> int:
    progress = Progress(f"synth {args.out}")
    megabyte = float(1 << 20)

    def report(done: int, total: int) -> None:
        progress.total = int(total / megabyte)
        progress.update(int(done / megabyte), "MiB written")

    if args.open_type:
        return _run_open(args, report, progress)
    if args.dense_layers or args.dense_width or args.tied or args.renorm or args.shard_size != "4GiB":
        progress.close()
        raise BadOption("--dense-layers, --dense-width, --tied, --renorm and --shard-size describe an open checkpoint: "
                        "give --open-type too")
    try:
        result = synth(args.out, layers=args.layers, experts=args.experts, d_model=args.d_model, d_expert=args.d_expert,
                       top_k=args.top_k, heads=args.heads, kv_heads=args.kv_heads, head_dim=args.head_dim,
                       vocab=257 if args.vocab is None else args.vocab, context=256 if args.context is None else args.context,
                       untied=args.untied, d_shared=args.d_shared, renorm=not args.no_renorm,
                       bits=32 if args.bits is None else args.bits, seed=args.seed, name=args.name, force=args.force,
                       progress=report)
    finally:
        progress.close()
    if args.json:
        emit_json(result.to_json())
        written("synth", "model directory", result.model_dir, f"{result.seconds:.1f} s")
        return 0
    c = result.config
    out = sys.stdout
    out.write(f"note: {RANDOM_NOTE}; use it for sizes, page-in and budgets, not for policies\n")
    out.write(
        f"{c.n_layers} layers, d_model {c.d_model}, {c.n_heads} heads ({c.n_kv_heads} KV) of {c.head_dim}, "
        f"{c.n_experts} experts top-{c.top_k}, d_expert {c.d_expert}, vocab {c.vocab_size}, context {c.max_seq_len}, {c.dtype}\n"
    )
    if c.d_shared or not c.norm_topk:
        out.write(f"shared expert d_shared {c.d_shared}; norm_topk {str(c.norm_topk).lower()}\n")
    share = result.experts_total_bytes / result.file_bytes
    rows = [
        ["weights file", fmt_bytes(result.file_bytes)],
        [f"one expert ({c.dtype})", f"{result.expert_bytes:,} B"],
        [f"all experts ({c.n_layers} x {c.n_experts})", f"{fmt_bytes(result.experts_total_bytes)} ({100 * share:.1f}% of the file)"],
    ]
    out.write(table(["", "size"], rows) + "\n")
    written("synth", "model directory", result.model_dir, f"{result.seconds:.1f} s")
    return 0


def _run_open(args, report, progress) -> int:
    """``--open-type``: an open checkpoint of random weights."""
    try:
        if args.untied or args.no_renorm or args.name:
            raise BadOption("--untied, --no-renorm and --name describe moerun's format; an open checkpoint is untied and "
                            "not renormalised unless --tied or --renorm says otherwise")
        dense = tuple(parse_int_list(args.dense_layers, "--dense-layers")) if args.dense_layers else ()
        result = synth_open(
            args.out, model_type=args.open_type, layers=args.layers, experts=args.experts, d_model=args.d_model,
            d_expert=args.d_expert, top_k=args.top_k, heads=args.heads, kv_heads=args.kv_heads, head_dim=args.head_dim,
            vocab=258 if args.vocab is None else args.vocab, context=4096 if args.context is None else args.context,
            untied=not args.tied, d_shared=args.d_shared, renorm=args.renorm, bits=16 if args.bits is None else args.bits,
            dense_layers=dense, dense_width=args.dense_width, shard_bytes=parse_size(args.shard_size, "--shard-size"),
            seed=args.seed, force=args.force, progress=report,
        )
    finally:
        progress.close()
    if not args.json:
        out = sys.stdout
        out.write(f"an open {result.model_type} checkpoint, {result.dtype}, {fmt_bytes(result.file_bytes)} in "
                  f"{len(result.files)} file(s)\n")
        out.write(f"note: {RANDOM_NOTE}; use it for sizes, page-in and budgets, not for policies\n")
    else:
        emit_json(result.to_json())
    written("synth", "open checkpoint", result.model_dir, f"{result.seconds:.1f} s")
    return 0


def parse_int_list(text: str, option: str) -> list[int]:
    try:
        return [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise BadOption(f"{option} takes whole numbers separated by commas, got {text!r:.60}") from None
