"""The quality features of the cut, each against the optimum it claims, on a model where the feature matters.

Whitening: the cut minimises the error on the calibration inputs, ‖(W − A Bᵀ) Xᵀ‖ (Eckart–Young on W Xᵀ).
Output-side weighting of gate/up: it minimises ‖diag(w) (W − A Bᵀ) Xᵀ‖ with w_j² = Σ_tokens (∂h/∂u_j)² ·
‖down[:, j]‖², h the down input (DESIGN.md, "Pricing a cut"). Switching a feature off leaves a cut that is
optimal for another objective, measurably worse for this one. (Pair choice: test_pairs.py.)
"""
import json

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from attncompress import api
from conftest import WORDS, make_reference, tiny_tokenizer
from safetensors.torch import load_file

N_BLOCKS, CONTEXT, RANK = 16, 32, 12


@pytest.fixture(scope="module")
def cut(tmp_path_factory):
    """(reference model, calibration ids (16, 32), compressed weights) with only layer 0's up and down cut."""
    tmp = tmp_path_factory.mktemp("quality")
    ref = make_reference("llama", seed=8)
    with torch.no_grad():  # uneven input scales and channel importances, as trained models have
        mlp = ref.model.layers[0].mlp
        ref.model.layers[0].post_attention_layernorm.weight.mul_(torch.linspace(0.1, 3, 32))
        mlp.up_proj.weight.mul_(torch.linspace(0.1, 3, 64)[:, None])
        mlp.down_proj.weight.mul_(torch.linspace(3, 0.1, 64))
    ref.save_pretrained(tmp / "m")
    tiny_tokenizer().save(str(tmp / "m" / "tokenizer.json"))
    ids = torch.randint(0, len(WORDS), (N_BLOCKS, CONTEXT), generator=torch.Generator().manual_seed(6))
    (tmp / "calib.txt").write_text("\n".join(" ".join(WORDS[i] for i in row) for row in ids.tolist()))
    api.plan(str(tmp / "m"), str(tmp / "full.json"), keep=1.0, quiet=True)
    plan = json.loads((tmp / "full.json").read_text())
    plan["layers"][0]["ff"].update(up=RANK, down=RANK)
    (tmp / "plan.json").write_text(json.dumps(plan))
    # the method these objectives describe: dense-path whitening and the down-reach weights of gate/up (no loss
    # sensitivities, no sequential pass; those are checked in test_allocation.py)
    api.compress(str(tmp / "m"), str(tmp / "c"), plan_file=str(tmp / "plan.json"), texts=[str(tmp / "calib.txt")],
                 quiet=True, n_blocks=N_BLOCKS, context=CONTEXT, priced=False, sequential=False)
    return ref.eval(), ids + 1, load_file(str(tmp / "c" / "model.safetensors"))  # word i is token id i + 1


def _inputs(ref, ids):
    """Layer 0's feed-forward input x and down input h over the calibration blocks, from transformers' forward."""
    seen = {}
    mlp = ref.model.layers[0].mlp
    hs = [mlp.register_forward_pre_hook(lambda m, a: seen.setdefault("x", a[0])),
          mlp.down_proj.register_forward_pre_hook(lambda m, a: seen.setdefault("h", a[0]))]
    with torch.no_grad():
        ref(ids)
    for h in hs:
        h.remove()
    return seen["x"].reshape(-1, 32).double(), seen["h"].reshape(-1, 64).double()


def _optimum(m: np.ndarray, rank: int) -> float:
    """Eckart–Young: the least Frobenius error of a rank-`rank` approximation of m (numpy.linalg.svd)."""
    return float(np.sqrt((np.linalg.svd(m, compute_uv=False)[rank:] ** 2).sum()))


def _truncated(m: np.ndarray, rank: int) -> np.ndarray:
    u, s, vh = np.linalg.svd(m, full_matrices=False)
    return (u[:, :rank] * s[:rank]) @ vh[:rank]


def _factor(w, name):
    return (w[name + ".a"].double() @ w[name + ".b"].double().T).numpy()


def test_whitened_cut_is_optimal_on_the_calibration_inputs(cut):
    ref, ids, w = cut
    _, h = _inputs(ref, ids)
    down = ref.model.layers[0].mlp.down_proj.weight.detach().double().numpy()
    h = h.numpy()
    err = np.linalg.norm((down - _factor(w, "layers.0.ff.down")) @ h.T)
    best = _optimum(down @ h.T, RANK)
    plain = np.linalg.norm((down - _truncated(down, RANK)) @ h.T)  # what the cut is without whitening
    # source: Eckart–Young on W Hᵀ (numpy); the 1% allows for the damping of the Gram matrix
    assert err <= 1.01 * best, (err, best)
    assert plain >= 1.2 * best, (plain, best)  # the model makes whitening matter


def test_gate_and_up_are_weighted_by_what_reaches_the_output(cut):
    ref, ids, w = cut
    x, _ = _inputs(ref, ids)
    mlp = ref.model.layers[0].mlp
    up, gate, down = (m.weight.detach().double() for m in (mlp.up_proj, mlp.gate_proj, mlp.down_proj))
    # h = silu(g) ⊙ u, so ∂h_j/∂u_j = silu(g_j); an error in u_j reaches the block output through down[:, j]
    sens = F.silu(x @ gate.T).pow(2).sum(0) * down.pow(2).sum(0)  # (64,)
    ow = sens.sqrt().numpy()[:, None]
    up, x = up.numpy(), x.numpy()
    err = np.linalg.norm(ow * (up - _factor(w, "layers.0.ff.up")) @ x.T)
    best = _optimum(ow * up @ x.T, RANK)
    unweighted = np.linalg.norm(ow * (up - _truncated(up @ x.T, RANK) @ np.linalg.pinv(x.T)) @ x.T)
    # source: Eckart–Young on diag(w) W Xᵀ (numpy); the 1% allows for the damping of the Gram matrix
    assert err <= 1.01 * best, (err, best)
    assert unweighted >= 1.1 * best, (unweighted, best)  # the model makes the weighting matter
