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


def _ragged_sentences(n=7, seed=3):
    """Token ids of n sentences of different lengths, padded with 0 into (n, s), and the mask."""
    g = torch.Generator().manual_seed(seed)
    lengths = [3 + (5 * i) % 11 for i in range(n)]
    ids = torch.zeros(n, max(lengths), dtype=torch.long)
    mask = torch.zeros(n, max(lengths), dtype=torch.long)
    for i, n_i in enumerate(lengths):
        ids[i, :n_i] = torch.randint(1, 96, (n_i,), generator=g)
        mask[i, :n_i] = 1
    return ids, mask, lengths


def test_padded_whitening_equals_unpadded_sentences_one_by_one(tiny_dirs):
    from attncompress import arch, calibrate, compress as pipeline
    d, _ = tiny_dirs["bert"]
    loaded = load_model(d)
    sh = loaded.shape
    ids, mask, lengths = _ragged_sentences()
    padded = analysis.collect_stats(loaded.model, ids, batch=4, mask=mask)
    # the streamed pass of compress: one block at a time over the padded hidden states, the same mask
    w = dict(arch.canonical_weights(loaded.source, loaded.walk))
    xs = calibrate.embed(pipeline._ends(pipeline.open_model(d), ("embed.",)), ids)
    streamed = [calibrate.forward_layer(sh, {n: t for n, t in w.items() if n.startswith(f"layers.{i}.")}, i, xs, mask)
                for i in range(sh.n_layers)]
    # reference: each sentence alone, unpadded (no mask at all), statistics summed by hand
    alone = [analysis.collect_stats(loaded.model, ids[i:i + 1, :n]) for i, n in enumerate(lengths)]
    for layer in range(sh.n_layers):
        for field in ("attn_gram", "attn_sum", "ff_gram", "down_gram", "up_sens"):
            want = sum(getattr(a[layer], field) for a in alone)
            # source: the definition Σ over real tokens of x xᵀ, computed sentence by sentence
            for got in (padded[layer], streamed[layer]):
                torch.testing.assert_close(getattr(got, field), want, rtol=1e-5, atol=1e-4)
        assert padded[layer].tokens == streamed[layer].tokens == sum(lengths)
        # the whitening itself: the damped Cholesky roots of the Gram matrices agree too
        r_pad = analysis.layer_roots(padded[layer], 1e-2)
        r_one = analysis.layer_roots(analysis.LayerStats(*(sum(getattr(a[layer], f) for a in alone) for f in
                                     ("attn_gram", "attn_sum", "ff_gram", "down_gram")), sum(lengths)), 1e-2)
        torch.testing.assert_close(r_pad.attn[0], r_one.attn[0], rtol=1e-5, atol=1e-5)
        torch.testing.assert_close(r_pad.down[0], r_one.down[0], rtol=1e-5, atol=1e-5)
    # without the mask the padding would count: the check above can fail
    unmasked = analysis.collect_stats(loaded.model, ids, batch=4)
    assert not torch.allclose(unmasked[0].attn_gram, padded[0].attn_gram, rtol=1e-3)
