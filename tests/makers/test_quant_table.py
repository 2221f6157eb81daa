"""moerun/data/quant_bench.json: the quantization table shipped in the package and quoted in quantize's cards.

It is built on purpose by scripts/make_quant_table.py from one scripts/bench_quant.py run; no
benchmark writes into the package. These tests check the shipped file: it parses, it has every
field the card reads (moerun/makers/_card.py), and a card renders each of its rows.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

import moerun
from moerun.files.config import ModelConfig
from moerun.files.packed import QuantSpec
from moerun.makers import _card

ROOT = Path(__file__).resolve().parents[2]


def shipped() -> dict:
    return json.loads(Path(str(_card.bench_rows_path())).read_text(encoding="utf-8"))


def test_the_shipped_table_parses_and_has_every_field_the_card_reads():
    doc = shipped()
    for key in ("date", "machine", "blas_threads"):
        assert isinstance(doc[key], str) and doc[key], key
    assert isinstance(doc["fp32"]["perplexity"], float)
    link = doc["link_speed_emulated"]
    assert link is None or link > 0
    assert doc["rows"]
    for row in doc["rows"]:
        assert isinstance(row["model"], str) and isinstance(row["method"], str)
        for key in ("expert_bits", "attn_bits", "group"):
            assert isinstance(row[key], int) and not isinstance(row[key], bool), key
        QuantSpec.checked(row["expert_bits"], row["attn_bits"], row["group"], row["method"])  # a setting quantize makes
        for key in ("file_bytes", "expert_bytes", "perplexity", "cap_bytes", "decode_tok_s") + (("decode_tok_s_link",) if link else ()):
            assert isinstance(row[key], (int, float)) and row[key] > 0, key


def test_a_card_renders_every_row_of_the_shipped_table():
    doc = shipped()
    config = ModelConfig.load(moerun.default_model_dir())
    for row in doc["rows"]:
        spec = QuantSpec.checked(row["expert_bits"], row["attn_bits"], row["group"], row["method"])
        report = _card.QuantReport(out_dir="out", spec=spec, source_name=row["model"], file_bytes=1, source_file_bytes=2,
                                   expert_bytes=1, source_expert_bytes=2, expert_rel_rms=0.01, attn_rel_rms=0.001, seconds=1.0)
        text = _card.card_text(report, config, Path("src"), None, "today", "here", moerun.__version__)
        section = text.split("## From the quantization benchmark (not measured in this run)", 1)[1]
        assert doc["date"] in section and doc["machine"] in section
        assert f"{row['perplexity']:.4f}" in section and f"| {row['decode_tok_s']:.0f} |" in section
        assert f"({doc['fp32']['perplexity']:.4f})" in section


@pytest.mark.parametrize("script", sorted(p.name for p in (ROOT / "scripts").glob("*.py")))
def test_only_make_quant_table_writes_the_package_data(script):
    text = (ROOT / "scripts" / script).read_text(encoding="utf-8")
    writes_package = '"moerun" / "data"' in text or "'moerun' / 'data'" in text
    assert writes_package == (script == "make_quant_table.py")
