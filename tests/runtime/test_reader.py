"""moerun.runtime.reader and moerun/runtime/_reader_child.py: the reader process never spins, keeps the emulated
link on a virtual clock, and a reader that stops answering cannot hang decode.

docs/design/architecture.md, invariants: prefetch is advisory (no wait on the reader is unbounded), and nothing
spins (a side with nothing to do blocks).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
import warnings

import numpy as np
import pytest
from conftest import reader_processes

import moerun
from moerun.errors import ReaderStalled
from moerun.files.store import ModelStore
from moerun.model.sampling import Sampling
from moerun.runtime import _reader_child as rc
from moerun.runtime.budget import minimum_cap
from moerun.runtime.reader import Reader

pytestmark = pytest.mark.usefixtures("every_guess_read")  # the prefetch machinery runs whatever guesses cost

SAMPLING = Sampling(temperature=0.8, top_p=0.95, seed=3)


def _bits(a) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float32).view(np.uint32)


def _min_cap(model) -> int:
    with moerun.load(model, tokenizer=False) as eng:
        st = eng.store
        return minimum_cap(st.config, st.dense_nbytes, st.expert_nbytes)


def _generate(model, max_new=40, setup=None, **kw):
    with moerun.load(model, tokenizer=False, **kw) as eng:
        if setup is not None:
            setup(eng)
        gen = eng.generate(prompt_ids=[4, 5, 6, 7], max_new=max_new, sampling=SAMPLING, keep_logits=True)
        return gen.new_ids, np.stack(gen.logits), eng.stats, eng.prefetcher.reader if eng.prefetcher else None


def test_idle_reader_uses_under_two_percent_of_a_cpu(small_model):
    # docs/design/architecture.md, invariants (nothing spins): with prefetch on and no requests, the reader blocks on its doorbell
    with moerun.load(small_model, tokenizer=False, mem_cap=_min_cap(small_model), prefetch=2) as eng:
        eng.generate(prompt_ids=[1, 2, 3], max_new=8)  # it has served requests and gone idle since
        reader = eng.prefetcher.reader
        time.sleep(0.1)
        before = reader.cpu_seconds()
        t0 = time.monotonic()
        time.sleep(1.0)
        used = reader.cpu_seconds() - before
        wall = time.monotonic() - t0
    assert used < 0.02 * wall, f"idle reader used {used:.4f} s of CPU in {wall:.2f} s"


def test_reader_does_not_spin_while_requests_flow_over_an_emulated_link(small_model):
    # a spinning reader would use about one CPU-second per second of decode; one that naps a fraction
    cap = _min_cap(small_model)
    with moerun.load(small_model, tokenizer=False, mem_cap=cap, prefetch=2, link_speed="20MB/s") as eng:
        reader = eng.prefetcher.reader
        before = reader.cpu_seconds()
        t0 = time.monotonic()
        eng.generate(prompt_ids=[1, 2, 3], max_new=20, sampling=SAMPLING)
        wall = time.monotonic() - t0
        used = reader.cpu_seconds() - before
        reads = eng.stats["pool"]["demand_loads"] + eng.stats["pool"]["prefetch"]["loads"]
    assert reads > 20  # the link was busy the whole run
    assert used < 0.25 * wall, f"reader used {used:.3f} s of CPU in {wall:.2f} s of decode"


def test_reader_copies_the_requested_experts_byte_for_byte(small_model):
    store = ModelStore.open(small_model)
    n = 6
    slot_size = -(-store.expert_nbytes // 4096) * 4096
    reader = Reader(store, n, slot_size)
    E = store.config.n_experts
    try:
        for i in range(n):
            reader.submit(i, 1, 0, i % E)
        got = [reader.wait(i, 1) for i in range(n)]
        copied = [bytes(reader.block[i * slot_size : i * slot_size + store.expert_nbytes]) for i in range(n)]
        wanted = [store._read(store.ranges[0][i % E].start, store.expert_nbytes) for i in range(n)]
    finally:
        reader.close()
        store.close()
    assert [g[0] for g in got] == [rc.OK] * n
    assert copied == wanted


@pytest.mark.parametrize("variant", ["qwen2_moe-bf16-sharded-v4", "qwen3_moe-bf16-fused-sharded", "olmoe-f32"])
def test_reader_copies_an_open_checkpoints_experts_from_their_shards_in_pieces(variant):
    """An expert whose parts lie in several shards (tests/fixtures/open, written by the transformers library) comes
    out of the reader byte for byte as the compute thread's own read puts it in a slot."""
    from pathlib import Path

    from moerun.files.ckpt_store import open_store

    store = open_store(Path(__file__).resolve().parent.parent / "fixtures" / "open" / variant)
    slot_size = -(-store.slot_nbytes // 4096) * 4096
    L, E = store.config.n_layers, store.config.n_experts
    keys = [(layer, e) for layer in range(L) for e in range(E)]
    reader = Reader(store, len(keys), slot_size)
    try:
        assert max(len(store.read_pieces(*k)) for k in keys) > 1 or variant.endswith("f32")
        for i, (layer, e) in enumerate(keys):
            reader.submit(i, 1, layer, e)
        got = [reader.wait(i, 1) for i in range(len(keys))]
        own = np.zeros(slot_size, np.uint8)
        for i, (layer, e) in enumerate(keys):
            own[:] = 0
            store.copy_in(layer, e, own)
            assert bytes(reader.block[i * slot_size : (i + 1) * slot_size]) == own.tobytes(), (layer, e)
    finally:
        reader.close()
        store.close()
    assert [g[0] for g in got] == [rc.OK] * len(keys)


def test_a_cancelled_request_the_reader_has_not_started_is_skipped(small_model):
    store = ModelStore.open(small_model)
    slot_size = -(-store.expert_nbytes // 4096) * 4096
    reader = Reader(store, 2, slot_size)
    try:
        reader.freeze()  # it cannot start anything until it is let go
        reader.submit(0, 1, 0, 0)
        reader.cancel(0, 1)
        reader.proc.send_signal(__import__("signal").SIGCONT)
        got = reader.wait(0, 1)
    finally:
        reader.close()
        store.close()
    assert got[0] == rc.SKIPPED


def test_reader_that_stops_answering_is_stopped_and_the_output_stays_identical(small_model):
    # docs/design/architecture.md, invariants (prefetch is advisory): no unbounded wait.  SIGSTOP keeps the process alive but silent.
    ref = _generate(small_model)
    cap = _min_cap(small_model)
    before = len(reader_processes())

    def setup(eng):
        reader = eng.prefetcher.reader
        steps = [0]
        real = eng.pool.begin_step

        def begin_step(step):
            steps[0] += 1
            if steps[0] == 8:
                reader.freeze()
            real(step)

        eng.pool.begin_step = begin_step

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        t0 = time.monotonic()
        # a slow emulated link, so that guesses are worth reading and the reader has work when it stops
        got = _generate(small_model, setup=setup, mem_cap=cap, prefetch=2, link_speed="50MB/s", reader_timeout=0.3)
        took = time.monotonic() - t0
    assert got[0] == ref[0]
    assert np.array_equal(_bits(got[1]), _bits(ref[1]))
    stalled = [w for w in caught if issubclass(w.category, ReaderStalled)]
    assert len(stalled) == 1  # said once
    assert got[2]["pool"]["prefetch"]["reader_stalled"] is True
    assert got[2]["reader_alive"] is False
    assert got[3].proc.poll() is not None and len(reader_processes()) == before  # stopped, not left frozen
    assert took < 10.0


def test_reader_that_cannot_start_is_not_reported_as_a_bad_option(small_model, monkeypatch):
    from moerun.errors import BadOption, ReaderError
    from moerun.runtime import reader as reader_mod

    monkeypatch.setattr(reader_mod, "CHILD", reader_mod.CHILD.with_name("no_such_reader.py"))
    with pytest.raises(ReaderError) as err:
        moerun.load(small_model, tokenizer=False, mem_cap=_min_cap(small_model), prefetch=2)
    assert not isinstance(err.value, BadOption)


def test_a_stalled_reader_is_said_once_on_stderr_as_one_line_by_the_cli(small_model, monkeypatch, capsys):
    from moerun.cli import main as cli
    from moerun.runtime import reader as reader_mod

    real = reader_mod.Reader.__init__

    def frozen_soon(self, *a, **kw):  # the reader answers its first requests, then stops answering
        real(self, *a, **kw)
        self.timeout_ns = int(0.3e9)
        self.set_faults(jitter_us=0)
        calls = [0]
        submit = self.submit

        def submit_then_freeze(*args):
            calls[0] += 1
            if calls[0] == 6:
                self.freeze()
            return submit(*args)

        self.submit = submit_then_freeze

    monkeypatch.setattr(reader_mod.Reader, "__init__", frozen_soon)
    code = cli.main(["generate", "--model", str(small_model), "--prompt", "abc", "--max-new", "40", "--mem-cap",
                     str(_min_cap(small_model)), "--prefetch", "2", "--link-speed", "50MB/s", "--quiet"])
    err = capsys.readouterr().err
    assert code == 0
    lines = [ln for ln in err.splitlines() if "warning" in ln]
    assert len(lines) == 1 and lines[0].startswith("moerun: warning: the prefetch reader made no progress")


def _ended(proc, timeout: float) -> bool:
    """The process is gone, or a zombie (dead, waiting for whoever adopted it to reap it)."""
    import psutil

    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            if proc.status() == psutil.STATUS_ZOMBIE:
                return True
        except psutil.NoSuchProcess:
            return True
        time.sleep(0.05)
    return False


@pytest.mark.parametrize("how", ["SIGKILL", "SIGTERM"])
def test_a_stopped_reader_ends_with_its_engine_however_the_engine_dies(how):
    # Linux prctl(2), PR_SET_PDEATHSIG: the kernel sends the child its signal when the parent goes;
    # SIGKILL reaches a stopped process too (signal(7)).
    import psutil

    src = (
        "import sys, time, moerun\n"
        "eng = moerun.load(mem_cap='14MiB', prefetch=2)\n"
        "eng.generate('Field notes', max_new=4)\n"
        "print(eng.prefetcher.reader.proc.pid, flush=True)\n"
        "time.sleep(60)\n"
    )
    engine = subprocess.Popen([sys.executable, "-c", src], stdout=subprocess.PIPE, text=True)
    try:
        reader_pid = int(engine.stdout.readline())
        reader = psutil.Process(reader_pid)
        os.kill(reader_pid, signal.SIGSTOP)
        deadline = time.monotonic() + 5.0
        while reader.status() != psutil.STATUS_STOPPED and time.monotonic() < deadline:
            time.sleep(0.01)  # the signal is delivered asynchronously
        assert reader.status() == psutil.STATUS_STOPPED
        engine.send_signal(getattr(signal, how))
        engine.wait(timeout=10)
        assert _ended(reader, 5.0), f"the reader {reader_pid} outlived its engine"
    finally:
        if engine.poll() is None:
            engine.kill()
