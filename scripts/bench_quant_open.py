"""quantize from an open checkpoint: time and peak resident-set growth against the checkpoint's size.

Writes an open checkpoint of random BF16 weights (moerun synth --open-type; qwen2_moe with a shared expert, in
100 MiB shards) and quantizes it in a child process per run, with the settings interleaved round after round; the
child's resident set is read by psutil from this process every few milliseconds, against its baseline once numpy
and moerun are imported.  Prints, per setting, the median and the spread (min-max) of the seconds and of the peak
growth, and the growth as a fraction of the checkpoint.  Random weights: the perplexities mean nothing, so none is
measured here (scripts/bench_quant.py measures quality on the bundled model).

    python3 scripts/bench_quant_open.py [--rounds 3] [--layers 4] [--experts 24] [--keep DIR]
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import _bench  # first: one BLAS thread before numpy is imported; the shared helpers
import psutil

from moerun.makers.synth_open import OpenShape, synthesize_open

CHILD = r"""
import sys
import numpy, moerun, moerun.makers.jobs
print("ready", flush=True)
sys.stdin.readline()
moerun.makers.jobs.quantize(sys.argv[1], sys.argv[2], expert_bits=int(sys.argv[3]), method=sys.argv[4], score=False,
                            force=True)
print("done", flush=True)
"""

SETTINGS = [(4, "rtn"), (8, "rtn"), (4, "hqq")]


def one_run(ck: Path, out: Path, bits: int, method: str) -> tuple[float, int]:
    child = subprocess.Popen([sys.executable, "-c", CHILD, str(out), str(ck), str(bits), method],
                             stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        if child.stdout.readline().strip() != "ready":
            raise RuntimeError("the child did not start")
        proc = psutil.Process(child.pid)
        base = proc.memory_info().rss
        t0 = time.monotonic()
        child.stdin.write("go\n")
        child.stdin.flush()
        peak = base
        while child.poll() is None:
            try:
                peak = max(peak, proc.memory_info().rss)
            except psutil.NoSuchProcess:
                break
            time.sleep(0.005)
        seconds = time.monotonic() - t0
        out_text = child.stdout.read()
    finally:
        if child.poll() is None:
            child.kill()
        child.wait()
    if child.returncode != 0 or "done" not in out_text:
        raise RuntimeError(f"quantize failed ({child.returncode})")
    return seconds, peak - base


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--layers", type=int, default=4)
    ap.add_argument("--experts", type=int, default=24)
    ap.add_argument("--keep", help="write the checkpoint here (reused when it exists) instead of a temporary directory")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        ck = Path(args.keep) if args.keep else Path(tmp) / "ck"
        if not ck.exists():
            shape = OpenShape("qwen2_moe", layers=args.layers, experts=args.experts, hidden=1024, expert_width=512,
                              top_k=2, heads=8, kv_heads=2, shared_width=512, context=1024, vocab=4096)
            synthesize_open(ck, shape, seed=3, shard_bytes=100 << 20)
        size = sum(p.stat().st_size for p in ck.glob("*.safetensors"))
        _bench.log(f"checkpoint {size / 2**20:.0f} MiB at {ck}")
        got: dict = {s: [] for s in SETTINGS}
        for r in range(args.rounds):
            for bits, method in SETTINGS:
                secs, growth = one_run(ck, Path(tmp) / "q", bits, method)
                got[(bits, method)].append((secs, growth))
                _bench.log(f"round {r + 1}: {bits}-bit {method}: {secs:.1f} s, +{growth / 2**20:.0f} MiB")
    print(f"checkpoint: {size / 2**20:.0f} MiB of BF16 ({args.layers} layers x {args.experts} experts of 3 MiB, "
          f"a shared expert); {args.rounds} rounds, settings interleaved; {_bench.BLAS_NOTE}")
    print(f"{'setting':<12} {'seconds median (min-max)':<26} {'peak growth MiB median (min-max)':<34} growth/checkpoint")
    for (bits, method), runs in got.items():
        secs = [s for s, _ in runs]
        grow = [g / 2**20 for _, g in runs]
        print(f"{f'{bits}-bit {method}':<12} {statistics.median(secs):>7.1f} ({min(secs):.1f}-{max(secs):.1f}){'':<10} "
              f"{statistics.median(grow):>7.0f} ({min(grow):.0f}-{max(grow):.0f}){'':<18} "
              f"{statistics.median(grow) * 2**20 / size:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
