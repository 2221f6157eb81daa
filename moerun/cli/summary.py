"""The end-of-run summary shown by generate (and score): speed, budget, pool behaviour, memory."""

from __future__ import annotations

from moerun.cli.report import pct, table
from moerun.files.config import RANDOM_NOTE as config_note
from moerun.runtime.capcheck import CAP_ALLOWANCE_BYTES, cap_check, cap_warning  # noqa: F401 (the commands' names for them)
from moerun.units import SHARED_POOL, fmt_bytes, fmt_prefetch, fmt_rate, fmt_tok_s

NOT_ADVICE = "text from a tiny model trained on invented data; not advice"
RANDOM_NOTE = f"{config_note} and the text is noise"  # what a generation from random weights needs said
def model_note(config) -> str:
    """The caveat printed with any output of this model."""
    return RANDOM_NOTE if config.extra.get("synthetic") else NOT_ADVICE


def slots_text(split: str, slots) -> str:
    """The pool's slots in text: ``slots: 8 (shared pool)`` or ``slots per layer: 2,2,2``."""
    if split == "shared":
        return f"slots: {sum(slots)} ({SHARED_POOL})"
    return f"slots per layer: {','.join(map(str, slots))}"


def run_json(engine, gen=None) -> dict:
    st = engine.stats
    doc: dict = {}
    if gen is not None:
        doc.update(
            {
                "prompt_tokens": len(gen.prompt_ids),
                "new_tokens": len(gen.new_ids),
                "stop": gen.stop,
                "prefill_s": gen.prefill_ns / 1e9,
                "prefill_tok_s": gen.prefill_tok_s,
                "decode_steps": gen.decode_steps,
                "decode_s": gen.decode_ns / 1e9,
                "decode_tok_s": gen.decode_tok_s,
            }
        )
    doc.update(st)
    if gen is not None and not gen.decode_steps:
        doc["decode_tok_s"] = None  # no decode step was timed: no speed to report
    link = engine.options.get("link_speed")
    doc["link_emulated"] = link is not None
    chk = cap_check(engine)
    if chk is not None:
        doc["cap_exceeded"] = chk["exceeded"]
        doc["cap_allowance_bytes"] = chk["allowance_bytes"]
    if gen is not None and "pool" in st and gen.decode_ns + gen.prefill_ns:
        doc["stall_share"] = st["pool"]["stall_s"] * 1e9 / (gen.decode_ns + gen.prefill_ns)
    return doc


def run_text(engine, gen=None) -> str:
    doc = run_json(engine, gen)
    lines = []
    if gen is not None:
        speed = (f"decode {fmt_tok_s(doc['decode_tok_s'])} tok/s" if gen.decode_steps
                 else "no decode step timed (the last new token comes from prefill)" if gen.new_ids else "no decode step")
        lines.append(
            f"prompt {doc['prompt_tokens']} tok, prefill {fmt_tok_s(doc['prefill_tok_s'])} tok/s | "
            f"new {doc['new_tokens']} tok, {speed}"
            + (" | stopped: context full" if gen.stop == "context-full" else "")
            + (" | stopped: end-of-sequence token" if gen.stop == "eos" else "")
        )
    b = engine.budget
    link = engine.options.get("link_speed")
    if link is not None:
        lines.append(f"link: {fmt_rate(link)} (emulated)")
    if engine.options.get("routing"):
        lines.append(f"routing replayed from {engine.options['routing']} (not the model's routers)")
    if engine.options.get("cold"):
        lines.append("cold start: the model file's pages were dropped from the OS page cache before the run")
    if b.cap is not None:
        rows = [[name, fmt_bytes(n)] for name, n in b.rows()]
        rows.append(["total / cap", f"{fmt_bytes(b.total)} / {fmt_bytes(b.cap)}"])
        lines.append(table(["budget", "size"], rows))
        lines.append(slots_text(b.split, b.slots))
    pool = doc.get("pool")
    if pool and b.cap is not None:
        rows = [
            [str(p["layer"]), p["accesses"], p["hits"], p["prefetch_hits"], p["misses"], pct(p["hit_rate"])]
            for p in pool["per_layer"]
        ]
        rows.append(["all", pool["accesses"], pool["hits"], pool["prefetch_hits"], pool["misses"], pct(pool["hit_rate"])])
        lines.append(table(["layer", "accesses", "hits", "prefetched", "misses", "hit rate"], rows))
        pf = pool["prefetch"]
        if engine.options.get("prefetch"):
            o = engine.options
            lines.append(
                f"prefetch ({fmt_prefetch(o['prefetch'], o.get('lookahead'), o.get('prefetch_from'))}): "
                f"{pf['guesses']} guesses, {pf['loads']} loads, {pf['used']} used "
                f"({pct(pf['accuracy'])} accurate), {fmt_bytes(pf['wasted_bytes'])} wasted, "
                f"{pf['hidden_s'] * 1e3:.1f} ms of page-in hidden"
                + ("" if doc.get("reader_alive", True) else "; the reader process exited, so the engine read for itself")
            )
        stall = doc.get("stall_share")
        lines.append(
            f"paged in {fmt_bytes(pool['bytes_paged_in'])}; stalled {pool['stall_s'] * 1e3:.1f} ms"
            + (f" ({pct(stall)} of run time)" if stall is not None else "")
        )
    cap = f" (cap {fmt_bytes(b.cap)})" if b.cap is not None else ""
    reader = doc.get("reader_rss_bytes")
    lines.append(
        f"peak resident-set growth {fmt_bytes(doc['peak_rss_growth_bytes'])}{cap}"
        + (f"; prefetch reader process {fmt_bytes(reader)} (outside the cap, like the interpreter)" if reader else "")
    )
    return "\n".join(lines)
