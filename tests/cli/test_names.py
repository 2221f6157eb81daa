"""One name, one direction, one unit (issue 23, item 19): a trace the command reads is --routing FILE and a
trace it writes is --trace FILE; every JSON duration is in seconds; a prefetch setting and a shared pool are
written one way; "written to" notices go to stderr."""

from __future__ import annotations

import argparse
import json

import numpy as np
import pytest
from _planning import _random_trace

from moerun.cli import main as cli
from moerun.files.trace import write_trace


def _run(capsys, *argv):
    """Exit code, stdout and stderr of ``moerun ARGV`` run in this process (usage errors end in SystemExit)."""
    try:
        code = cli.main([str(a) for a in argv])
    except SystemExit as e:
        code = e.code
    out, err = capsys.readouterr()
    return code, out, err


def _options(command: str) -> dict:
    """{option string: its argparse action} of one command, hidden options left out."""
    parser = cli.build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices[command]
    return {s: a for a in sub._actions if a.help is not argparse.SUPPRESS for s in a.option_strings}


def _shape(tmp_path, layers=2, experts=4):
    p = tmp_path / "shape.json"
    p.write_text(json.dumps({"layers": layers, "experts": experts, "top_k": 2, "expert_bytes": 1 << 20, "dense_bytes": 1 << 22,
                             "expert_us": 50.0, "dense_layer_us": 100.0}))
    return p


@pytest.fixture
def small_trace(tmp_path):
    path = tmp_path / "t.npz"
    write_trace(path, _random_trace(np.random.default_rng(1), layers=2, experts=4))
    return path


# ---------------------------------------------------------------------------- one spelling per direction


def test_a_trace_read_is_routing_and_a_trace_written_is_trace_in_every_command():
    readers, writers = set(), set()
    for command in cli.COMMANDS:
        opts = _options(command)
        if "--routing" in opts:
            readers.add(command)
            assert opts["--routing"].metavar == "FILE"
        if "--trace" in opts:
            writers.add(command)
            assert "write" in opts["--trace"].help
        # no positional trace argument is shown anywhere
        parser = cli.build_parser()
        sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices[command]
        assert not [a for a in sub._actions if not a.option_strings and a.help is not argparse.SUPPRESS
                    and "trace" in (a.help or "").lower()]
    assert readers == {"generate", "plan", "replay"}
    assert writers == {"generate", "record"}


def test_replay_reads_its_trace_from_routing(small_trace, capsys):
    code, out, err = _run(capsys, "replay", "--routing", small_trace, "--slots", "2", "--no-baselines", "--json")
    assert code == 0, err
    assert json.loads(out)["trace"]["file"] == str(small_trace)
    assert "deprecated" not in err


def test_replay_without_a_trace_is_refused_naming_routing(capsys):
    code, out, err = _run(capsys, "replay", "--slots", "2")
    assert code == 2 and out == ""
    assert err.strip().splitlines() == ["moerun replay: no routing trace given: add --routing FILE"]


def test_the_old_bare_replay_argument_still_works_with_a_one_line_deprecation_note(small_trace, capsys):
    code, out, err = _run(capsys, "replay", small_trace, "--slots", "2", "--no-baselines", "--json")
    assert code == 0, err
    assert json.loads(out)["trace"]["file"] == str(small_trace)
    notes = [line for line in err.splitlines() if "deprecated" in line]
    assert len(notes) == 1 and "--routing FILE" in notes[0] and notes[0].startswith("moerun replay: note:")


def test_the_old_plan_trace_option_still_reads_the_trace_with_a_one_line_deprecation_note(tmp_path, small_trace, capsys):
    common = ["plan", "--shape", _shape(tmp_path), "--mem-cap", "12MiB", "--link-speed", "1GB/s", "--evict", "lru", "--json"]
    code, new_out, err = _run(capsys, *common, "--routing", small_trace)
    assert code == 0, err
    assert "deprecated" not in err
    code, old_out, err = _run(capsys, *common, "--trace", small_trace)
    assert code == 0, err
    notes = [line for line in err.splitlines() if "deprecated" in line]
    assert len(notes) == 1 and notes[0].startswith("moerun plan: note: --trace FILE") and "--routing FILE" in notes[0]
    assert json.loads(old_out)["trace"]["file"] == json.loads(new_out)["trace"]["file"] == str(small_trace)


@pytest.mark.parametrize("argv", [
    ("replay", "{t}", "--routing", "{t}"),
    ("plan", "--shape", "{s}", "--mem-cap", "12MiB", "--link-speed", "1GB/s", "--trace", "{t}", "--routing", "{t}"),
])
def test_a_trace_given_in_both_spellings_is_refused_in_one_line(tmp_path, small_trace, capsys, argv):
    argv = [a.format(t=small_trace, s=_shape(tmp_path)) for a in argv]
    code, out, err = _run(capsys, *argv)
    assert code == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "given twice" in lines[0] and "--routing FILE" in lines[0]


# ---------------------------------------------------------------------------- "written to" notices


_TEXT = "stone river lamp the bright cold runs under over " * 20


def _writer_argv(kind: str, model, tmp_path, dest) -> list:
    text = tmp_path / "in.txt"
    text.write_text(_TEXT)
    return {
        "generate": ["generate", "--model", model, "--prompt", "hi", "--max-new", "2", "--trace", dest],
        "record": ["record", "--model", model, "--text", text, "--trace", dest],
        "probe": ["probe", "--sizes", "64KiB", "--runs", "1", "--dir", tmp_path, "--save", dest],
        "quantize": ["quantize", "--model", model, dest, "--no-score", "--method", "rtn"],
        "synth": ["synth", dest, "--layers", "1", "--experts", "2", "--d-model", "16", "--d-expert", "16"],
        "synth-open": ["synth", dest, "--open-type", "qwen3_moe", "--layers", "2", "--experts", "4", "--d-model", "64",
                       "--d-expert", "32", "--heads", "4", "--kv-heads", "2"],
    }[kind]


@pytest.mark.parametrize("json_flag", [[], ["--json"]], ids=["text", "json"])
@pytest.mark.parametrize(("kind", "what"), [("generate", "trace"), ("record", "trace"), ("probe", "results"),
                                            ("quantize", "model directory"), ("synth", "model directory"),
                                            ("synth-open", "open checkpoint")])
def test_every_written_to_notice_goes_to_stderr_as_one_line(small_model, tmp_path, capsys, kind, what, json_flag):
    dest = tmp_path / ("out" if kind in ("quantize", "synth", "synth-open") else "out.file")
    code, out, err = _run(capsys, *_writer_argv(kind, small_model, tmp_path, dest), *json_flag)
    kind = kind.removesuffix("-open")
    assert code == 0, err
    if json_flag:
        json.loads(out)  # stdout is the document alone (which may name the file as data)
    else:
        assert str(dest) not in out and "written" not in out and "wrote" not in out and "saved" not in out
    notices = [line for line in err.splitlines() if "written to" in line]
    assert notices == [line for line in notices if line.startswith(f"moerun {kind}: {what} written to {dest}")]
    assert len(notices) == 1


def test_replay_writes_its_plot_notice_to_stderr(monkeypatch, small_trace, tmp_path, capsys):
    import moerun.cli.plot as plot

    dest = tmp_path / "p.png"
    monkeypatch.setattr(plot, "require_matplotlib", lambda: None)
    monkeypatch.setattr(plot, "plot_replay", lambda path, *a, **k: (open(path, "wb").close(), {"file": str(path)})[1])
    code, out, err = _run(capsys, "replay", "--routing", small_trace, "--slots", "2", "--no-baselines", "--plot", dest)
    assert code == 0, err
    assert str(dest) not in out
    assert [line for line in err.splitlines() if "written to" in line] == [f"moerun replay: plot written to {dest}"]


def test_generate_quiet_prints_no_written_to_notice(small_model, tmp_path, capsys):
    dest = tmp_path / "t.npz"
    code, out, err = _run(capsys, "generate", "--model", small_model, "--prompt", "hi", "--max-new", "2", "--trace", dest,
                          "--quiet")
    assert code == 0 and dest.exists()
    assert err == ""


# ---------------------------------------------------------------------------- one unit


RATES = {"tok_s", "gb_s"}  # a rate's key names its unit over seconds: tokens per second, 10^9 bytes per second
OTHER_UNITS = ("_ns", "_us", "_ms", "_millis", "_micros", "_nanos", "_minutes", "_hours")


def _keys(doc, path="$"):
    """Every (path, key, value) of a JSON document."""
    if isinstance(doc, dict):
        for k, v in doc.items():
            yield path, k, v
            yield from _keys(v, f"{path}.{k}")
    elif isinstance(doc, list):
        for i, v in enumerate(doc):
            yield from _keys(v, f"{path}[{i}]")


def _json_documents(small_model, small_trace, tmp_path, capsys) -> dict:
    text = tmp_path / "in.txt"
    text.write_text(_TEXT)
    runs = {
        "generate": ["generate", "--model", small_model, "--prompt", "hi", "--max-new", "6", "--mem-cap", "1GiB",
                     "--slots", "2,2,2", "--prefetch", "1"],
        "score": ["score", "--model", small_model, "--text", text, "--slots", "2,2,2"],
        "verify": ["verify", "--model", small_model, "--prompt", "hi", "--max-new", "2", "--slots", "2,2,2"],
        "record": ["record", "--model", small_model, "--text", text, "--trace", tmp_path / "r.npz"],
        "replay": ["replay", "--routing", tmp_path / "r.npz", "--slots", "2", "--prefetch", "1", "--no-baselines"],
        "probe": ["probe", "--sizes", "64KiB", "--runs", "1", "--dir", tmp_path],
        "plan": ["plan", "--shape", _shape(tmp_path), "--routing", small_trace, "--mem-cap", "12MiB", "--link-speed", "1GB/s",
                 "--evict", "lru"],
        "synth": ["synth", tmp_path / "syn", "--layers", "1", "--experts", "2", "--d-model", "16", "--d-expert", "16"],
        "inspect": ["inspect", "--model", small_model],
    }
    docs = {}
    for name, argv in runs.items():
        code, out, err = _run(capsys, *argv, "--json")
        assert code == 0, (name, err)
        docs[name] = json.loads(out)
    return docs


def test_every_json_duration_is_in_seconds(small_model, small_trace, tmp_path, capsys):
    docs = _json_documents(small_model, small_trace, tmp_path, capsys)
    for name, doc in docs.items():
        for path, key, value in _keys(doc):
            assert not key.endswith(OTHER_UNITS) and not any(f"{u}_" in key for u in OTHER_UNITS), f"{name}: {path}.{key}"
            assert "per_s" not in key, f"{name}: {path}.{key} (a rate is written <unit>_s: tok_s, gb_s)"
            if key.endswith("_s") and key not in RATES and value is not None:
                assert isinstance(value, (int, float, list, dict)), f"{name}: {path}.{key}"
    # the figures are seconds, not another unit under a new name
    g = docs["generate"]
    assert g["decode_s"] == pytest.approx(g["decode_steps"] / g["decode_tok_s"], rel=1e-6)
    assert 0 <= g["pool"]["stall_s"] <= g["prefill_s"] + g["decode_s"]
    assert g["stall_share"] == pytest.approx(g["pool"]["stall_s"] / (g["prefill_s"] + g["decode_s"]), rel=1e-6)
    assert 0 <= g["pool"]["prefetch"]["hidden_s"] < 60 and 0 <= g["pool"]["pagein_s"] < 60
    s = docs["score"]
    assert s["tok_s"] == pytest.approx(s["predicted_tokens"] / s["forward_s"], rel=1e-6)
    assert 0 <= s["stall_s"] <= s["forward_s"]
    r = docs["record"]
    assert r["tok_s"] == pytest.approx(r["tokens"] / r["seconds"], rel=1e-6)
    p = docs["plan"]
    assert p["costs"]["expert_s"] == pytest.approx(50e-6)  # the shape file's 50 us
    assert p["costs"]["attn_s"] == pytest.approx([100e-6, 100e-6])
    assert p["recommended"]["step_s"] == pytest.approx(1 / p["recommended"]["tok_s"], rel=1e-6)
    for block in docs["probe"]["blocks"]:
        warm = block["warm"]
        assert warm["gb_s"] == pytest.approx(block["bytes"] / warm["p50_s"] / 1e9, rel=1e-4)
    assert docs["probe"]["schema"] == "moerun-probe/2"


def test_a_saved_probe_of_the_old_schema_in_milliseconds_is_read_as_seconds(tmp_path):
    from moerun.prober.saved import load_probe

    run = {"regime": "warm", "verified": True, "reason": None, "runs": 3, "discarded": 0, "p50_ms": 0.1, "p95_ms": 0.2,
           "p99_ms": 0.3, "max_ms": 0.4, "mean_ms": 0.15, "gb_s": 4.0, "of_ceiling": 0.5}
    old = {"schema": "moerun-probe/1", "machine": {}, "ceiling": {"gb_s": 8.0, "best_ms": 2.0}, "runs": 3,
           "blocks": [{"label": "64 KiB", "source": "tempfile", "bytes": 65536, "warm": run, "cold": {**run, "regime": "cold"}}]}
    path = tmp_path / "old.json"
    path.write_text(json.dumps(old))
    doc = load_probe(path)
    assert doc["schema"] == "moerun-probe/2"
    assert doc["ceiling"]["best_s"] == pytest.approx(2e-3) and "best_ms" not in doc["ceiling"]
    warm = doc["blocks"][0]["warm"]
    assert (warm["p50_s"], warm["p95_s"], warm["p99_s"], warm["max_s"], warm["mean_s"]) == pytest.approx((1e-4, 2e-4, 3e-4, 4e-4, 1.5e-4))
    assert not [k for k in warm if k.endswith("_ms")]


# ---------------------------------------------------------------------------- a prefetch setting and a shared pool, one way each


def _texts_and_docs(small_model, tmp_path, capsys, shared: bool) -> tuple[dict, dict]:
    """Text and JSON of every command that shows a pool or a prefetch setting, with both asked for."""
    text = tmp_path / "in.txt"
    text.write_text(_TEXT)
    trace = tmp_path / "r.npz"
    assert _run(capsys, "record", "--model", small_model, "--text", text, "--trace", trace, "--force")[0] == 0
    pool = ["--shared-pool"] if shared else []
    runs = {
        "generate": ["generate", "--model", small_model, "--prompt", "hi", "--max-new", "6", "--mem-cap", "1GiB",
                     *(["--slots", "2,2,2"] if not shared else []), *pool, "--prefetch", "2", "--lookahead", "2"],
        "score": ["score", "--model", small_model, "--text", text, "--mem-cap", "1GiB", *(["--slots", "2,2,2"] if not shared else []),
                  *pool, "--prefetch", "2", "--lookahead", "2"],
        "replay": ["replay", "--routing", trace, "--slots", "4", *pool, "--prefetch", "2", "--lookahead", "2", "--no-baselines"],
        "plan": ["plan", "--shape", _shape(tmp_path, layers=3, experts=8), "--routing", trace, "--mem-cap", "16MiB",
                 "--link-speed", "1GB/s", "--evict", "lru", *pool],
    }
    texts, docs = {}, {}
    for name, argv in runs.items():
        code, out, err = _run(capsys, *argv)
        assert code == 0, (name, err)
        texts[name] = (out + err).replace(str(tmp_path), "TMP")  # the test's directory is named after the test
        code, out, err = _run(capsys, *argv, "--json")
        assert code == 0, (name, err)
        docs[name] = json.loads(out)
    return texts, docs


def test_a_prefetch_setting_is_written_one_way_in_text_and_json(small_model, tmp_path, capsys):
    import re

    texts, docs = _texts_and_docs(small_model, tmp_path, capsys, shared=False)
    for name, text in texts.items():
        assert not re.search(r"\b\d+ ?x ?\d+\b", text), f"{name}: a prefetch setting written NxL:\n{text}"
        assert "prefetch 2 x" not in text and "prefetch 2," not in text
        if name != "plan":  # plan shows the settings it searched, each as its options
            assert "--prefetch 2 --lookahead 2" in text, f"{name}:\n{text}"
    assert re.search(r"--prefetch \d --lookahead \d", texts["plan"]) and "no prefetch" in texts["plan"]
    # in JSON: "prefetch" (a number, 0 for none, or "auto") and "lookahead" beside it, as the engine's options write them
    g = docs["generate"]["options"]
    assert (g["prefetch"], g["lookahead"]) == (2, 2)
    r = docs["replay"]
    assert (r["prefetch"], r["lookahead"]) == (2, 2) and isinstance(r["prefetch_results"], list)
    p = docs["plan"]
    for setting in [*p["candidates"], p["recommended"], *p["curve"]["points"]]:
        assert (isinstance(setting["prefetch"], int) or setting["prefetch"] == "auto") and isinstance(setting["lookahead"], int)
        if setting["prefetch"] == 0:
            assert setting["lookahead"] == 1  # as the engine's options say it when there is no prefetch
    assert {(c["prefetch"], c["lookahead"]) for c in p["candidates"]} >= {(0, 1), (2, 1), (2, 2)}


def test_a_shared_pool_is_written_one_way_in_text_and_json(small_model, tmp_path, capsys):
    import re

    texts, docs = _texts_and_docs(small_model, tmp_path, capsys, shared=True)
    for name, text in texts.items():
        assert "shared pool" in text, f"{name}:\n{text}"
        # every "shared" is the shared pool or its option (not "one pool shared by", "shared slots", a bare "shared")
        others = [m.group(0) for m in re.finditer(r"\S*shared\S*(?: \S+)?", text)
                  if not m.group(0).startswith(("shared pool", "--shared-pool", "(shared pool"))]
        assert not others, f"{name}: {others}"
    # in JSON: "split": "shared", as the engine's budget writes it; no "shared" flag, no "pool" naming a kind
    assert docs["generate"]["budget"]["split"] == "shared"
    assert docs["score"]["budget"]["split"] == "shared"
    assert docs["replay"]["split"] == "shared"
    p = docs["plan"]
    assert p["recommended"]["split"] in ("shared", "even", "uneven")
    assert any(c["split"] == "shared" for c in p["candidates"])
    assert any(pt["split"] == "shared" for pt in p["curve"]["points"])
    for name, doc in docs.items():
        for path, key, value in _keys(doc):
            assert key != "shared", f"{name}: {path}.shared"
            assert not (key == "pool" and isinstance(value, str)), f"{name}: {path}.pool = {value!r}"


def test_the_library_plan_reads_its_trace_as_routing_and_the_old_keyword_warns(tmp_path, small_trace):
    import warnings

    import moerun
    from moerun.errors import BadOption

    common = {"mem_cap": "12MiB", "shape": _shape(tmp_path), "link_speed": "1GB/s", "evict": "lru"}
    new = moerun.plan(routing=str(small_trace), **common)
    with pytest.warns(DeprecationWarning, match="routing="):
        old = moerun.plan(trace=str(small_trace), **common)
    assert old.to_json() == new.to_json() and new.trace["file"] == str(small_trace)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(BadOption, match="given twice"):
            moerun.plan(trace=str(small_trace), routing=str(small_trace), **common)
