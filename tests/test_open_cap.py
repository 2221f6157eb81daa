"""The cap at a real size: an open checkpoint of more than 1 GB, run under a cap that holds a quarter of its
experts, stays within the cap (plus the documented allowance), measured from outside the process.

The resident set is read by psutil (the general-purpose library; on Linux its `memory_info().rss` is the
kernel's VmRSS) from this test process, every few milliseconds, while a child process loads the checkpoint and
generates.  The child's baseline is its resident set once numpy and moerun are imported, before the model is
opened (what the cap does not cover: the interpreter and its libraries).
"""

from __future__ import annotations

import sys

import pytest
from _rss_watch import peak_of_child

from moerun.files.ckpt_store import open_store
from moerun.makers.synth_open import OpenShape, synthesize_open
from moerun.runtime.budget import minimum_cap, plan_budget
from moerun.runtime.capcheck import CAP_ALLOWANCE_BYTES

CHILD = r"""
import sys
import numpy, moerun, moerun.runtime.options  # imported before the baseline is read
print("ready", flush=True)
sys.stdin.readline()
eng = moerun.load(sys.argv[1], mem_cap=int(sys.argv[2]))
gen = eng.generate("The keepers check the mesh at dawn", max_new=12)
print("done", len(gen.new_ids), sum(eng.pool.stats.misses), flush=True)
"""


@pytest.fixture(scope="module")
def big_checkpoint(tmp_path_factory):
    d = tmp_path_factory.mktemp("big") / "ck"
    # 8 layers x 64 experts of 3 x 1024 x 512 BF16 (3 MiB each): 1.5 GiB of experts, in 1 GiB shards
    shape = OpenShape("qwen3_moe", layers=8, experts=64, hidden=1024, expert_width=512, top_k=4, heads=8, kv_heads=2,
                      head_dim=128, context=1024)
    doc = synthesize_open(d, shape, seed=3, shard_bytes=1 << 30)
    assert doc["file_bytes"] > 1_000_000_000
    return d


def test_a_checkpoint_over_1_gb_runs_within_its_cap_measured_from_outside(big_checkpoint):
    store = open_store(big_checkpoint)
    try:
        c = store.config
        args = (c, store.dense_nbytes, store.expert_nbytes)
        scratch = store.codec.scratch_bytes()
        floor = minimum_cap(*args, "even", scratch)
        quarter = c.n_layers * c.n_experts // 4
        cap = floor + (quarter - c.n_layers * c.top_k) * plan_budget(*args, None, "even", scratch).slot
        experts_bytes = store.expert_total_nbytes
    finally:
        store.close()
    assert cap < experts_bytes / 2  # the cap really cannot hold the model
    code, out, baseline, peak = peak_of_child([sys.executable, "-c", CHILD, str(big_checkpoint), str(cap)])
    assert code == 0, out
    done = out.split()
    assert done[0] == "done" and int(done[2]) > 0  # it generated, and paged experts in under the cap
    print(f"peak growth {peak - baseline:,} B, cap {cap:,} B")
    assert peak - baseline <= cap + CAP_ALLOWANCE_BYTES, (peak - baseline, cap)
