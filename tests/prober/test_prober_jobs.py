"""moerun.probe: returns what 'moerun probe --json' prints, apart from the figures each run measures anew."""

from __future__ import annotations

from _jobs import as_json, cli_json

import moerun

# measured anew on each run: the time stamp, the copy speed (gb_s, best_s), free memory, and every timing figure of a regime
MEASURED_REGIME = ("p50_s", "p95_s", "p99_s", "max_s", "mean_s", "gb_s", "of_ceiling", "discarded", "verified", "reason")


def _stable(doc: dict) -> dict:
    doc = dict(doc)
    doc.pop("created")
    doc["ceiling"] = {k: v for k, v in doc["ceiling"].items() if k not in ("gb_s", "best_s")}
    doc["machine"] = {k: v for k, v in doc["machine"].items() if "avail" not in k}  # free memory now
    doc["blocks"] = [{k: ({m: x for m, x in v.items() if m not in MEASURED_REGIME} if k in ("warm", "cold") else v)
                      for k, v in b.items()} for b in doc["blocks"]]
    return doc


def test_probe_returns_what_the_command_prints(small_model, tmp_path, capsys):
    work = tmp_path / "work"
    work.mkdir()
    result = moerun.probe(small_model, ["64KiB"], runs=2, work_dir=work, save=tmp_path / "probe.json")
    assert isinstance(result, moerun.ProbeResult) and [b["bytes"] for b in result.blocks][1] == 65536
    code, doc = cli_json(capsys, "probe", "--model", small_model, "--sizes", "64KiB", "--runs", 2, "--dir", work)
    assert code == 0
    assert _stable(as_json(result.to_json())) == _stable(doc)
