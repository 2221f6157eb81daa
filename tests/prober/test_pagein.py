"""moerun probe and moerun.prober.pagein: regimes labelled and checked, figures sane, schema as documented, no leftovers."""

from __future__ import annotations

import json
import os
import re
import tempfile
import time
from pathlib import Path

import pytest

from moerun.cli import main as cli
from moerun.errors import BadInput, BadOption
from moerun.files.store import ModelStore
from moerun.makers.synthetic import RANDOM_NOTE, synth_config, write_model
from moerun.prober import pagein as probe_mod
from moerun.prober.pagein import (
    drop_pages,
    drop_problem,
    latency_stats,
    parse_sizes,
    residency_problem,
    resident_pages,
    run_probe,
    write_scratch_file,
)
from moerun.prober.saved import SCHEMA, load_probe

KiB, MiB = 1024, 1024 * 1024
DOC = Path(__file__).resolve().parents[2] / "docs" / "design" / "file-formats.md"


@pytest.fixture(scope="module")
def tiny_model(tmp_path_factory) -> Path:
    return write_model(tmp_path_factory.mktemp("model") / "tiny", synth_config(layers=2, experts=4, d_model=32, d_expert=64))


def work_dir(tmp_path: Path) -> Path:
    d = tmp_path / "work"
    d.mkdir()
    return d


def cold_unsupported_reason(path: Path) -> str | None:
    return drop_problem() or residency_problem(path)


def dropped(fd: int, offset: int, length: int) -> tuple[int, int]:
    """Drop and count; pages still under read-ahead I/O survive one drop, so try a few times."""
    resident, total = 0, 0
    for wait in (0, 0.01, 0.1):
        time.sleep(wait)
        drop_pages(fd)
        resident, total = resident_pages(fd, offset, length)
        if resident == 0:
            break
    return resident, total


# ---------------------------------------------------------------------- residency (mincore)


def test_mincore_sees_a_read_file_resident_and_a_dropped_one_not(tmp_path):
    path = tmp_path / "f.bin"
    size = MiB + 100
    path.write_bytes(os.urandom(size))
    reason = cold_unsupported_reason(path)
    if reason:
        pytest.skip(f"page residency cannot be forced or checked here: {reason}")
    fd = os.open(path, os.O_RDWR)
    try:
        os.fsync(fd)  # dirty pages cannot be dropped (posix_fadvise(2), NOTES)
        while os.read(fd, MiB):
            pass
        resident, total = resident_pages(fd, 0, size)
        # mincore(2): one vector byte per page of the range, rounded up to whole pages.
        assert total == -(-size // 4096) == 257
        assert resident == total
        resident, total = dropped(fd, 0, size)
        if resident and "tmpfs" in (probe_mod.storage_info(tmp_path)["fs_type"] or ""):
            pytest.skip("the test directory is on tmpfs, whose pages cannot be dropped")
        assert resident == 0 and total == 257
    finally:
        os.close(fd)


def test_mincore_counts_the_pages_an_unaligned_range_touches(tmp_path):
    path = tmp_path / "f.bin"
    path.write_bytes(os.urandom(64 * KiB))
    if residency_problem(path):
        pytest.skip(residency_problem(path))
    fd = os.open(path, os.O_RDONLY)
    try:
        # bytes 5000..14999 lie on the pages starting at 4096, 8192 and 12288 (4 KiB pages)
        assert resident_pages(fd, 5000, 10000)[1] == 3
        assert resident_pages(fd, 4096, 4096)[1] == 1
    finally:
        os.close(fd)


def test_scratch_file_is_random_full_and_droppable_right_after_writing(tmp_path):
    path = tmp_path / "s.bin"
    write_scratch_file(path, 256 * KiB, 3, seed=1)
    data = path.read_bytes()
    assert len(data) == 768 * KiB
    assert data.count(0) < len(data) // 100  # random bytes, not zeros: about 1 in 256 is zero
    assert os.stat(path).st_blocks * 512 >= len(data)  # not sparse
    reason = cold_unsupported_reason(path)
    if reason:
        pytest.skip(reason)
    fd = os.open(path, os.O_RDONLY)
    try:
        # writing left the pages in memory; because the writer fsynced, they can be dropped at once
        assert dropped(fd, 0, len(data))[0] == 0
    finally:
        os.close(fd)


# ---------------------------------------------------------------------- figures


def test_latency_stats_use_linear_interpolation_between_order_statistics():
    # Hyndman & Fan (1996), "Sample quantiles in statistical packages", definition 7
    # (numpy.percentile's default 'linear'): for 1..5, p50 = 3, p95 = 4.8, p99 = 4.96.
    s = latency_stats([1_000_000, 2_000_000, 3_000_000, 4_000_000, 5_000_000], 3_000_000, ceiling_gb_s=2.0)
    assert s["p50_s"] == pytest.approx(3.0e-3)
    assert s["p95_s"] == pytest.approx(4.8e-3)
    assert s["p99_s"] == pytest.approx(4.96e-3)
    assert s["max_s"] == pytest.approx(5.0e-3)
    assert s["mean_s"] == pytest.approx(3.0e-3)
    assert s["gb_s"] == pytest.approx(1.0)  # 3e6 bytes in 3 ms
    assert s["of_ceiling"] == pytest.approx(0.5)
    assert all(v is None for v in latency_stats([], 10, 2.0).values())


def test_figures_are_positive_and_regimes_are_labelled_and_separate(tmp_path):
    doc = run_probe(sizes=[MiB, 8 * MiB], runs=5, work_dir=work_dir(tmp_path))
    assert doc["schema"] == SCHEMA
    assert doc["ceiling"]["gb_s"] > 0 and doc["ceiling"]["bytes"] == 64 * MiB
    assert [b["bytes"] for b in doc["blocks"]] == [MiB, 8 * MiB]
    for b in doc["blocks"]:
        assert b["warm"] is not b["cold"]
        assert b["warm"]["regime"] == "warm" and b["cold"]["regime"] == "cold"
        assert b["distinct_offsets"] >= 2
        for r in ("warm", "cold"):
            g = b[r]
            if g["runs"] == 0:
                assert r == "cold" and not g["verified"] and g["reason"]
                continue
            assert g["runs"] == 5
            assert 0 < g["p50_s"] <= g["p95_s"] <= g["p99_s"] <= g["max_s"]
            assert g["gb_s"] > 0 and g["of_ceiling"] > 0
            # figures carry six significant digits
            assert g["of_ceiling"] == pytest.approx(g["gb_s"] / doc["ceiling"]["gb_s"], rel=1e-4)
            assert g["gb_s"] == pytest.approx(b["bytes"] / g["p50_s"] / 1e9, rel=1e-4)


def test_an_eight_times_larger_block_takes_longer_at_the_median(tmp_path):
    # Moving 8x the bytes: the median read time grows (about 8x); only the order is asserted.
    doc = run_probe(sizes=[MiB, 8 * MiB], runs=7, work_dir=work_dir(tmp_path))
    small, large = doc["blocks"]
    assert large["warm"]["p50_s"] > small["warm"]["p50_s"]
    if small["cold"]["runs"] and large["cold"]["runs"]:
        assert large["cold"]["p50_s"] > small["cold"]["p50_s"]


def test_cold_runs_are_checked_not_resident_before_each_read(tmp_path):
    d = work_dir(tmp_path)
    probe_file = d / "x"
    probe_file.write_bytes(b"x")
    reason = cold_unsupported_reason(probe_file)
    probe_file.unlink()
    if reason:
        pytest.skip(reason)
    doc = run_probe(sizes=[512 * KiB], runs=4, work_dir=d)
    cold, warm = doc["blocks"][0]["cold"], doc["blocks"][0]["warm"]
    assert cold["verified"] is True and cold["check"] and "mincore" in cold["check"]
    assert warm["verified"] is True
    assert cold["runs"] == 4


# ---------------------------------------------------------------------- honesty when cold cannot be forced or checked


def test_unverifiable_cold_is_labelled_unverified_not_passed_off(tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(probe_mod, "residency_problem", lambda path: "no mincore on this test system")
    d = work_dir(tmp_path)
    code = cli.main(["probe", "--sizes", "256KiB", "--runs", "3", "--dir", str(d)])
    text = capsys.readouterr().out
    assert code == 0
    assert "UNVERIFIED" in text and "no mincore on this test system" in text
    doc = run_probe(sizes=[256 * KiB], runs=3, work_dir=d)
    cold = doc["blocks"][0]["cold"]
    assert cold["verified"] is False
    assert cold["reason"].startswith("unverified: no mincore")
    assert cold["check"] is None


def test_cold_is_not_measured_where_pages_cannot_be_dropped(tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(probe_mod, "drop_problem", lambda: "posix_fadvise missing here")
    doc = run_probe(sizes=[256 * KiB], runs=3, work_dir=work_dir(tmp_path))
    cold = doc["blocks"][0]["cold"]
    assert cold["verified"] is False and cold["runs"] == 0
    assert cold["p50_s"] is None and cold["gb_s"] is None
    assert "not measured" in cold["reason"]
    assert doc["blocks"][0]["warm"]["runs"] == 3


def test_a_drop_that_leaves_pages_resident_yields_no_cold_figure(tmp_path, monkeypatch, capsys):
    d = work_dir(tmp_path)
    marker = d / "m"
    marker.write_bytes(b"m")
    if residency_problem(marker):
        pytest.skip(residency_problem(marker))
    marker.unlink()
    monkeypatch.setattr(probe_mod, "drop_pages", lambda fd: None)  # a drop that does nothing (like tmpfs)
    monkeypatch.setattr(probe_mod.time, "sleep", lambda s: None)
    code = cli.main(["probe", "--sizes", "256KiB", "--runs", "3", "--dir", str(d)])
    text = capsys.readouterr().out
    assert code == 0
    assert "NOT MEASURED" in text and "stayed resident" in text
    doc = run_probe(sizes=[256 * KiB], runs=3, work_dir=d)
    cold = doc["blocks"][0]["cold"]
    assert cold["runs"] == 0 and cold["discarded"] >= 1 and cold["verified"] is False
    assert cold["p50_s"] is None


# ---------------------------------------------------------------------- temporary files


def test_temporary_files_are_gone_afterwards(tmp_path):
    d = work_dir(tmp_path)
    run_probe(sizes=[64 * KiB, 256 * KiB], runs=2, work_dir=d)
    assert list(d.iterdir()) == []


def test_temporary_files_are_gone_after_an_exception(tmp_path, monkeypatch):
    d = work_dir(tmp_path)

    def fail(*a, **k):
        assert any(d.iterdir())  # the file exists while reads are timed
        raise RuntimeError("injected")

    monkeypatch.setattr(probe_mod, "time_regime", fail)
    with pytest.raises(RuntimeError, match="injected"):
        run_probe(sizes=[256 * KiB], runs=2, work_dir=d)
    assert list(d.iterdir()) == []


def test_ctrl_c_exits_130_and_removes_the_temporary_directory(tmp_path, monkeypatch, capsys):
    base = tmp_path / "tmp"
    base.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(base))

    def interrupt(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(probe_mod, "time_regime", interrupt)
    assert cli.main(["probe", "--sizes", "256KiB", "--runs", "2"]) == 130
    assert "interrupted" in capsys.readouterr().err
    assert list(base.iterdir()) == []


def test_default_temporary_directory_is_removed(tmp_path, monkeypatch):
    base = tmp_path / "tmp"
    base.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(base))
    run_probe(sizes=[64 * KiB], runs=2)
    assert list(base.iterdir()) == []


# ---------------------------------------------------------------------- the model's experts


def test_model_block_reads_the_experts_at_their_real_size_and_offsets(tiny_model, tmp_path):
    doc = run_probe(model_dir=tiny_model, runs=3)
    (b,) = doc["blocks"]
    store = ModelStore.open(tiny_model)
    try:
        assert b["source"] == "model" and b["bytes"] == store.expert_nbytes
        starts = {r.start for row in store.ranges for r in row}
    finally:
        store.close()
    block = probe_mod.model_block(tiny_model, 3)
    assert set(block.offsets) <= starts and len(block.offsets) == 3
    assert b["model"]["synthetic"] is True
    assert doc["note"] == RANDOM_NOTE


def test_missing_default_model_without_sizes_is_a_usage_error(tmp_path, monkeypatch, capsys):
    monkeypatch.setenv("MOERUN_MODEL", str(tmp_path / "nowhere"))
    assert cli.main(["probe"]) == 2
    assert "--sizes" in capsys.readouterr().err


@pytest.mark.parametrize("sizes", ["12XB", "", "0"])
def test_bad_sizes_are_usage_errors(capsys, sizes):
    assert cli.main(["probe", "--sizes", sizes]) == 2
    assert "moerun probe:" in capsys.readouterr().err


def test_parse_sizes_reads_binary_and_decimal_units():
    assert parse_sizes("1MiB,16MiB, 1.5GB") == [MiB, 16 * MiB, 1_500_000_000]


# ---------------------------------------------------------------------- JSON, --save and load_probe


def documented_example() -> dict:
    text = DOC.read_text(encoding="utf-8")
    m = re.search(r"<!-- schema-example -->\s*```json\n(.*?)```", text, re.S)
    assert m, "docs/design/file-formats.md must hold the schema example after <!-- schema-example -->"
    return json.loads(m.group(1))


def same_shape(got, want, where="$") -> None:
    """Every documented key present and no undocumented one; numbers where numbers are documented."""
    if isinstance(want, dict):
        assert isinstance(got, dict), where
        assert set(got) == set(want), f"{where}: keys {sorted(set(got) ^ set(want))} differ from docs/design/file-formats.md"
        for k in want:
            same_shape(got[k], want[k], f"{where}.{k}")
    elif isinstance(want, list):
        assert isinstance(got, list), where
        for i, item in enumerate(got):
            match = next((w for w in want if not isinstance(w, dict) or w.get("source") == item.get("source")), want[0])
            same_shape(item, match, f"{where}[{i}]")
    elif isinstance(want, bool):
        assert isinstance(got, bool), where
    elif isinstance(want, (int, float)):
        assert got is None or (isinstance(got, (int, float)) and not isinstance(got, bool)), where


def test_json_output_matches_the_documented_schema_and_saves_what_load_probe_reads(tiny_model, tmp_path, capsys):
    saved = tmp_path / "probe.json"
    argv = ["probe", "--model", str(tiny_model), "--sizes", "256KiB", "--runs", "3", "--dir", str(work_dir(tmp_path)),
            "--json", "--save", str(saved)]
    assert cli.main(argv) == 0
    out = capsys.readouterr().out
    doc = json.loads(out)  # the whole of stdout is one JSON document
    same_shape(doc, documented_example())
    assert [b["source"] for b in doc["blocks"]] == ["model", "tempfile"]
    assert load_probe(saved) == doc


def test_load_probe_rejects_what_a_planner_cannot_use(tmp_path):
    good = run_probe(sizes=[64 * KiB], runs=2, work_dir=work_dir(tmp_path))
    path = tmp_path / "p.json"

    def attempt(doc_or_text):
        path.write_text(doc_or_text if isinstance(doc_or_text, str) else json.dumps(doc_or_text))
        return load_probe(path)

    assert attempt(good)["schema"] == SCHEMA
    with pytest.raises(BadOption, match="no such probe file"):
        load_probe(tmp_path / "absent.json")
    with pytest.raises(BadOption, match="directory"):
        load_probe(tmp_path)
    with pytest.raises(BadInput, match="not a JSON document"):
        attempt("{not json")
    with pytest.raises(BadInput, match="schema"):
        attempt({**good, "schema": "other/1"})
    with pytest.raises(BadInput, match="blocks"):
        attempt({**good, "blocks": []})
    broken = json.loads(json.dumps(good))
    del broken["blocks"][0]["cold"]["p95_s"]
    with pytest.raises(BadInput, match="p95_s"):
        attempt(broken)
    unexplained = json.loads(json.dumps(good))
    unexplained["blocks"][0]["cold"].update(verified=False, reason=None)
    with pytest.raises(BadInput, match="no reason"):
        attempt(unexplained)
    disordered = json.loads(json.dumps(good))
    g = disordered["blocks"][0]["warm"]
    g["p50_s"], g["max_s"] = g["max_s"] + 1, g["p50_s"]
    with pytest.raises(BadInput, match="order"):
        attempt(disordered)


def test_probe_refuses_its_save_destination_before_measuring_anything(tmp_path, capsys, monkeypatch):
    import moerun.prober.jobs as probe_job  # the library function the command calls

    def must_not_run(*a, **k):
        raise AssertionError("measured although the destination was refused")

    monkeypatch.setattr(probe_job, "run_probe", must_not_run)
    taken = tmp_path / "taken.json"
    taken.write_text("the user's")
    assert cli.main(["probe", "--sizes", "64KiB", "--save", str(taken)]) == 2
    err = capsys.readouterr().err
    assert "--force" in err and taken.read_text() == "the user's"


def test_too_little_disk_for_probes_temporary_file_is_an_output_error(tmp_path, monkeypatch):
    import collections
    import shutil

    from moerun.errors import BadOption, OutputError
    from moerun.prober import pagein as probe_mod

    Usage = collections.namedtuple("Usage", "total used free")
    monkeypatch.setattr(shutil, "disk_usage", lambda path: Usage(10**6, 10**6 - 1000, 1000))
    with pytest.raises(OutputError) as e:
        probe_mod._fit_slots(tmp_path, 1 << 20)
    assert not isinstance(e.value, BadOption)


@pytest.mark.parametrize("where", ["--dir", "TMPDIR"])
def test_probe_on_a_read_only_file_system_is_one_line_and_exit_2(tmp_path, capsys, monkeypatch, where):
    # issue 23, item 8: a scratch file or directory that cannot be made is refused, not a traceback from tempfile
    import tempfile

    from conftest import tmpfs

    from moerun.cli.main import main

    with tmpfs(tmp_path / "ro", read_only=True) as ro:
        if where == "TMPDIR":
            monkeypatch.setattr(tempfile, "tempdir", str(ro))
            argv = ["probe", "--sizes", "1MiB", "--runs", "1"]
        else:
            argv = ["probe", "--sizes", "1MiB", "--runs", "1", "--dir", str(ro)]
        code = main(argv)
    captured = capsys.readouterr()
    assert code == 2 and captured.out == ""
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and "read-only" in lines[0].lower() and "--dir" in lines[0]


@pytest.mark.parametrize("variant", ["qwen2_moe-bf16-sharded-v4", "qwen3_moe-bf16-fused-sharded"])
def test_an_open_checkpoints_experts_are_probed_as_the_engine_reads_them_from_their_shards(variant):
    """tests/fixtures/open: checkpoints the transformers library wrote, experts straddling shard files."""
    import numpy as np

    from moerun.files.ckpt_store import open_store
    from moerun.prober.pagein import aligned_buffer, model_block

    d = Path(__file__).resolve().parent.parent / "fixtures" / "open" / variant
    block = model_block(d, 6)
    store = open_store(d)
    fds = [os.open(p, os.O_RDONLY) for p in block.paths]
    try:
        assert block.info["model_type"] == variant.split("-")[0] and block.info["files"] == len(block.paths) > 1
        assert block.nbytes == store.expert_nbytes and len(block.offsets) == 6
        buf = aligned_buffer(block.buffer_bytes)
        own = np.zeros(store.slot_nbytes, np.uint8)
        for sample in block.offsets:
            sp = block.spans[sample]
            block.read(fds, sample, buf)
            store.copy_in(store.config.routed_blocks().index(sp.layer), sp.expert, own)  # spans number stack layers
            assert bytes(buf[: store.slot_nbytes]) == own.tobytes()
    finally:
        for fd in fds:
            os.close(fd)
        store.close()
    doc = probe_mod.run_probe(d, runs=3)
    (entry,) = doc["blocks"]
    assert entry["source"] == "model" and entry["model"]["reads_per_expert"] >= 2
    assert entry["warm"]["verified"] and entry["warm"]["runs"] == 3
