"""What a quantization made and measured (``QuantReport``), and the CARD.md that tells a reader (offline).

The card says how the file was made (the command, the method and its
settings), what this very run measured (sizes, weight errors, held-out
perplexity), and, apart and labelled as such, the row of the last
``scripts/bench_quant.py`` run for the same setting, which the package ships
as moerun/data/quant_bench.json (never read from docs/ at run time).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from importlib.resources import files

from moerun.files.config import ModelConfig
from moerun.files.packed import QuantSpec


@dataclass
class QuantReport:
    """What ``moerun.makers.quantize.quantize_model`` made and measured."""

    out_dir: str
    spec: QuantSpec
    source_name: str
    file_bytes: int
    source_file_bytes: int
    expert_bytes: int
    source_expert_bytes: int
    expert_rel_rms: float  # ||W - w|| / ||W|| over all experts
    attn_rel_rms: float  # the same for attention (float16 rounding when attn_bits is 16)
    seconds: float
    heldout: dict | None = None  # perplexities measured in the same run
    attn_dtype: str = "F16"  # how attention is stored at attn_bits 16: F16, or BF16 kept from a BF16 source

    def to_json(self) -> dict:
        return {
            "out_dir": self.out_dir,
            "quant": self.spec.to_json(),
            "source": self.source_name,
            "file_bytes": self.file_bytes,
            "source_file_bytes": self.source_file_bytes,
            "expert_bytes": self.expert_bytes,
            "source_expert_bytes": self.source_expert_bytes,
            "expert_rel_rms_error": self.expert_rel_rms,
            "attn_rel_rms_error": self.attn_rel_rms,
            "seconds": self.seconds,
            "heldout": self.heldout,
            "attn_dtype": self.attn_dtype if self.spec.attn_bits == 16 else "U8",
        }


def setting_tag(spec: QuantSpec) -> str:
    """A short name for a setting (``e4-a16-rtn-g64``): the suffix of a quantized model's name."""
    return f"e{spec.expert_bits}-a{spec.attn_bits}-{spec.method}-g{spec.group}"


def bench_rows_path():
    """The last results of scripts/bench_quant.py, shipped inside the package (moerun/data/quant_bench.json, built by scripts/make_quant_table.py)."""
    return files("moerun") / "data" / "quant_bench.json"


def bench_row(source_name: str, spec: QuantSpec) -> tuple[dict, dict] | None:
    """The row of scripts/bench_quant.py's last run for this setting, if the package carries its results."""
    path = bench_rows_path()
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
        for row in doc.get("rows", []):
            if (
                row.get("model") == source_name
                and row.get("expert_bits") == spec.expert_bits
                and row.get("attn_bits") == spec.attn_bits
                and row.get("method") == spec.method
                and row.get("group") == spec.group
            ):
                return doc, row
    except (OSError, ValueError, AttributeError):
        return None
    return None


def _method_text(s: QuantSpec) -> str:
    """How scales and zeros were chosen, with hqq's settings spelled out (they are part of the result)."""
    if s.method == "rtn":
        return "Scales and zeros come from round-to-nearest over each group's range widened to include zero (rtn)."
    return (
        "Scales come from round-to-nearest over each group's range widened to include zero; zero points are then "
        f"refined by half-quadratic quantization (Badri and Shaji, 2023) for the lp error with p = {s.hqq['p']}, "
        f"beta = {s.hqq['beta']} (in quantization steps), kappa = {s.hqq['kappa']}, {s.hqq['iters']} iterations, "
        "keeping per group whichever zero point (the rtn start or an iterate) has the smallest lp error."
    )


def _how_section(s: QuantSpec, c: ModelConfig, attn_dtype: str = "F16") -> list[str]:
    """The card's "How": the formula, the method, attention and what keeps its dtype (memory use included)."""
    attn = (
        ("Attention matrices are stored as float16." if attn_dtype == "F16" else
         "Attention matrices keep the source's BF16 (as small as float16, and exact).")
        if s.attn_bits == 16
        else f"Attention matrices are quantized the same way to {s.attn_bits} bits and dequantized once at load."
    ) + " Either way the engine holds attention as float32 in memory: this choice changes the file, not the memory use."
    return [
        "## How",
        "",
        f"Every expert matrix (w_gate, w_up, w_down, shapes (in, out)) is cut along its input axis into groups of "
        f"{s.group} rows; each column of each group has a float16 scale s and zero point z, and each weight becomes a "
        f"{s.expert_bits}-bit code q = clip(round(W/s + z), 0, {(1 << s.expert_bits) - 1}); the engine computes "
        "w = (q - z) * s in float32 when it needs the expert.",
        "",
        _method_text(s),
        "",
        attn,
        "",
        ("Embeddings, norms, routers and the shared expert (dense, always resident)" if c.d_shared else "Embeddings, norms and routers")
        + (", and the parts of its architecture (q/k norms, biases, the shared expert's gate, dense layers)" if c.arch else "")
        + " keep the source's dtype. Each expert is one uint8 tensor "
        "`layers.{l}.experts.{e}.packed`; the byte layout is in docs/design/quant.md of moerun.",
    ]


def _measured_section(r: QuantReport) -> list[str]:
    """The card's table of what this run measured: sizes against the source, weight errors, held-out perplexity."""
    lines = [
        "## Measured while quantizing",
        "",
        "| quantity | value |",
        "| --- | --- |",
        f"| model.safetensors | {r.file_bytes:,} B (source {r.source_file_bytes:,} B, {100 * r.file_bytes / r.source_file_bytes:.1f} %) |",
        f"| one expert | {r.expert_bytes:,} B (source {r.source_expert_bytes:,} B, {100 * r.expert_bytes / r.source_expert_bytes:.1f} %) |",
        f"| expert weights, relative RMS error ‖W − w‖/‖W‖ | {100 * r.expert_rel_rms:.3f} % |",
        f"| attention weights, relative RMS error | {100 * r.attn_rel_rms:.3f} % |",
    ]
    h = r.heldout
    if h:
        lines += [
            f"| held-out perplexity, source ({h.get('text', 'heldout.txt')}, {h['predicted_tokens']:,} tokens) | {h['source']['perplexity']:.4f} |",
            f"| held-out perplexity, this model (same tokens) | {h['quantized']['perplexity']:.4f} "
            f"({100 * h['relative_change']:+.2f} %) |",
            "",
            "Scoring rule (`moerun score`): windows of the bos token plus the next max_seq_len - 1 tokens; every token "
            "of the text is predicted once; perplexity = exp(mean cross-entropy). The source's own card may use another "
            "rule (`moerun score --plain-windows` scores windows without an inserted bos).",
        ]
    return lines


def _bench_section(r: QuantReport) -> list[str]:
    """The benchmark's row for this setting, labelled as not measured in this run; nothing if there is none."""
    found = bench_row(r.source_name, r.spec)
    if found is None:
        return []
    doc, row = found
    link = doc.get("link_speed_emulated")
    fp32_ppl = doc.get("fp32", {}).get("perplexity")
    return [
        "",
        "## From the quantization benchmark (not measured in this run)",
        "",
        f"scripts/bench_quant.py, {doc.get('date', '?')} on {doc.get('machine', '?')}; BLAS {doc.get('blas_threads', '?')}. "
        "Cap: the model's fixed parts plus one third of the float32 model's expert bytes (see docs/research/quant.md).",
        "",
        "| file | bytes/expert | held-out ppl (fp32) | cap | decode tok/s at cap |"
        + (f" same, {link / 1e9:g} GB/s link (emulated) |" if link else ""),
        "| --- | --- | --- | --- | --- |" + (" --- |" if link else ""),
        f"| {row['file_bytes'] / 2**20:.2f} MiB | {row['expert_bytes']:,} | {row['perplexity']:.4f}"
        + (f" ({fp32_ppl:.4f})" if fp32_ppl else "")
        + f" | {row['cap_bytes'] / 2**20:.2f} MiB | {row['decode_tok_s']:.0f} |"
        + (f" {row['decode_tok_s_link']:.0f} |" if link and "decode_tok_s_link" in row else (" - |" if link else "")),
    ]


def card_text(r: QuantReport, c: ModelConfig, src, command: str | None, when: str, machine: str, version: str) -> str:
    """CARD.md of a quantized model: title, provenance (command, date, machine), how, measured, benchmark row."""
    s = r.spec
    name = c.name or src.name
    cmd = command or (
        f"moerun quantize --model {src} {r.out_dir} --expert-bits {s.expert_bits} "
        f"--attn-bits {s.attn_bits} --group {s.group} --method {s.method}"
    )
    lines = [
        f"# {name}, quantized: {s.expert_bits}-bit experts ({s.method}), "
        + (("float16" if r.attn_dtype == "F16" else "BF16") + " attention" if s.attn_bits == 16 else f"{s.attn_bits}-bit attention"),
        "",
        f"Made from `{src}` ({name}) by moerun {version} on {when} ({machine}), in {r.seconds:.1f} s:",
        "",
        f"    {cmd}",
        "",
        *_how_section(s, c, r.attn_dtype),
        "",
        *_measured_section(r),
        *_bench_section(r),
        "",
    ]
    return "\n".join(lines)
