"""Injected faults, corrupted bytes at rest, and the limits of the context.

Faults are injected through the documented test hooks (docs/design/testing.md):

- ``store.fault_hook(layer, expert, guess)``: the one fault seam; runs before every expert read, on the compute
  thread (for a read handed to the reader process, when it is handed over; raising there fails that
  hand-over); ``guess`` says the read is a guess's, so a hook can fail guesses only;
- ``prefetcher.reader.set_faults(...)``: random delays before the reader's reads, reported failures of
  every n-th read, or the reader process exiting abruptly with a read outstanding.

A run with a fault ends in one of two ways (docs/design/architecture.md, invariants: offloading never changes
numbers; prefetch is advisory): a correct finish whose tokens and logits are bit-identical to the fully
resident engine's, or one clear error (``PageInError``, exit 2 with one stderr line).  It never hangs: every run here goes through a watchdog.  With
``generate --trace FILE`` the trace is then either complete or marked ``"partial": true``, readable,
and the routing it holds is a prefix of the complete run's.

To make a read fail for real (not just raise from a hook) the hooks below swap the store's file
descriptor for one of a directory with ``os.dup2``: ``pread`` on a directory fails with EISDIR
(POSIX pread(2): "[EISDIR] The fildes argument refers to a directory" is listed for Linux;
common practice, no source beyond the man page).
"""

from __future__ import annotations

import contextlib
import errno
import faulthandler
import io
import json
import os
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
from conftest import ROOT, copy_model, edit_config, reader_processes

import moerun
from moerun.cli import main as cli
from moerun.errors import BadOption, ModelFileChanged, PageInError
from moerun.files.modelfile import read_header
from moerun.files.trace import read_trace
from moerun.makers.synthetic import synth_config, write_model
from moerun.model.sampling import Sampling
from moerun.runtime.budget import minimum_cap

pytestmark = pytest.mark.usefixtures("every_guess_read")  # the prefetch machinery runs whatever guesses cost

SAMPLING = Sampling(temperature=0.8, top_p=0.95, seed=3)
PROMPT_IDS = [0, 12, 40, 7, 99, 150, 3, 61, 61, 200, 18]
MAX_NEW = 24
WATCHDOG_S = 60  # these runs take well under a second; a minute means a hang, not a slow machine


def _bits(a) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float32).view(np.uint32)


def _within(seconds: float, fn, *args, dump: bool = True, **kw):
    """Run fn on a worker thread; its result or its exception, or fail the test (with stacks) if it hangs."""
    box: dict = {}

    def target():
        try:
            box["value"] = fn(*args, **kw)
        except BaseException as e:  # handed to the test thread
            box["error"] = e

    t = threading.Thread(target=target, name="watchdog-worker", daemon=True)
    t.start()
    t.join(seconds)
    if t.is_alive():
        if dump:
            faulthandler.dump_traceback(file=sys.__stderr__)
        pytest.fail(f"no result within {seconds} s: the run hung")
    if "error" in box:
        raise box["error"]
    return box.get("value")


def _min_cap(model_dir, split="even") -> int:
    with moerun.load(model_dir, tokenizer=False) as eng:
        s = eng.store
        return minimum_cap(s.config, s.dense_nbytes, s.expert_nbytes, split, s.codec.scratch_bytes())


def _break_reads(store) -> None:
    """From now on every read of the store fails with a real OS error (EISDIR): its descriptor now names a directory."""
    dfd = os.open(store.model_dir, os.O_RDONLY)
    try:
        os.dup2(dfd, store._fd)
    finally:
        os.close(dfd)


def _first_expert_offset(store) -> int:
    return min(r.start for row in store.ranges for r in row)


@pytest.fixture(scope="module")
def model(synth_models):
    """3 layers, 8 experts, top-2 (read-only here; tests that damage files copy it)."""
    return synth_models(layers=3, experts=8, top_k=2)


@pytest.fixture(scope="module")
def reference(model):
    """Tokens and per-step logits of the fully resident engine, plus the smallest cap."""
    with moerun.load(model, tokenizer=False) as eng:
        gen = eng.generate(prompt_ids=PROMPT_IDS, max_new=MAX_NEW, sampling=SAMPLING, keep_logits=True)
    return {"tokens": gen.new_ids, "logits": np.stack(gen.logits), "cap": _min_cap(model)}


def _generate(eng):
    return eng.generate(prompt_ids=PROMPT_IDS, max_new=MAX_NEW, sampling=SAMPLING, keep_logits=True)


def _assert_bit_identical(reference, gen) -> None:
    assert gen.new_ids == reference["tokens"]
    assert np.array_equal(_bits(np.stack(gen.logits)), _bits(reference["logits"]))


# ---------------------------------------------------------------------------- faults that must not change numbers


def _prefetch_hook_raising(exc):
    def setup(eng):
        def hook(layer, expert, guess):
            if guess:
                raise exc

        eng.store.fault_hook = hook

    return setup


def _reader_fails_every_read(eng):
    # guesses and demand reads alike report a failure: the layers read every expert themselves
    eng.prefetcher.reader.set_faults(fail_every=1, demand_too=True)


def _reader_slow_then_failing(eng):
    # the compute thread may be waiting for exactly this expert; it must take over the read, not wait forever
    eng.prefetcher.reader.set_faults(jitter_us=3000, seed=1, fail_every=1, demand_too=True)


def _reader_dies_after(n):
    def setup(eng):
        eng.prefetcher.reader.set_faults(die_after=n)

    return setup


def _slow_page_in(eng):
    def hook(layer, expert, guess):  # every read (or hand-over to the reader) takes 1 ms longer
        time.sleep(0.001)

    eng.store.fault_hook = hook


def _random_reader_delays(eng):
    eng.prefetcher.reader.set_faults(jitter_us=2000, seed=7)


HARMLESS_FAULTS = {
    "every prefetch read raises OSError": _prefetch_hook_raising(OSError(errno.EIO, "injected")),
    "every prefetch read raises PageInError": _prefetch_hook_raising(PageInError("injected")),
    "every prefetch read raises RuntimeError": _prefetch_hook_raising(RuntimeError("injected")),
    "the reader fails every read": _reader_fails_every_read,
    "reader reads slow, then failing": _reader_slow_then_failing,
    "reader process dies at its 5th read": _reader_dies_after(5),
    "reader process dies at its first read": _reader_dies_after(1),
    "every page-in 1 ms slower": _slow_page_in,
    "random reader delays of 0-2 ms": _random_reader_delays,
}


@pytest.mark.parametrize("fault", sorted(HARMLESS_FAULTS))
@pytest.mark.parametrize("split", ["even", "shared"])
def test_fault_on_the_prefetch_side_or_a_slow_read_leaves_output_bit_identical(model, reference, fault, split):
    cap = _min_cap(model, split)
    before = len(reader_processes())

    def run():
        with moerun.load(model, tokenizer=False, mem_cap=cap, split=split, prefetch=3, lookahead=2) as eng:
            HARMLESS_FAULTS[fault](eng)
            gen = _generate(eng)
            return gen, eng.stats, eng.prefetcher.reader.proc

    gen, stats, proc = _within(WATCHDOG_S, run)
    _assert_bit_identical(reference, gen)
    assert stats["pool"]["misses"] > 0  # the cap really made the run read experts
    assert proc.poll() is not None and len(reader_processes()) == before  # close() stopped the reader


def test_failing_prefetch_reads_are_counted_and_fall_back_to_demand_reads(model, reference):
    def run():
        with moerun.load(model, tokenizer=False, mem_cap=reference["cap"], prefetch=3, lookahead=2, link_speed="300MB/s") as eng:
            _prefetch_hook_raising(OSError(errno.EIO, "injected"))(eng)
            gen = _generate(eng)
            alive = eng.stats["reader_alive"]
        return gen, alive, eng.pool.stats.to_json()

    gen, alive, stats = _within(WATCHDOG_S, run)
    _assert_bit_identical(reference, gen)
    pf = stats["prefetch"]
    assert pf["failed"] >= 1 and pf["failed"] == pf["loads"]  # every attempted guess failed ...
    assert pf["used"] == 0 and stats["demand_loads"] > 0  # ... and the layers read for themselves
    assert alive  # a failing guess does not stop the reader


def test_guess_reads_the_reader_reports_failed_are_counted_and_the_output_is_unchanged(model, reference):
    def run():
        with moerun.load(model, tokenizer=False, mem_cap=reference["cap"], prefetch=3, lookahead=2, link_speed="300MB/s") as eng:
            eng.prefetcher.reader.set_faults(fail_every=2)  # every other guess read fails inside the reader
            gen = _generate(eng)
            return gen, eng.stats

    gen, stats = _within(WATCHDOG_S, run)
    _assert_bit_identical(reference, gen)
    assert stats["pool"]["prefetch"]["failed"] >= 1
    assert stats["reader_alive"]


def test_reader_process_killed_mid_run_is_reported_and_the_run_goes_on(model, reference):
    def run():
        with moerun.load(model, tokenizer=False, mem_cap=reference["cap"], prefetch=2) as eng:
            _reader_dies_after(5)(eng)
            gen = _generate(eng)
            eng.prefetcher.reader.proc.wait(WATCHDOG_S)
            return gen, eng.stats, eng.prefetcher.reader.proc.returncode

    gen, stats, code = _within(WATCHDOG_S, run)
    _assert_bit_identical(reference, gen)
    assert code == 70  # the injected abrupt exit
    assert stats["reader_alive"] is False


def test_reader_dying_with_a_demand_read_outstanding_does_not_hang_the_layer(model, reference):
    def run():
        with moerun.load(model, tokenizer=False, mem_cap=reference["cap"], prefetch=2) as eng:
            def guess_fails(layer, expert, guess):  # guesses fail harmlessly, so the reader's reads are demand misses
                if guess:
                    raise RuntimeError("injected")

            eng.store.fault_hook = guess_fails
            eng.prefetcher.reader.set_faults(die_after=1)  # it dies holding its second read
            return _generate(eng)

    # a short watchdog: the run takes well under a second; a hang means the layer waits on a dead reader
    _assert_bit_identical(reference, _within(10, run, dump=False))


def _failing_reads_from(at_step: int, how: str):
    """A setup that makes expert reads fail from decode step ``at_step`` on, on whichever thread reads.

    EISDIR and truncate break the file for good, so the layer's own retry of a miss the prefetch thread
    failed to read fails too; EIO raises from the hook on every read from then on; "EIO once" raises
    once, a transient fault (use it without prefetch, so the compute thread is the one that meets it).
    """

    def setup(eng):
        store, pool = eng.store, eng.pool
        fired = [False]

        def hook(layer, expert, guess):
            if pool.step < at_step or (fired[0] and how in ("EISDIR", "truncate", "EIO once")):
                return
            fired[0] = True
            if how == "EISDIR":
                _break_reads(store)
                if eng.prefetcher is not None:  # the reader process holds its own descriptor: make it fail too
                    eng.prefetcher.reader.set_faults(fail_every=1, demand_too=True)
            elif how == "truncate":
                os.truncate(store.path, _first_expert_offset(store))
            else:  # the hook itself raises, as a failing device would make the read
                raise OSError(errno.EIO, "Input/output error (injected)")

        store.fault_hook = hook
        return fired

    return setup


@pytest.mark.parametrize(("how", "phrase"), [("EISDIR", "failed"), ("truncate", "file ended")])
def test_read_that_fails_mid_run_raises_page_in_error_and_stops_cleanly(model, reference, tmp_path, how, phrase):
    d = copy_model(model, tmp_path / "m")
    before = len(reader_processes())

    def run():
        eng = moerun.load(d, tokenizer=False, mem_cap=reference["cap"], prefetch=2, lookahead=2)
        with eng:
            fired = _failing_reads_from(3, how)(eng)
            eng.start_trace()
            with pytest.raises(PageInError) as err:
                _generate(eng)
            trace = eng.finish_trace(partial=True)
            return err.value, fired[0], trace, eng.prefetcher.reader.proc

    err, fired, trace, proc = _within(WATCHDOG_S, run)
    assert fired
    # a read on the compute thread meets the broken file first, or, when the rest of the pass had only
    # the reader's reads, the store's check after the pass (the descriptor names another file, or a shorter one)
    assert (phrase in str(err) and "expert" in str(err) and "layer" in str(err)) or isinstance(err, ModelFileChanged)
    assert proc.poll() is not None and len(reader_processes()) == before
    # the routing recorded before the failure is the start of the complete run's routing
    assert trace.meta["partial"] is True
    assert len(PROMPT_IDS) + 3 <= trace.n_tokens < len(PROMPT_IDS) + MAX_NEW


def test_engine_recovers_after_a_transient_read_failure(model, reference):
    # a read that fails once (the hook raises, then the fault is cleared) leaves the pool consistent:
    # the same engine then generates exactly what the resident engine generates
    def run():
        with moerun.load(model, tokenizer=False, mem_cap=reference["cap"]) as eng:
            _failing_reads_from(4, "EIO once")(eng)
            with pytest.raises((OSError, PageInError)):
                _generate(eng)
            eng.store.fault_hook = None
            return _generate(eng)

    _assert_bit_identical(reference, _within(WATCHDOG_S, run))


def test_eio_injected_by_the_fault_hook_surfaces_as_page_in_error(model, reference):
    def run():
        with moerun.load(model, tokenizer=False, mem_cap=reference["cap"]) as eng:
            _failing_reads_from(2, "EIO")(eng)
            with pytest.raises(PageInError, match="Input/output error"):
                _generate(eng)

    _within(WATCHDOG_S, run)


def test_model_file_cut_short_before_the_run_fails_at_the_first_missing_expert(model, reference, tmp_path):
    d = copy_model(model, tmp_path / "m")

    def run():
        with moerun.load(d, tokenizer=False, mem_cap=reference["cap"]) as eng:
            os.truncate(eng.store.path, _first_expert_offset(eng.store) + eng.store.expert_nbytes // 2)
            with pytest.raises(PageInError, match="file ended while reading expert"):
                _generate(eng)

    _within(WATCHDOG_S, run)


def test_model_file_replaced_while_open_keeps_serving_the_opened_file(model, reference, tmp_path):
    # an atomic replace (rename over the path) leaves the open descriptor on the old file: same numbers
    d = copy_model(model, tmp_path / "m")
    other = write_model(tmp_path / "other", synth_config(layers=3, experts=8, top_k=2), seed=99)

    def run():
        with moerun.load(d, tokenizer=False, mem_cap=reference["cap"], prefetch=2) as eng:
            os.replace(other / "model.safetensors", d / "model.safetensors")
            return _generate(eng)

    _assert_bit_identical(reference, _within(WATCHDOG_S, run))


_MMAP_TRUNCATE_SCRIPT = """
import os, sys
import moerun
from moerun.errors import PageInError
model_dir, cap = sys.argv[1], int(sys.argv[2])
eng = moerun.load(model_dir, tokenizer=False, mem_cap=cap, mechanism="mmap")
first = min(r.start for row in eng.store.ranges for r in row)
os.truncate(eng.store.path, first)
try:
    eng.generate(prompt_ids=[1, 2, 3], max_new=4)
except PageInError as e:
    print("PageInError:", e)
    sys.exit(2)
sys.exit(0)
"""


def test_model_file_truncated_while_mapped_gives_page_in_error_not_a_crash(model, reference, tmp_path):
    d = copy_model(model, tmp_path / "m")
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    proc = subprocess.run([sys.executable, "-c", _MMAP_TRUNCATE_SCRIPT, str(d), str(reference["cap"])],
                          capture_output=True, text=True, env=env, timeout=120)
    assert proc.returncode == 2, f"exit {proc.returncode} (negative: killed by signal {-proc.returncode})"
    assert "PageInError" in proc.stdout


# ---------------------------------------------------------------------------- the same through `moerun generate --trace`

CLI_PROMPT = "fog nets at dawn"


def _main(argv) -> int:
    try:
        return cli.main(list(argv))
    except SystemExit as e:
        return e.code


def _cli_generate(monkeypatch, model_dir, trace_path, cap, setup=None, extra=()):
    """Run `moerun generate --json --trace` in this process, with ``setup(engine)`` applied after loading."""
    import moerun.cli.commands.generate as generate_cmd

    real_load = generate_cmd.load

    def load(**kw):
        eng = real_load(**kw)
        if setup is not None:
            setup(eng)
        return eng

    monkeypatch.setattr(generate_cmd, "load", load)
    argv = ["generate", "--model", str(model_dir), "--prompt", CLI_PROMPT, "--max-new", str(MAX_NEW), "--seed", "3",
            "--mem-cap", str(cap), "--prefetch", "2", "--lookahead", "2", "--json", "--trace", str(trace_path), *extra]
    return _within(WATCHDOG_S, _main, argv)


@pytest.fixture(scope="module")
def cli_reference(model, reference, tmp_path_factory):
    """The fault-free `generate --json --trace` run: its JSON document and trace."""
    trace_path = tmp_path_factory.mktemp("cli-ref") / "run.npz"
    out = io.StringIO()
    with pytest.MonkeyPatch.context() as mp, contextlib.redirect_stdout(out), contextlib.redirect_stderr(io.StringIO()):
        code = _cli_generate(mp, model, trace_path, reference["cap"])
    assert code == 0
    return {"doc": json.loads(out.getvalue()), "trace": read_trace(trace_path)}


CLI_HARMLESS = ["every prefetch read raises OSError", "reader process dies at its 5th read", "every page-in 1 ms slower",
                "the reader fails every read"]


@pytest.mark.parametrize("fault", CLI_HARMLESS)
def test_generate_with_a_harmless_fault_exits_0_with_the_same_text_and_a_complete_trace(
    model, reference, cli_reference, tmp_path, monkeypatch, capsys, fault
):
    trace_path = tmp_path / "run.npz"
    code = _cli_generate(monkeypatch, model, trace_path, reference["cap"], HARMLESS_FAULTS[fault])
    out, err = capsys.readouterr()
    assert code == 0, err
    doc, ref = json.loads(out), cli_reference["doc"]
    assert (doc["text"], doc["new_tokens"], doc["stop"]) == (ref["text"], ref["new_tokens"], ref["stop"])
    trace, ref_trace = read_trace(trace_path), cli_reference["trace"]
    assert trace.meta["partial"] is False
    assert np.array_equal(trace.experts, ref_trace.experts)
    assert np.array_equal(_bits(trace.weights), _bits(ref_trace.weights))


def _assert_partial_prefix(trace_path, ref_trace) -> None:
    assert trace_path.exists()
    trace = read_trace(trace_path)  # readable
    assert trace.meta["partial"] is True
    n = trace.n_tokens
    assert trace.meta["prefill_tokens"] <= n < ref_trace.n_tokens
    assert np.array_equal(trace.experts, ref_trace.experts[:n])  # what was recorded is what the full run did
    assert np.array_equal(_bits(trace.weights), _bits(ref_trace.weights[:n]))
    assert not list(trace_path.parent.glob(".moerun-tmp-*"))


@pytest.mark.parametrize(("how", "phrase"), [("EISDIR", "reading expert"), ("truncate", "file ended while reading expert")])
def test_generate_whose_read_fails_mid_run_exits_2_with_one_line_and_a_partial_trace(
    model, reference, cli_reference, tmp_path, monkeypatch, capsys, how, phrase
):
    d = copy_model(model, tmp_path / "m")
    trace_path = tmp_path / "out" / "run.npz"
    trace_path.parent.mkdir()  # moerun never creates an output's parent directory
    code = _cli_generate(monkeypatch, d, trace_path, reference["cap"], _failing_reads_from(3, how))
    out, err = capsys.readouterr()
    assert code == 2
    assert out == ""  # --json prints its document only at the end
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("moerun generate: ")
    assert phrase in lines[0] or "the model file changed while this run was using it" in lines[0]  # or the check after the pass
    assert "Traceback" not in err
    _assert_partial_prefix(trace_path, cli_reference["trace"])


def test_generate_with_eio_from_the_fault_hook_exits_2_with_one_line(model, reference, cli_reference, tmp_path, monkeypatch, capsys):
    trace_path = tmp_path / "run.npz"
    code = _cli_generate(monkeypatch, model, trace_path, reference["cap"], _failing_reads_from(3, "EIO"))
    _, err = capsys.readouterr()
    assert code == 2 and len(err.strip().splitlines()) == 1
    _assert_partial_prefix(trace_path, cli_reference["trace"])


def test_generate_trace_on_a_model_with_fewer_experts_than_trace_guesses(tmp_path, capsys):
    d = write_model(tmp_path / "m", synth_config(layers=2, experts=3, top_k=2), seed=1)
    code = _main(["generate", "--model", str(d), "--prompt", "hi", "--max-new", "3", "--json", "--trace", str(tmp_path / "t.npz")])
    assert code == 0
    assert read_trace(tmp_path / "t.npz").guesses.shape[-1] == 3


# ---------------------------------------------------------------------------- corrupted bytes at rest: digests


def _flip_inside(path, name: str) -> None:
    t = read_header(path).tensors[name]
    blob = bytearray(path.read_bytes())
    blob[t.start + t.nbytes // 2] ^= 0x5A
    path.write_bytes(bytes(blob))


@pytest.mark.parametrize("name", ["layers.1.experts.5.w_up", "layers.2.experts.0.w_gate", "layers.0.attn.wq", "embed"])
def test_inspect_check_names_the_one_tensor_whose_bytes_were_flipped_and_exits_1(model, tmp_path, capsys, name):
    d = copy_model(model, tmp_path / "m")
    _flip_inside(d / "model.safetensors", name)
    assert _main(["inspect", "--model", str(d), "--check", "--json"]) == 1
    assert json.loads(capsys.readouterr().out)["check"]["differ"] == [name]
    assert _main(["inspect", "--model", str(d), "--check"]) == 1
    out = capsys.readouterr().out
    assert f"1 tensor(s) differ from their recorded digest: {name}" in out


def test_flipped_expert_bytes_still_load_and_are_found_only_by_the_check(model, reference, tmp_path, capsys):
    # the engine validates structure, not values: a flip inside an expert's bytes loads and runs (other
    # numbers, or the same if the expert is never routed to); the recorded digests are what catch it
    d = copy_model(model, tmp_path / "m")
    _flip_inside(d / "model.safetensors", "layers.1.experts.5.w_up")
    with moerun.load(d, tokenizer=False, mem_cap=reference["cap"]) as eng:
        gen = _generate(eng)
    assert len(gen.new_ids) == MAX_NEW
    assert _main(["inspect", "--model", str(d), "--check"]) == 1
    assert "layers.1.experts.5.w_up" in capsys.readouterr().out


def test_inspect_check_of_an_intact_model_exits_0(model, capsys):
    assert _main(["inspect", "--model", str(model), "--check", "--json"]) == 0
    check = json.loads(capsys.readouterr().out)["check"]
    assert check["recorded"] and check["differ"] == [] and check["checked"] == 3 * 8 * 3 + 3 * 7 + 2


def test_inspect_check_of_a_streamed_synth_model_exits_0(tmp_path, capsys):
    d = tmp_path / "synth"
    assert _main(["synth", str(d), "--layers", "2", "--experts", "4", "--d-model", "32", "--d-expert", "48", "--json"]) == 0
    capsys.readouterr()
    assert _main(["inspect", "--model", str(d), "--check"]) == 0
    assert "tensors match their recorded digests" in capsys.readouterr().out


def test_inspect_check_of_a_file_without_digests_says_so_and_exits_1(model, tmp_path, capsys):
    # files written by other tools (here the safetensors library, 0.8) record no digests: nothing can be
    # verified, and --check reports that as a failed check (exit 1) rather than a pass
    from safetensors.numpy import save_file

    from moerun.files.store import ModelStore

    d = copy_model(model, tmp_path / "m")
    store = ModelStore.open(d)
    tensors = {name: store.read_tensor(name) for name in store.header.tensors}
    store.close()
    save_file(tensors, str(d / "model.safetensors"))
    assert _main(["inspect", "--model", str(d), "--check"]) == 1
    assert "check: the file records no digests; nothing to verify" in capsys.readouterr().out
    assert _main(["inspect", "--model", str(d), "--check", "--json"]) == 1
    check = json.loads(capsys.readouterr().out)["check"]
    assert check == {"checked": 0, "recorded": False, "differ": []}
    assert _main(["inspect", "--model", str(d)]) == 0  # without --check it is an ordinary, valid model


def test_generate_on_weights_that_overflow_exits_2_with_one_line(model, tmp_path, capsys):
    d = copy_model(model, tmp_path / "m")
    path = d / "model.safetensors"
    t = read_header(path).tensors["layers.0.attn.wq"]
    blob = bytearray(path.read_bytes())
    for i in range(t.start + 3, t.end, 4):  # raise every exponent by 2**64: finite, but the matmuls overflow
        blob[i] ^= 0x40
    path.write_bytes(bytes(blob))
    with np.errstate(all="ignore"):
        code = _main(["generate", "--model", str(d), "--prompt", "hi", "--max-new", "3"])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1


# ---------------------------------------------------------------------------- the limits: context, empty prompt, minimum cap


@pytest.fixture(scope="module")
def short_context(synth_models):
    """Context of 16 tokens; the byte tokenizer makes one token per prompt byte, plus the bos token."""
    return synth_models(seed=5, layers=2, experts=4, top_k=2, max_seq_len=16)


@pytest.mark.parametrize(("prompt_len", "max_new", "new", "stop"), [(5, 50, 12, "context-full"), (16, 5, 1, "context-full"),
                                                                     (5, 11, 11, "max-new"), (5, 12, 12, "max-new")])
def test_generation_past_the_context_stops_with_context_full(short_context, capsys, prompt_len, max_new, new, stop):
    # prompt_len tokens fill positions 0..prompt_len-1; each decode step fills one more; the token sampled
    # from the last position's logits is still returned although it can no longer be fed back
    prompt = "x" * (prompt_len - 1)  # plus the bos token
    code = _main(["generate", "--model", str(short_context), "--prompt", prompt, "--max-new", str(max_new), "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    doc = json.loads(out)
    assert (doc["prompt_tokens"], doc["new_tokens"], doc["stop"]) == (prompt_len, new, stop)


def test_context_full_is_said_in_the_text_summary(short_context, capsys):
    assert _main(["generate", "--model", str(short_context), "--prompt", "abcd", "--max-new", "40"]) == 0
    assert "stopped: context full" in capsys.readouterr().err  # the summary goes to stderr, the text alone to stdout


def test_prompt_longer_than_the_context_is_refused_with_exit_2(short_context, capsys):
    code = _main(["generate", "--model", str(short_context), "--prompt", "x" * 16, "--max-new", "2"])  # 17 tokens
    _, err = capsys.readouterr()
    assert code == 2
    assert err.strip().splitlines() == ["moerun generate: 17 tokens exceed the model's context of 16"]


@pytest.mark.parametrize("argv", [["--prompt", ""], []])
def test_empty_or_absent_prompt_generates_from_the_bos_token(short_context, capsys, argv):
    code = _main(["generate", "--model", str(short_context), *argv, "--max-new", "3", "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    doc = json.loads(out)
    assert (doc["prompt"], doc["prompt_tokens"], doc["new_tokens"]) == ("", 1, 3)


def test_empty_prompt_ids_start_from_bos_or_token_0_without_one(short_context, tmp_path):
    with moerun.load(short_context, tokenizer=False) as eng:
        assert eng.generate(prompt_ids=[], max_new=2).prompt_ids == [eng.config.bos_token_id]
    d = copy_model(short_context, tmp_path / "nobos")
    edit_config(d, lambda c: c.pop("bos_token_id"))
    with moerun.load(d, tokenizer=False) as eng:
        assert eng.generate(prompt_ids=[], max_new=2).prompt_ids == [0]


def test_max_new_zero_returns_no_tokens(short_context):
    with moerun.load(short_context, tokenizer=False) as eng:
        gen = eng.generate(prompt_ids=[1, 2], max_new=0)
    assert (gen.new_ids, gen.stop, gen.decode_steps) == ([], "max-new", 0)


@pytest.mark.parametrize("split", ["even", "shared"])
def test_cap_exactly_at_the_minimum_fills_the_context_bit_identical_to_resident(short_context, split):
    prompt = [0, 9, 8, 7]
    with moerun.load(short_context, tokenizer=False) as eng:
        ref = eng.generate(prompt_ids=prompt, max_new=100, sampling=SAMPLING, keep_logits=True)
    cap = _min_cap(short_context, split)
    with moerun.load(short_context, tokenizer=False, mem_cap=cap, split=split, prefetch=2) as eng:
        assert eng.budget.total <= cap
        gen = _within(WATCHDOG_S, eng.generate, prompt_ids=prompt, max_new=100, sampling=SAMPLING, keep_logits=True)
    assert gen.stop == ref.stop == "context-full"
    _assert_bit_identical({"tokens": ref.new_ids, "logits": np.stack(ref.logits)}, gen)


def test_prompt_ids_past_the_context_are_refused_by_the_api(short_context):
    with moerun.load(short_context, tokenizer=False) as eng, pytest.raises(BadOption, match="exceed the model's context of 16"):
        eng.generate(prompt_ids=list(range(17)), max_new=1)
