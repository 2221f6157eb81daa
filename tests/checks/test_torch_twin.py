"""moerun.checks.torch_twin, the PyTorch twin used for training: its load-balancing loss at many experts, its decode path.

Runs only where PyTorch 2.13.0 is installed (the train extra); skipped otherwise.
"""

from __future__ import annotations

import pytest

torch = pytest.importorskip("torch")
from moerun.checks.torch_twin import TorchMoE  # noqa: E402  (needs torch)

MANY = {
    "vocab_size": 64, "d_model": 32, "n_layers": 1, "n_heads": 2, "n_kv_heads": 1, "head_dim": 16,
    "n_experts": 32, "top_k": 4, "d_expert": 8, "d_shared": 16, "max_seq_len": 32,
    "rope_theta": 10000.0, "norm_eps": 1e-5, "tied_embeddings": True,
}


def _shares(model, ids) -> torch.Tensor:
    with torch.no_grad():
        _, aux = model(ids, return_aux=True)
    counts = aux["counts"][0].to(torch.float64)
    return counts / counts.sum()


def test_load_balancing_loss_spreads_a_lopsided_router_over_32_experts():
    # The switch-style loss E * sum_e f_e * P_e (common practice, no source) is 1 at even use.
    # Start from a router that sends most tokens to 4 of 32 experts, then descend on that loss
    # alone: use must spread out over all 32 experts.
    torch.manual_seed(0)
    model = TorchMoE(MANY)
    ids = torch.randint(1, 64, (16, 32))
    router = model.layers[0].router
    with torch.no_grad():
        router.mul_(0.1)
        router[:, :4] += 0.5  # these four win for most tokens (u has a non-zero mean after rmsnorm * 1)
    before = _shares(model, ids)
    opt = torch.optim.Adam([router], lr=0.02)
    for _ in range(150):
        _, aux = model(ids, return_aux=True)
        opt.zero_grad()
        aux["lb"].backward()
        opt.step()
    after = _shares(model, ids)
    _, aux = model(ids, return_aux=True)
    assert float(before[:4].sum()) > 0.5  # really lopsided at the start
    assert float(after.max()) < 0.5 * float(before.max())
    assert int((after > 0).sum()) == 32  # every expert is used
    assert aux["lb"].item() < 1.1  # near its floor of 1


def test_decode_path_with_a_shared_expert_equals_the_full_forward():
    torch.manual_seed(1)
    model = TorchMoE({**MANY, "norm_topk": False}).eval()
    ids = torch.randint(1, 64, (20,))
    with torch.no_grad():
        full = model(ids)
    stepped = [model.prefill(ids[:8])]
    stepped += [model.decode_step(int(t)) for t in ids[8:]]
    got = torch.stack(stepped)
    assert float((got - full[7:]).abs().max()) <= 1e-5


@pytest.mark.parametrize(("field", "value"), [("d_shared", -3), ("d_shared", 2.0), ("norm_topk", "yes")])
def test_bad_optional_fields_are_refused(field, value):
    with pytest.raises(ValueError, match=field):
        TorchMoE({**MANY, field: value})
