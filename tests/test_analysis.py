"""Calibration statistics and spectra against direct computation (torch autograd, numpy.linalg)."""
import numpy as np
import torch

from attncompress import analysis, factorize as fz
from attncompress.loading import load_model
from attncompress.texts import token_blocks


def test_stats_match_direct_computation(tiny_dirs):
    d, _ = tiny_dirs["llama"]
    m = load_model(d).model
    blocks = token_blocks(torch.randint(0, 96, (160,)), 16, source="test")  # (10, 16)
    stats = analysis.collect_stats(m, blocks, batch=4)
    # direct: capture the inputs of layer 1's feed-forward and autograd the down-input w.r.t. up and gate outputs
    seen = {}
    h = m.blocks[1].ff.register_forward_pre_hook(lambda mod, args: seen.setdefault("x", []).append(args[0]))
    with torch.no_grad():
        m.hidden(blocks)
    h.remove()
    x = torch.cat(seen["x"]).reshape(-1, 32)  # (n, d)
    ff = m.blocks[1].ff
    with torch.no_grad():
        g, u = ff.gate(x), ff.up(x)
    gg = g.clone().requires_grad_(True)
    (dg,) = torch.autograd.grad((torch.nn.functional.silu(gg) * u).sum(), gg)  # ∂h/∂g = silu'(g)·u, elementwise
    st = stats[1]
    # source: torch autograd for the derivatives; Gram matrix by definition Xᵀ X
    torch.testing.assert_close(st.ff_gram, (x.T @ x).double(), rtol=1e-4, atol=1e-3)
    torch.testing.assert_close(st.up_sens, torch.nn.functional.silu(g).pow(2).sum(0).double(), rtol=1e-4, atol=1e-5)
    torch.testing.assert_close(st.gate_sens, dg.pow(2).sum(0).double(), rtol=1e-4, atol=1e-5)
    assert st.tokens == 160


def test_weighted_truncation_error_is_the_dropped_singular_values():
    # Eckart–Young on diag(w) W L: the weighted data error equals the dropped σ of that product (numpy.linalg.svd)
    torch.manual_seed(0)
    w = torch.randn(24, 16, dtype=torch.float64)
    x = torch.randn(200, 16, dtype=torch.float64) * torch.linspace(0.1, 3, 16, dtype=torch.float64)
    l, l_inv = fz.gram_root(x.T @ x, damping=0.0)
    ow = analysis.output_weights(torch.rand(24, dtype=torch.float64) + 0.1, torch.randn(5, 24, dtype=torch.float64))
    a, b = fz.bilinear_factors(w, 6, torch.diag(ow), torch.diag(1 / ow), l, l_inv)
    err = torch.linalg.matrix_norm(ow[:, None] * ((w - a @ b.T) @ x.T)).item()
    s = np.linalg.svd((ow[:, None] * w).numpy() @ x.T.numpy(), compute_uv=False)
    np.testing.assert_allclose(err, np.sqrt((s[6:] ** 2).sum()), rtol=1e-6)
