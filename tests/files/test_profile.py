"""Routing profiles (moerun-profile/1): written, read back, counted from a text or a trace, refused when bad."""

from __future__ import annotations

import json

import numpy as np
import pytest
from _jobs import as_json, cli_json, without

import moerun
from moerun.cli import main as cli
from moerun.errors import BadInput, BadOption
from moerun.files.profile import MAX_BYTES, Profile, counts_of, read_profile, write_profile


def _profile(counts, **model) -> Profile:
    counts = np.asarray(counts, np.int64)
    m = {"name": "t", "layers": counts.shape[0], "experts": counts.shape[1], "top_k": 2, "d_model": 16, **model}
    return Profile(counts, m, {"kind": "text", "file": "x.txt", "blake2b": "00", "tokens": 5}, {"max_tokens": None})


def test_a_profile_reads_back_as_written(tmp_path):
    p = _profile([[1, 0, 3], [2, 2, 0]])
    write_profile(tmp_path / "p.json", p)
    got = read_profile(tmp_path / "p.json")
    assert np.array_equal(got.counts, p.counts)
    assert got.model == p.model and got.source == p.source and got.settings == p.settings
    assert json.loads((tmp_path / "p.json").read_text())["schema"] == "moerun-profile/1"


def test_counts_of_routing_count_every_choice_and_skip_padding():
    ex = np.array([[[0, 2], [1, -1]], [[2, 0], [1, 0]]])  # [tokens, layers, k]
    assert counts_of(ex, 3).tolist() == [[2, 0, 2], [1, 2, 0]]


def test_a_profile_of_a_text_equals_the_profile_of_the_trace_record_writes_of_it(pebble, tmp_path):
    moerun.record(tmp_path / "t.npz", pebble, max_tokens=300)
    a = moerun.profile(tmp_path / "a.json", pebble, max_tokens=300)
    b = moerun.profile(tmp_path / "b.json", pebble, from_trace=tmp_path / "t.npz")
    pa, pb = read_profile(tmp_path / "a.json"), read_profile(tmp_path / "b.json")
    assert np.array_equal(pa.counts, pb.counts) and a.expert_accesses == b.expert_accesses > 0
    assert pa.counts.sum() == a.tokens * pa.model["top_k"] * pa.model["layers"]  # every token chose top_k per layer
    assert pa.model == pb.model and pa.source["kind"] == "text" and pb.source["kind"] == "trace"


def test_profile_returns_what_the_command_prints(pebble, tmp_path, capsys):
    result = moerun.profile(tmp_path / "a.json", pebble, max_tokens=120)
    code, doc = cli_json(capsys, "profile", "--model", pebble, "--out", tmp_path / "b.json", "--max-tokens", 120)
    assert code == 0
    assert without(as_json(result.to_json()), "seconds", "profile") == without(doc, "seconds", "profile")


def _bad_docs(good: dict) -> list[tuple[str, object, str]]:
    def edit(**kw):
        d = json.loads(json.dumps(good))
        for path, v in kw.items():
            *head, last = path.split("__")
            t = d
            for h in head:
                t = t[h]
            t[last] = v
        return d

    rows = good["counts"]
    return [
        ("not an object", [1, 2], "not a JSON object"),
        ("wrong schema", edit(schema="moerun-probe/2"), "schema"),
        ("negative count", edit(counts=[[-1] + rows[0][1:]] + rows[1:]), "counts[0][0]"),
        ("fraction", edit(counts=[[0.5] + rows[0][1:]] + rows[1:]), "counts[0][0]"),
        ("expert out of range", edit(counts=[row + [1] for row in rows]), "counts[0] must be a list of"),
        ("layer missing", edit(counts=rows[:-1]), "counts must be a list of"),
        ("top_k above experts", edit(model__top_k=99), "top_k"),
        ("no source", edit(source=None), "source.kind"),
        ("huge shape", edit(model__layers=1 << 20, model__experts=1 << 20), "more than"),
    ]


@pytest.fixture(scope="module")
def pebble_profile(pebble, tmp_path_factory) -> tuple:
    d = tmp_path_factory.mktemp("prof")
    moerun.profile(d / "good.json", pebble, max_tokens=80)
    moerun.record(d / "t.npz", pebble, max_tokens=80)
    return d, json.loads((d / "good.json").read_text())


@pytest.mark.parametrize("command", ["generate", "replay", "plan"])
def test_bad_profiles_get_one_line_and_exit_2(pebble, scree, pebble_profile, tmp_path, capsys, command):
    d, good = pebble_profile
    files = []
    for label, doc, phrase in _bad_docs(good):
        f = tmp_path / f"{label.replace(' ', '_')}.json"
        f.write_text(json.dumps(doc))
        files.append((label, f, phrase))
    (tmp_path / "text.json").write_text("counts: lots")
    files.append(("not JSON", tmp_path / "text.json", "not a JSON document"))
    files.append(("an npz", d / "t.npz", "not UTF-8"))
    huge = tmp_path / "huge.json"
    with open(huge, "wb") as f:
        f.truncate(MAX_BYTES + 1)  # sparse: no disk used
    files.append(("huge", huge, "more than"))
    files.append(("missing", tmp_path / "nothing.json", "no such routing profile"))
    moerun.profile(tmp_path / "scree.json", scree, max_tokens=40)
    files.append(("another model", tmp_path / "scree.json", "a profile of another model"))
    shallow = dict(good, counts=good["counts"][:-1], model=dict(good["model"], layers=good["model"]["layers"] - 1))
    (tmp_path / "shallow.json").write_text(json.dumps(shallow))
    files.append(("wrong layer count", tmp_path / "shallow.json", "a profile of another model"))
    base = {"generate": ["generate", "--model", pebble, "--mem-cap", "14MiB", "--max-new", "2", "--prompt", "a"],
            "replay": ["replay", "--routing", d / "t.npz", "--no-baselines"],
            "plan": ["plan", "--model", pebble, "--routing", d / "t.npz", "--mem-cap", "14MiB", "--link-speed", "1GB/s"]}[command]
    for label, f, phrase in files:
        capsys.readouterr()
        code = cli.main([*map(str, base), "--warm-from", str(f)])
        out, err = capsys.readouterr()
        assert code == 2, label
        assert out == "", label
        assert err.count("\n") == 1 and phrase in err and "Traceback" not in err, (label, err)


def test_load_refuses_a_profile_of_another_model_and_a_warm_start_without_a_pool(pebble, scree, tmp_path):
    moerun.profile(tmp_path / "scree.json", scree, max_tokens=40)
    with pytest.raises(BadInput, match="another model"):
        moerun.load(pebble, mem_cap="14MiB", warm_from=tmp_path / "scree.json")
    with pytest.raises(BadOption, match="warm start"):
        moerun.load(pebble, bare=True, warm_from=tmp_path / "scree.json")
    with pytest.raises(BadOption, match="warm_from"):
        moerun.load(pebble, warm_from=3)


def test_profile_refuses_routing_options_with_a_trace_and_an_existing_output(pebble, pebble_profile, tmp_path, capsys):
    d, _ = pebble_profile
    for argv, phrase in (
        (["--from-trace", d / "t.npz", "--text", d / "good.json"], "give one or the other"),
        (["--from-trace", d / "t.npz", "--max-tokens", "5"], "give one or the other"),
        (["--from-trace", tmp_path / "none.npz"], "no such"),
    ):
        capsys.readouterr()
        code = cli.main(["profile", "--model", str(pebble), "--out", str(tmp_path / "p.json"), *map(str, argv)])
        out, err = capsys.readouterr()
        assert code == 2 and err.count("\n") == 1 and phrase in err, (argv, err)
    assert not (tmp_path / "p.json").exists()
    code = cli.main(["profile", "--model", str(pebble), "--out", str(d / "good.json"), "--from-trace", str(d / "t.npz")])
    assert code == 2 and "already exists" in capsys.readouterr().err
