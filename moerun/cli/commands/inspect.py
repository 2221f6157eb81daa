"""moerun inspect: what is in a model directory, where each byte lives, and (--check) digests."""

from __future__ import annotations

import sys

from moerun.cli import main as cli
from moerun.cli.report import emit_json, table
from moerun.errors import BadModelFile
from moerun.files.codec import packed_dense_tensors
from moerun.files.fileio import read_user_file
from moerun.files.modelfile import digest, metadata_digest_problems, recorded_digests
from moerun.files.store import ModelStore
from moerun.model.config import RANDOM_NOTE
from moerun.model.tokenizer import Tokenizer
from moerun.model.transformer import KVCache
from moerun.runtime.budget import minimum_cap, scratch_bytes
from moerun.runtime.engine import default_model_dir
from moerun.units import fmt_bytes

HELP = "show a model's config, tensors, expert sizes and file layout; checks every file of the directory; --check verifies digests"


def add_arguments(p) -> None:
    cli.add_model(p)
    p.add_argument("--all", action="store_true", help="list every tensor, experts included")
    p.add_argument("--check", action="store_true", help="verify every tensor against the digests recorded in the file")
    cli.add_json(p)


def check_digests(store: ModelStore) -> tuple[list[str], int]:
    """Names of tensors whose bytes differ from the recorded digest, and how many were checked."""
    want = recorded_digests(store.header)
    if want is None:
        return [], 0
    bad = []
    for name in store.header.tensors:
        expected = want.get(name)
        got = digest(store.tensor_bytes(name))
        if expected != got:
            bad.append(name)
    missing = [n for n in want if n not in store.header.tensors]
    return bad + missing + metadata_digest_problems(store.header), len(store.header.tensors)


def check_files(store: ModelStore) -> dict:
    """Every other file of the model directory, read the way the commands read it (BadModelFile otherwise):
    tokenizer.json as generate loads it, the texts as UTF-8, reference.npz as arrays without pickles; and the
    quantization config.json declares against the one the weights file records (ModelStore.open does that)."""
    import numpy as np

    c = store.config
    d = store.model_dir  # (the recorded quantization was compared when the store opened)
    files = {"config.json": "valid", "model.safetensors": "valid"}
    if (d / "tokenizer.json").exists() or (d / "tokenizer.json").is_symlink():
        tok = Tokenizer.load(d, c.vocab_size, c.bos_token_id)
        files["tokenizer.json"] = f"valid ({tok.vocab_size} tokens)"
    else:  # the weights are usable (moerun.load(..., tokenizer=False)); the text commands are not
        files["tokenizer.json"] = "absent: generate, score, record and verify need it"
    for name in ("heldout.txt", "CARD.md"):
        if (d / name).exists() or (d / name).is_symlink():
            data = read_user_file(d / name, BadModelFile, "text file")
            try:
                data.decode("utf-8")
            except UnicodeDecodeError as e:
                raise BadModelFile(f"{d / name}: not UTF-8 text (bad byte at offset {e.start})") from None
            files[name] = "valid UTF-8 text"
    ref = d / "reference.npz"
    if ref.exists() or ref.is_symlink():
        import io
        import zipfile

        data = read_user_file(ref, BadModelFile, "reference file")
        try:
            with np.load(io.BytesIO(data), allow_pickle=False) as z:
                for key in z.files:
                    z[key]
        except (ValueError, OSError, EOFError, zipfile.BadZipFile, NotImplementedError, RuntimeError) as e:
            first = str(e).splitlines()[0][:120] if str(e) else type(e).__name__
            raise BadModelFile(f"{ref}: not a readable .npz of arrays ({first})") from None
        files["reference.npz"] = "valid arrays"
    for other in sorted(x.name for x in d.iterdir() if x.name not in files):
        files[other] = "not read by moerun"
    return files


def describe(store: ModelStore, files: dict) -> dict:
    """Where the model's bytes are, in the file and in memory: the document --json prints and the text is made of.

    ``files``: what ``check_files`` found.
    Quantized attention is stored under its blob's name; the shared expert is dense (inside the dense figures).
    """
    c = store.config
    h = store.header
    packed = packed_dense_tensors(c)
    dense_names = [packed.get(n, n) for n in c.dense_shapes()]
    dense_file = sum(h.tensors[n].nbytes for n in dense_names)
    expert_file = store.expert_total_nbytes
    flat = [r for row in store.ranges for r in row]
    first = min(r.start for r in flat)
    end = max(r.start + r.nbytes for r in flat)
    dense_end = max(h.tensors[n].end for n in dense_names)
    shared_names = [f"layers.{layer}.shared.{part}" for layer in range(c.n_layers) for part in c.shared_shapes()]
    # moerun's writer puts dense tensors first, then experts in layer, expert order;
    # other writers (the safetensors library sorts by name) interleave them
    in_order = dense_end <= first and all(a.start + a.nbytes <= b.start for a, b in zip(flat, flat[1:]))
    scratch_one = store.codec.scratch_bytes()
    doc = {
        "model_dir": str(store.model_dir),
        "config": c.to_json(),
        "file_bytes": h.file_size,
        "header_bytes": h.data_start,
        "dense_file_bytes": dense_file,
        "dense_memory_bytes": store.dense_nbytes,
        "d_shared": c.d_shared,
        "norm_topk": c.norm_topk,
        "shared_expert_file_bytes": sum(h.tensors[n].nbytes for n in shared_names),
        "shared_expert_memory_bytes": sum(store.dense[n].nbytes for n in shared_names),
        "expert_bytes": store.expert_nbytes,
        "expert_storage": store.codec.name,
        "experts_total_bytes": expert_file,
        "expert_share": expert_file / (expert_file + dense_file),
        "kv_cache_bytes": KVCache.nbytes_for(c),
        "scratch_bytes": scratch_bytes(c, scratch_one),
        "min_cap_even_bytes": minimum_cap(c, store.dense_nbytes, store.expert_nbytes, "even", scratch_one),
        "min_cap_shared_bytes": minimum_cap(c, store.dense_nbytes, store.expert_nbytes, "shared", scratch_one),
        "experts_region": [first, end],
        "experts_in_layer_order": in_order,
        "synthetic": bool(c.extra.get("synthetic")),
        "files": files,
        "tensors": [
            {"name": t.name, "dtype": t.dtype, "shape": list(t.shape), "offset": t.start, "bytes": t.nbytes}
            for t in sorted(h.tensors.values(), key=lambda t: t.start)
        ],
    }
    if c.extra.get("synthetic"):
        doc["note"] = RANDOM_NOTE
    return doc


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
        f"{c.n_layers} layers, d_model {c.d_model}, {c.n_heads} heads ({c.n_kv_heads} KV) of {c.head_dim}, "
        f"{c.n_experts} experts top-{c.top_k}, d_expert {c.d_expert}, vocab {c.vocab_size}, context {c.max_seq_len}\n"
    )
    out.write(
        (f"shared expert d_shared {c.d_shared} (dense, always resident)" if c.d_shared else "no shared expert (d_shared 0)")
        + f"; norm_topk {str(c.norm_topk).lower()} (chosen weights "
        + ("renormalised to sum to 1)\n" if c.norm_topk else "are the router probabilities as they are)\n")
    )
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


def run(args) -> int:
    store = ModelStore.open(args.model or default_model_dir())
    try:
        c = store.config
        doc = describe(store, check_files(store))
        if args.check:
            bad, checked = check_digests(store)
            doc["check"] = {"checked": checked, "recorded": checked > 0, "differ": bad}
    finally:
        store.close()
    if args.json:
        emit_json(doc)
    else:
        _write_text(doc, c, c.name or store.model_dir.name, args.all, sys.stdout)
    if args.check and (doc["check"]["differ"] or not doc["check"]["recorded"]):
        return 1
    return 0
