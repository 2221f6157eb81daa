"""moerun inspect: what is in a model directory, where each byte lives, and (--check) digests."""

from __future__ import annotations

import sys
from pathlib import Path

from moerun.checks.contents import check_digests, check_files, describe  # noqa: F401 (their names here before)
from moerun.checks.jobs import inspect
from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, table
from moerun.units import fmt_bytes

HELP = "show a model's config, tensors, expert sizes and file layout; checks every file of the directory; --check verifies digests"


def add_arguments(p) -> None:
    cli.add_model(p)
    p.add_argument("--all", action="store_true", help="list every tensor, experts included")
    p.add_argument("--check", action="store_true", help="verify every tensor against the digests recorded in the file")
    cli.add_json(p)


def _size_rows(doc: dict, c) -> list[list[str]]:
    """The size table of the text output, from the document (so text and --json cannot disagree)."""
    shared = doc["shared_expert_memory_bytes"], doc["shared_expert_file_bytes"]
    return [
        ["file", fmt_bytes(doc["file_bytes"])],
        ["header", fmt_bytes(doc["header_bytes"])],
        ["dense tensors (file)", fmt_bytes(doc["dense_file_bytes"])],
        ["dense weights (memory, float32)", fmt_bytes(doc["dense_memory_bytes"])],
        *([[f"  of which shared expert ({c.n_layers} x 1)", f"{fmt_bytes(shared[0])} ({fmt_bytes(shared[1])} in the file)"]]
          if c.d_shared else []),
        [f"one expert ({doc['expert_storage']})", f"{doc['expert_bytes']:,} B"],
        [f"all experts ({c.n_layers} x {c.n_experts})",
         f"{fmt_bytes(doc['experts_total_bytes'])} ({100 * doc['expert_share']:.1f}% of weights)"],
        ["KV cache (full context)", fmt_bytes(doc["kv_cache_bytes"])],
        ["scratch", fmt_bytes(doc["scratch_bytes"])],
        ["smallest cap, per-layer pools", f"{fmt_bytes(doc['min_cap_even_bytes'])} ({doc['min_cap_even_bytes']} B)"],
        ["smallest cap, shared pool", f"{fmt_bytes(doc['min_cap_shared_bytes'])} ({doc['min_cap_shared_bytes']} B)"],
    ]


def _write_text(doc: dict, c, name: str, all_tensors: bool, out) -> None:
    """The text output: the model in two lines, the size table, the files, the layout, the tensors, the check."""
    out.write(f"model {name} ({doc['model_dir']})\n")
    if doc.get("note"):
        out.write(f"note: {doc['note']}\n")
    out.write(
        (f"{c.n_blocks} layers ({c.n_layers} routed)" if c.dense_layers else f"{c.n_layers} layers")
        + f", d_model {c.d_model}, {c.n_heads} heads ({c.n_kv_heads} KV) of {c.head_dim}, "
        f"{c.n_experts} experts top-{c.top_k}, d_expert {c.d_expert}, vocab {c.vocab_size}, context {c.max_seq_len}\n"
    )
    out.write(
        (f"shared expert d_shared {c.d_shared} (dense, always resident)" if c.d_shared else "no shared expert (d_shared 0)")
        + f"; norm_topk {str(c.norm_topk).lower()} (chosen weights "
        + ("renormalised to sum to 1)\n" if c.norm_topk else "are the router probabilities as they are)\n")
    )
    if c.arch:  # quantized from an open checkpoint: the parts of its architecture
        dense = f"{len(c.dense_layers)} dense layer(s) (layers {', '.join(map(str, c.dense_layers))}, width {c.d_dense})" if c.dense_layers else "no dense layers"
        parts = [f"from a {c.arch} checkpoint: {dense}", f"q/k norm {c.qk_norm}",
                 "q/k/v biases" if c.qkv_bias else "no q/k/v biases",
                 *([f"q/k/v clipped to {c.clip_qkv:g}"] if c.clip_qkv is not None else []),
                 *(["the shared expert gated"] if c.shared_gate else []),
                 f"bos {c.bos_token_id if c.bos_token_id is not None else 'none'}, eos {list(c.eos_token_ids) or 'none'}"]
        out.write("; ".join(parts) + "\n")
    out.write(table(["", "size"], _size_rows(doc, c)) + "\n\n")
    out.write("files: " + "; ".join(f"{k} {v}" for k, v in doc["files"].items()) + "\n")
    first, end = doc["experts_region"]
    if doc["experts_in_layer_order"]:
        out.write(f"layout: header 0..{doc['header_bytes']}, dense tensors, then experts {first}..{end} "
                  f"in layer, expert order, each one contiguous range\n")
    else:
        out.write(f"layout: header 0..{doc['header_bytes']}, then dense tensors and experts interleaved in the writer's "
                  f"order (experts within {first}..{end}), each expert one contiguous range\n")
    trows = []
    for t in doc["tensors"]:
        if not all_tensors and ".experts." in t["name"] and not t["name"].startswith("layers.0.experts.0."):
            continue
        trows.append([t["name"], t["dtype"], "x".join(map(str, t["shape"])), f"{t['offset']:,}", f"{t['bytes']:,}"])
    out.write(table(["tensor", "dtype", "shape", "offset", "bytes"], trows, "lllrr") + "\n")
    if not all_tensors:
        out.write("(one expert shown; --all lists every tensor)\n")
    chk = doc.get("check")
    if chk is not None:
        if not chk["recorded"]:
            out.write("check: the file records no digests; nothing to verify\n")
        elif chk["differ"]:
            bad = chk["differ"]
            out.write(f"check: {len(bad)} tensor(s) differ from their recorded digest: {', '.join(bad[:10])}\n")
        else:
            out.write(f"check: all {chk['checked']} tensors match their recorded digests\n")


def _write_checkpoint_text(doc: dict, c, out) -> None:
    """An open checkpoint: its architecture, shards, expert layout and spans, and the bytes stored and held."""
    ck = doc["checkpoint"]
    a = ck["config"]
    out.write(f"open checkpoint {Path(doc['model_dir']).name} ({doc['model_dir']}), model_type {a['model_type']}\n")
    dense = f", {len(c.dense_layers)} dense (layers {', '.join(map(str, c.dense_layers))})" if c.dense_layers else ""
    out.write(
        f"{c.n_blocks} layers: {c.n_layers} routed{dense}; hidden {c.d_model}, {c.n_heads} heads ({c.n_kv_heads} KV) of "
        f"{c.head_dim}, {c.n_experts} experts top-{c.top_k} of width {c.d_expert}, vocab {c.vocab_size}\n"
    )
    parts = [f"q/k norm {c.qk_norm}", "q/k/v biases" if c.qkv_bias else "no q/k/v biases",
             f"shared expert of width {c.d_shared}, gated" if c.d_shared else "no shared expert",
             "chosen weights renormalised" if c.norm_topk else "chosen weights as the router gives them",
             f"context {c.max_seq_len} (the KV cache is sized for it)"]
    out.write("; ".join(parts) + "\n")
    out.write(f"bos {ck['bos_ids'] or 'none'}, eos {ck['eos_ids'] or 'none'}\n")
    st = ck["sizes"]
    rows = [
        ["shards", f"{len(ck['shards'])} file(s), {fmt_bytes(sum(s['bytes'] for s in ck['shards']))}"],
        ["expert layout", ", ".join(sorted({x for x in ck["layouts"] if x}))],
        [f"one expert ({doc['expert_storage']}, as stored)", f"{doc['expert_bytes']:,} B"],
        ["one expert (float32)", f"{st['expert_f32']:,} B"],
        [f"all experts ({c.n_layers} x {c.n_experts}, as stored)", fmt_bytes(doc["experts_total_bytes"])],
        ["experts straddling two files", f"{ck['experts_straddling_files']:,}"],
        ["reads per expert page-in (at most)", str(ck["reads_per_expert"])],
        ["dense weights (stored)", fmt_bytes(st["dense_stored"])],
        ["dense weights (memory, float32)", fmt_bytes(doc["dense_memory_bytes"])],
        ["embedding table (read by row, not held)" if not st["tied"] else "embedding table (tied: held)", fmt_bytes(st["embed_stored"])],
        ["KV cache (context)", fmt_bytes(doc["kv_cache_bytes"])],
        ["scratch", fmt_bytes(doc["scratch_bytes"])],
        ["smallest cap, per-layer pools", f"{fmt_bytes(doc['min_cap_even_bytes'])} ({doc['min_cap_even_bytes']} B)"],
        ["smallest cap, shared pool", f"{fmt_bytes(doc['min_cap_shared_bytes'])} ({doc['min_cap_shared_bytes']} B)"],
    ]
    out.write(table(["", "size"], rows) + "\n\n")
    out.write(table(["shard", "bytes", "tensors"], [[s["file"], f"{s['bytes']:,}", str(s["tensors"])] for s in ck["shards"]], "lrr") + "\n\n")
    fe = doc["first_expert"]
    out.write(f"expert {fe['expert']} of layer {fe['layer']}: parts, then the reads of one page-in\n")
    prow = [[p["tensor"], p["dtype"], "x".join(map(str, p["shape"])), p["file"], f"{p['offset']:,}", f"{p['bytes']:,}"] for p in fe["parts"]]
    out.write(table(["tensor", "dtype", "shape", "file", "offset", "bytes"], prow, "llllrr") + "\n")
    for r in fe["reads"]:
        out.write(f"  read {r['bytes']:,} B at {r['offset']:,} of {r['file']}\n")
    if doc.get("check") is not None:
        out.write("check: an open checkpoint records no digests; nothing to verify\n")


def run(args) -> int:
    progress = Progress("inspect --check" if args.check else "inspect")  # reading digests of a large file takes a while
    try:
        result = inspect(args.model, check=args.check)
    finally:
        progress.close()
    doc = result.to_json()
    if args.json:
        emit_json(doc)
    elif "checkpoint" in doc:
        _write_checkpoint_text(doc, result.config, sys.stdout)
    else:
        c = result.config
        _write_text(doc, c, c.name or Path(result.model_dir).name, args.all, sys.stdout)
    return 0 if result.ok else 1
