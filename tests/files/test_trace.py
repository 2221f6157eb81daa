"""moerun.files.trace: the .npz format round-trips, the documented writer example works, and bad files are refused clearly."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest

from moerun.cli import main as cli
from moerun.errors import BadTrace
from moerun.files.trace import Recorder, Trace, read_trace, write_trace

DOCS = Path(__file__).resolve().parents[2] / "docs" / "guide" / "traces.md"


def _save(path: Path, **arrays) -> Path:
    if "meta" in arrays and isinstance(arrays["meta"], dict):
        arrays["meta"] = np.array(json.dumps(arrays["meta"]))
    np.savez(path, **arrays)
    return path


def _good_experts(tokens: int = 6, layers: int = 2, k: int = 2) -> np.ndarray:
    rng = np.random.default_rng(0)
    return np.sort(np.argsort(rng.random((tokens, layers, 4)), axis=-1)[..., :k], axis=-1)


def test_written_trace_reads_back_with_every_array_and_the_meta():
    experts = _good_experts()
    experts[2, 1, 0] = -1
    weights = np.full(experts.shape, 0.5, np.float32)
    guesses = np.full((6, 2, 3, 4), -1, np.int16)
    guesses[:, 0, 0, :] = [3, 2, 1, 0]
    meta = {"n_experts": 4, "prefill_tokens": 2, "expert_bytes": 1024, "source": "test"}
    events = {"kind": np.zeros(experts.shape, np.int8), "compute_ns": np.ones((6, 2), np.int64)}
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "t.npz"
        write_trace(path, Trace(experts, weights, guesses, meta, events))
        back = read_trace(path)
        assert not list(Path(d).glob(".moerun-tmp-*"))  # the atomic write leaves no temporary file
    assert np.array_equal(back.experts, experts)
    assert np.array_equal(back.weights, weights)
    assert np.array_equal(back.guesses, guesses)
    assert back.meta == meta
    assert set(back.events) == {"kind", "compute_ns"}
    assert (back.n_tokens, back.n_layers, back.top_k, back.n_experts) == (6, 2, 2, 4)


def _docs_writer_example() -> str:
    text = DOCS.read_text()
    section = text.split("## Writing a trace from another runtime", 1)[1]
    return re.search(r"```python\n(.*?)```", section, re.S).group(1)


def test_the_recorder_observes_a_pass_taking_guesses_after_attention_and_nothing_after_the_layer():
    asked = []

    def guess(layer, h, lookahead, n):  # the prefetch rule's table: [T, lookahead, n]
        asked.append((layer, h.shape, lookahead, n))
        return np.full((h.shape[0], lookahead, n), layer, np.int64)

    rec = Recorder(n_layers=2, top_k=1, lookahead=2, n_guesses=3, guess=guess)
    h = np.zeros((4, 8), np.float32)
    for layer in range(2):
        rec.routed(-1, layer, np.zeros((4, 1), np.int64), np.ones((4, 1), np.float32), np.ones((4, 5), np.float32))
        rec.after_attention(layer, h)
        rec.after_layer(layer, h)
    assert asked == [(0, (4, 8), 2, 3), (1, (4, 8), 2, 3)]
    trace = rec.to_trace({})
    assert trace.guesses.shape == (4, 2, 2, 3) and trace.guesses.dtype == np.int16
    assert (trace.guesses[:, 0] == 0).all() and (trace.guesses[:, 1] == 1).all()


def test_the_documented_writer_example_makes_a_trace_that_replays(tmp_path, monkeypatch, capsys):
    code = _docs_writer_example()
    assert len([line for line in code.splitlines() if line.strip() and not line.startswith("#")]) <= 5
    monkeypatch.chdir(tmp_path)
    rng = np.random.default_rng(1)
    routing_log = np.sort(np.argsort(rng.random((40, 2, 64)), axis=-1)[..., :6], axis=-1).tolist()
    exec(compile(code, str(DOCS), "exec"), {"routing_log": routing_log})
    trace = read_trace(tmp_path / "run.npz")
    assert trace.experts.shape == (40, 2, 6)
    assert trace.n_experts == 64
    assert cli.main(["replay", "--routing", str(tmp_path / "run.npz"), "--evict", "lru,optimal", "--slots", "8,16,32", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert {r["slots"] for r in doc["results"]} == {8, 16, 32}
    assert doc["expert_bytes"] == 3 * 4096 * 1408 * 2


def _truncated(tmp_path: Path) -> Path:
    good = _save(tmp_path / "good.npz", experts=_good_experts())
    blob = good.read_bytes()
    bad = tmp_path / "truncated.npz"
    bad.write_bytes(blob[: len(blob) // 2])
    return bad


def _damaged_member(tmp_path: Path) -> Path:
    good = tmp_path / "good.npz"
    np.savez_compressed(good, experts=np.zeros((400, 2, 2), np.int64))
    blob = bytearray(good.read_bytes())
    blob[60:120] = bytes(60)  # inside the compressed data of the only member
    bad = tmp_path / "damaged.npz"
    bad.write_bytes(bytes(blob))
    return bad


def _unreadable_zip_version(tmp_path: Path) -> Path:
    """A trace whose central directory says it needs zip version 10.9 to extract (found by the long fuzz run).

    The field is "version needed to extract" at offset 6 of a central directory header (signature
    PK\\x01\\x02), APPNOTE.TXT 4.3.12 (PKWARE's published .ZIP specification); Python's zipfile
    raises NotImplementedError for a version above the one it supports.
    """
    good = _save(tmp_path / "good.npz", experts=_good_experts())
    blob = bytearray(good.read_bytes())
    at = blob.index(b"PK\x01\x02")
    blob[at + 6 : at + 8] = (109).to_bytes(2, "little")
    bad = tmp_path / "version.npz"
    bad.write_bytes(bytes(blob))
    return bad


BAD_TRACES = {
    "experts 2-d": (lambda d: _save(d / "t.npz", experts=np.zeros((5, 2), np.int64)), "integer array [tokens, layers, top_k]"),
    "experts float": (lambda d: _save(d / "t.npz", experts=np.zeros((5, 2, 2), np.float32)), "integer array"),
    "id at n_experts": (lambda d: _save(d / "t.npz", experts=np.full((5, 1, 1), 4), meta={"n_experts": 4}), "ids >= n_experts (4)"),
    "negative id": (lambda d: _save(d / "t.npz", experts=np.full((5, 1, 1), -2)), "negative ids other than the padding value -1"),
    "repeated id": (lambda d: _save(d / "t.npz", experts=np.ones((5, 1, 2), np.int64)), "appears twice"),
    "no experts array": (lambda d: _save(d / "t.npz", weights=np.zeros((5, 1, 1), np.float32)), "missing the 'experts' array"),
    "weights shape": (
        lambda d: _save(d / "t.npz", experts=np.zeros((5, 1, 1), np.int64), weights=np.zeros((5, 1, 2), np.float32)),
        "'weights' must be a float array shaped like 'experts'",
    ),
    "guesses shape": (
        lambda d: _save(d / "t.npz", experts=np.zeros((5, 2, 1), np.int64), guesses=np.zeros((5, 3, 1, 1), np.int64)),
        "'guesses' must be an integer array",
    ),
    "meta not json": (lambda d: _save(d / "t.npz", experts=np.zeros((5, 1, 1), np.int64), meta=np.array("{oops")), "JSON object"),
    "prefill past end": (lambda d: _save(d / "t.npz", experts=np.zeros((5, 1, 1), np.int64), meta={"prefill_tokens": 6}), "exceeds"),
    "prefill negative": (lambda d: _save(d / "t.npz", experts=np.zeros((5, 1, 1), np.int64), meta={"prefill_tokens": -1}), "prefill_tokens"),
    "bare npy": (lambda d: (np.save(d / "t.npy", np.zeros((5, 1, 1), np.int64)), d / "t.npy")[1], "single .npy array"),
    "text file": (lambda d: (d / "t.npz").write_text("token,layer,expert\n0,0,3\n") and d / "t.npz", "looks like a text file"),
    "empty file": (lambda d: (d / "t.npz").write_bytes(b"") or d / "t.npz", "empty"),
    "truncated zip": (_truncated, "damaged or truncated"),
    "damaged member": (_damaged_member, "damaged or truncated"),
    "zip version 10.9": (_unreadable_zip_version, "Python cannot read"),
    "missing file": (lambda d: d / "absent.npz", "no such trace file"),
    "object array": (lambda d: _save(d / "t.npz", experts=np.array([[[None]]], dtype=object)), "not a readable .npz trace"),
}


@pytest.mark.parametrize("case", sorted(BAD_TRACES))
def test_bad_trace_gives_one_stderr_line_and_exit_2(tmp_path, capsys, case):
    make, phrase = BAD_TRACES[case]
    path = make(tmp_path)
    code = cli.main(["replay", "--routing", str(path)])
    out, err = capsys.readouterr()
    assert code == 2
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("moerun replay: ")
    assert phrase in lines[0]
    assert "Traceback" not in err


def test_bad_trace_raises_the_trace_error_family(tmp_path):
    path = _save(tmp_path / "t.npz", experts=np.full((3, 1, 1), -5))
    with pytest.raises(BadTrace):
        read_trace(path)


# ---------------------------------------------------------------------------- partial, hostile and non-regular trace files


def test_a_trace_from_a_run_stopped_during_prefill_is_written_and_readable(small_model, tmp_path):
    import moerun

    with moerun.load(small_model, tokenizer=False) as eng:
        eng.start_trace()
        real = eng.recorder.routed
        calls = []

        def stop_at_the_second_layer(*a, **k):
            calls.append(1)
            real(*a, **k)
            if len(calls) == 2:  # the prompt has been routed through layer 1 of 3 when Ctrl-C lands
                raise KeyboardInterrupt

        eng.recorder.routed = stop_at_the_second_layer
        with pytest.raises(KeyboardInterrupt):
            eng.generate(prompt_ids=[1, 2, 3, 4, 5], max_new=4)
        write_trace(tmp_path / "t.npz", eng.finish_trace(partial=True))
    t = read_trace(tmp_path / "t.npz")
    assert t.meta["partial"] is True
    assert t.n_tokens == 0 and t.meta["prefill_tokens"] == 0 and t.n_layers == 3


def _zip_with_flags(path: Path, arrays: dict, flag_bits: int) -> Path:
    _save(path, **arrays)
    blob = bytearray(path.read_bytes())
    # general purpose bit flag: offset 6 of each local header and 8 of each central directory entry
    # (PKWARE APPNOTE.TXT 4.3.7 and 4.3.12); bit 0 means encrypted
    for sig, at in ((b"PK\x03\x04", 6), (b"PK\x01\x02", 8)):
        i = blob.find(sig)
        while i != -1:
            blob[i + at] |= flag_bits
            i = blob.find(sig, i + 4)
    path.write_bytes(bytes(blob))
    return path


def test_an_archive_with_the_encryption_flag_is_a_bad_trace(tmp_path, capsys):
    path = _zip_with_flags(tmp_path / "enc.npz", {"experts": _good_experts()}, 0x1)
    with pytest.raises(BadTrace, match="encrypted"):
        read_trace(path)
    assert cli.main(["replay", "--routing", str(path)]) == 2
    assert len(capsys.readouterr().err.strip().splitlines()) == 1


def test_a_small_archive_that_would_expand_enormously_is_refused_before_allocating(tmp_path):
    import tracemalloc
    import zipfile

    # 400 MB of zeros deflate to about 400 KB: an honest archive whose arrays nobody should have to unpack
    path = tmp_path / "bomb.npz"
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        with zf.open("experts.npy", "w", force_zip64=True) as f:
            header = {"descr": "<i2", "fortran_order": False, "shape": (200_000_000, 1, 1)}
            np.lib.format.write_array_header_1_0(f, header)
            chunk = b"\0" * (1 << 22)
            for _ in range(400_000_000 // len(chunk)):
                f.write(chunk)
    assert path.stat().st_size < 2_000_000
    tracemalloc.start()
    with pytest.raises(BadTrace, match="expand"):
        read_trace(path)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < 4 * path.stat().st_size + (8 << 20)


def test_a_fifo_in_place_of_a_trace_is_refused_at_once(tmp_path):
    from conftest import fifo

    pipe = fifo(tmp_path / "t.npz")
    with pytest.raises(BadTrace, match="FIFO"):
        read_trace(pipe)


def test_a_device_in_place_of_a_trace_is_refused_instead_of_read_forever(tmp_path):
    from conftest import char_device

    dev = char_device(tmp_path / "zero.npz", minor=5)  # the numbers of /dev/zero
    with pytest.raises(BadTrace, match="character device"):
        read_trace(dev)


def test_trace_metadata_that_is_not_utf8_is_a_bad_trace(tmp_path):
    path = tmp_path / "t.npz"
    np.savez(path, experts=_good_experts(), meta=np.array('{"source": "\\udcff"}'))
    with pytest.raises(BadTrace, match="UTF-8"):
        read_trace(path)


def test_plan_refuses_a_trace_without_decode_steps(small_model, tmp_path, capsys):
    path = _save(tmp_path / "prefill.npz", experts=_good_experts(6, 3, 2), meta={"n_experts": 8, "prefill_tokens": 6})
    try:
        code = cli.main(["plan", "--model", str(small_model), "--routing", str(path), "--mem-cap", "1GiB", "--link-speed", "1GB/s"])
    except SystemExit as e:
        code = e.code
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and "no decode steps" in err


def test_replay_prefetch_refuses_guesses_above_every_routed_expert_when_no_count_is_declared(tmp_path, capsys):
    # issue 23, item 7: guess ids are checked as routed ids are; with no meta n_experts the trace's experts are
    # those it routes to, so a guess of expert 900 where the routing names 0..3 is refused in one line, exit 2
    from moerun.cli.main import main

    rng = np.random.default_rng(3)
    experts = np.sort(np.stack([[rng.choice(4, 2, replace=False) for _ in range(2)] for _ in range(6)]), axis=-1)
    guesses = np.zeros((6, 2, 1, 2), np.int64)
    guesses[2, 0, 0] = [1, 900]
    path = tmp_path / "t.npz"
    np.savez(path, experts=experts, guesses=guesses, meta=np.array(json.dumps({"lookahead": 1, "guesses": 2})))
    assert main(["replay", "--routing", str(path), "--prefetch", "1"]) == 2
    err = capsys.readouterr().err
    assert "'guesses'" in err and len(err.strip().splitlines()) == 1
    guesses[2, 0, 0] = [1, 3]
    np.savez(path, experts=experts, guesses=guesses, meta=np.array(json.dumps({"lookahead": 1, "guesses": 2})))
    assert main(["replay", "--routing", str(path), "--prefetch", "1", "--json"]) == 0


@pytest.mark.parametrize("meta, experts_shape, phrase", [
    ({"n_experts": 8}, (5, 4, 2), "trace: 4 layers × 8 experts, top-2; model: 3 layers × 8 experts, top-2"),
    ({"n_experts": 16}, (5, 3, 2), "trace: 3 layers × 16 experts, top-2; model: 3 layers × 8 experts, top-2"),
    ({}, (5, 3, 3), "trace: 3 layers × 6+ experts, top-3; model: 3 layers × 8 experts, top-2"),
])
def test_generate_refuses_a_trace_of_another_model_naming_both_shapes(small_model, tmp_path, capsys, meta, experts_shape, phrase):
    # issue 23, item 21: the refusal is in the user's terms (the two shapes), not the trace's internals
    T, L, k = experts_shape
    experts = np.tile(np.arange(k) + (6 - k), (T, L, 1))
    path = tmp_path / "other.npz"
    probs = {"probs": np.full((T, L, meta["n_experts"]), 1.0 / meta["n_experts"], np.float32)} if meta else {}
    np.savez(path, experts=experts, meta=np.array(json.dumps(meta)), **probs)
    from moerun.cli.main import main

    assert main(["generate", "--model", str(small_model), "--routing", str(path), "--max-new", "1", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert phrase in err and len(err.strip().splitlines()) == 1
