"""What a model directory holds and where each byte lives: the figures ``moerun.inspect`` reports.

``check_files`` reads every file of the directory the way the commands read it; ``describe`` gives the
sizes, the layout of the weights file and the smallest caps; ``check_digests`` compares every tensor with
the digest the file records.
"""

from __future__ import annotations

from moerun.errors import BadModelFile
from moerun.files.codec import packed_dense_tensors
from moerun.files.config import RANDOM_NOTE
from moerun.files.fileio import read_user_file
from moerun.files.modelfile import digest, metadata_digest_problems, recorded_digests
from moerun.files.store import ModelStore
from moerun.model.tokenizer import Tokenizer
from moerun.model.transformer import KVCache
from moerun.runtime.budget import minimum_cap, scratch_bytes


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
    shared_names = [f"layers.{b}.shared.{part}" for b in c.routed_blocks() for part in c.shared_shapes()]
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
