"""Tests for attncompress.factorize against numpy.linalg, torch.linalg and mathematical identities."""
import numpy as np
import pytest
import torch

from attncompress.errors import CompressError
from attncompress.factorize import (
    augmented_gram, balance_layer, balance_pair, bilinear_factors, fold_value_bias, gram_root, product_sq_norm, qk_bias_form,
    singular_values, spectral_factors, split_qk_factors, split_vo_factors, truncation_error_sq,
    vo_group_factors, vo_group_product, vo_group_singular_values, whitened_factors,
)


def _rand(gen, *shape, dtype=torch.float64):
    """Seeded standard-normal tensor."""
    return torch.randn(*shape, generator=gen, dtype=dtype)


@pytest.fixture
def gen():
    return torch.Generator().manual_seed(1234)


def _np_dropped_sq(mat, rank):
    """Sum of dropped squared singular values, computed by numpy.linalg.svd."""
    s = np.linalg.svd(np.asarray(mat, dtype=np.float64), compute_uv=False)
    return float((s[rank:] ** 2).sum())


def _data_err_sq(x, w, a, b):
    """||x (w - a b^T)^T||_F^2, the output error on the data, formed explicitly."""
    return float(((x @ w.T - x @ b @ a.T) ** 2).sum())


# ---------------------------------------------------------------- spectral factors

def test_spectral_full_rank_reconstructs(gen):
    w = _rand(gen, 7, 5, dtype=torch.float32)
    a, b = spectral_factors(w, 5)
    assert a.shape == (7, 5) and b.shape == (5, 5) and a.dtype == torch.float64
    # Identity: the full SVD reconstructs W exactly (numpy.linalg.svd gives the same U S V^T).
    np.testing.assert_allclose((a @ b.T).numpy(), w.double().numpy(), atol=1e-12)


@pytest.mark.parametrize("rank", [1, 3, 5])
def test_spectral_eckart_young(gen, rank):
    w = _rand(gen, 9, 6)
    a, b = spectral_factors(w, rank)
    err = float(((w - a @ b.T) ** 2).sum())
    # Source: Eckart–Young theorem; the dropped sigma^2 from numpy.linalg.svd.
    assert err == pytest.approx(_np_dropped_sq(w.numpy(), rank), rel=1e-10, abs=1e-12)


def test_spectral_balanced_split_matches_numpy_truncation(gen):
    w = _rand(gen, 8, 6)
    a, b = spectral_factors(w, 3)
    u, s, vt = np.linalg.svd(w.numpy(), full_matrices=False)
    # Source: numpy.linalg.svd; the S^1/2 split gives each column norm sqrt(sigma_k) on both sides.
    np.testing.assert_allclose(a.norm(dim=0).numpy(), np.sqrt(s[:3]), rtol=1e-10)
    np.testing.assert_allclose(b.norm(dim=0).numpy(), np.sqrt(s[:3]), rtol=1e-10)
    np.testing.assert_allclose((a @ b.T).numpy(), (u[:, :3] * s[:3]) @ vt[:3], atol=1e-12)


@pytest.mark.parametrize("rank", [0, 7, -1, 2.0])
def test_spectral_bad_rank(gen, rank):
    with pytest.raises(CompressError, match="between 1 and 6"):
        spectral_factors(_rand(gen, 6, 9), rank)


def test_spectral_rejects_non_finite():
    w = torch.ones(3, 3)
    w[1, 1] = float("nan")
    with pytest.raises(CompressError, match="NaN"):
        spectral_factors(w, 1)


def test_singular_values_match_numpy(gen):
    w = _rand(gen, 5, 7)
    # Source: numpy.linalg.svd.
    np.testing.assert_allclose(singular_values(w).numpy(), np.linalg.svd(w.numpy(), compute_uv=False), rtol=1e-12)


def test_truncation_error_sq(gen):
    w = _rand(gen, 6, 4)
    s = singular_values(w)
    for r in range(5):
        # Source: numpy.linalg.svd (sum of dropped sigma^2).
        assert float(truncation_error_sq(s, r)) == pytest.approx(_np_dropped_sq(w.numpy(), r), rel=1e-12, abs=1e-14)
    with pytest.raises(CompressError, match="between 0 and 4"):
        truncation_error_sq(s, 5)


# ---------------------------------------------------------------- gram root

def test_gram_root_cholesky_path(gen):
    x = _rand(gen, 40, 6)
    g = x.T @ x
    damping = 0.05
    l, l_inv = gram_root(g, damping=damping)
    g_damped = g + damping * torch.diagonal(g).mean() * torch.eye(6, dtype=torch.float64)
    # Identity: L L^T = G_damped, L^{-1} L = I; Cholesky's factor is lower triangular (torch.linalg.cholesky).
    np.testing.assert_allclose((l @ l.T).numpy(), g_damped.numpy(), rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose((l_inv @ l).numpy(), np.eye(6), atol=1e-10)
    assert torch.equal(l, torch.tril(l))
    np.testing.assert_allclose(l.numpy(), torch.linalg.cholesky(g_damped).numpy(), rtol=1e-10, atol=1e-12)


def test_gram_root_eigen_fallback_singular(gen):
    # Rank-deficient Gram: x has an all-zero column, so Cholesky of the undamped G hits an exact zero pivot.
    x = _rand(gen, 30, 5)
    x[:, 2] = 0.0
    g = x.T @ x
    assert torch.linalg.cholesky_ex(g).info.item() != 0  # precondition: torch.linalg's Cholesky fails
    l, l_inv = gram_root(g, damping=0.0)
    assert not torch.equal(l, torch.tril(l))  # the eigen path gives Q sqrt(Lambda), not a triangular factor
    # Identity: L L^T = G up to the eigenvalue floor (1e-10 of the largest eigenvalue).
    top = float(torch.linalg.eigvalsh(g).max())
    np.testing.assert_allclose((l @ l.T).numpy(), g.numpy(), atol=1e-8 * top)
    np.testing.assert_allclose((l_inv @ l).numpy(), np.eye(5), atol=1e-8)


def test_gram_root_eigen_fallback_indefinite(gen):
    # Round-off-level negative eigenvalues: a rank-3 Gram on 6 inputs shifted down by 1e-12 of its scale.
    x = _rand(gen, 3, 6)
    g = x.T @ x
    g = g - 1e-12 * torch.diagonal(g).mean() * torch.eye(6, dtype=torch.float64)
    assert torch.linalg.eigvalsh(g).min() < 0  # precondition (torch.linalg.eigvalsh): indefinite
    l, l_inv = gram_root(g, damping=0.0)
    assert not torch.equal(l, torch.tril(l))
    top = float(torch.linalg.eigvalsh(g).max())
    np.testing.assert_allclose((l @ l.T).numpy(), g.numpy(), atol=1e-8 * top)
    np.testing.assert_allclose((l @ l_inv).numpy(), np.eye(6), atol=1e-8)


def test_gram_root_zero_and_bad_input():
    l, l_inv = gram_root(torch.zeros(4, 4, dtype=torch.float64))
    assert torch.equal(l, torch.eye(4, dtype=torch.float64)) and torch.equal(l_inv, torch.eye(4, dtype=torch.float64))
    with pytest.raises(CompressError, match="square"):
        gram_root(torch.zeros(3, 4))
    with pytest.raises(CompressError, match="non-negative"):
        gram_root(torch.eye(3), damping=-1.0)


def test_augmented_gram_matches_explicit(gen):
    x = _rand(gen, 20, 4)
    xa = torch.cat([x, torch.ones(20, 1, dtype=torch.float64)], dim=1)
    # Identity: the Gram of [x, 1] formed explicitly.
    np.testing.assert_allclose(augmented_gram(x.T @ x, x.sum(0), 20).numpy(), (xa.T @ xa).numpy(), rtol=1e-12)


# ---------------------------------------------------------------- whitened factors

@pytest.mark.parametrize("rank", [1, 2, 4])
def test_whitened_error_is_optimal_on_data(gen, rank):
    x = _rand(gen, 50, 6)  # full column rank, so the damping-0 Gram takes the Cholesky path
    w = _rand(gen, 5, 6)
    l, l_inv = gram_root(x.T @ x, damping=0.0)
    a, b = whitened_factors(w, rank, l, l_inv)
    err = _data_err_sq(x, w, a, b)
    # Source: Eckart–Young on x W^T (numpy.linalg.svd). With x of full column rank, {x C^T : rank C <= r}
    # is every rank-r matrix whose columns lie in col(x), and x W^T lies there, so the optimum is trunc(x W^T).
    assert err == pytest.approx(_np_dropped_sq(x.numpy() @ w.numpy().T, rank), rel=1e-8, abs=1e-10)
    # Identity: the same number is the dropped sigma^2 of W L.
    assert err == pytest.approx(float(truncation_error_sq(singular_values(w, l), rank)), rel=1e-8, abs=1e-10)
    # Identity: A B^T = trunc(W L) L^{-1}, by numpy.linalg.svd of W L.
    u, s, vt = np.linalg.svd(w.numpy() @ l.numpy(), full_matrices=False)
    trunc = (u[:, :rank] * s[:rank]) @ vt[:rank]
    np.testing.assert_allclose((a @ b.T).numpy(), trunc @ l_inv.numpy(), atol=1e-9)
    # The plain SVD minimises a different norm, so its data error can only be larger.
    a0, b0 = spectral_factors(w, rank)
    assert err <= _data_err_sq(x, w, a0, b0) * (1 + 1e-10)


def test_whitened_beats_plain_on_anisotropic_inputs(gen):
    scales = torch.logspace(-2, 2, 8, dtype=torch.float64)  # input coordinates of very different energy
    x = _rand(gen, 200, 8) * scales
    w = _rand(gen, 6, 8)
    l, l_inv = gram_root(x.T @ x, damping=0.0)
    a, b = whitened_factors(w, 3, l, l_inv)
    a0, b0 = spectral_factors(w, 3)
    # Common practice, no source: on strongly anisotropic data the activation-aware error is far smaller.
    assert _data_err_sq(x, w, a, b) < 0.1 * _data_err_sq(x, w, a0, b0)


def test_whitened_needs_matching_roots(gen):
    w = _rand(gen, 4, 5)
    with pytest.raises(CompressError, match="5, 5"):
        whitened_factors(w, 2, torch.eye(4), torch.eye(4))
    with pytest.raises(CompressError, match="both"):
        whitened_factors(w, 2, torch.eye(5), None)


# ---------------------------------------------------------------- bilinear forms

def test_bilinear_plain_matches_spectral(gen):
    m = _rand(gen, 6, 5)
    a, b = bilinear_factors(m, 2)
    # Source: numpy.linalg.svd (Eckart–Young).
    assert float(((m - a @ b.T) ** 2).sum()) == pytest.approx(_np_dropped_sq(m.numpy(), 2), rel=1e-10)


def test_bilinear_whitened_both_sides_optimal(gen):
    xl = _rand(gen, 40, 6) * torch.logspace(-1, 1, 6, dtype=torch.float64)
    xr = _rand(gen, 30, 5) * torch.logspace(1, -1, 5, dtype=torch.float64)
    m = _rand(gen, 6, 5)
    ll, ll_inv = gram_root(xl.T @ xl, damping=0.0)
    lr, lr_inv = gram_root(xr.T @ xr, damping=0.0)
    a, b = bilinear_factors(m, 2, ll, ll_inv, lr, lr_inv)
    assert a.shape == (6, 2) and b.shape == (5, 2)
    err = float(((xl @ m @ xr.T - xl @ a @ b.T @ xr.T) ** 2).sum())
    # Source: Eckart–Young on the score matrix xl M xr^T (numpy.linalg.svd); xl, xr have full column rank,
    # so every rank-2 matrix with columns in col(xl) and rows in col(xr) is reachable.
    assert err == pytest.approx(_np_dropped_sq(xl.numpy() @ m.numpy() @ xr.numpy().T, 2), rel=1e-8)


def test_bilinear_one_side_whitened(gen):
    xr = _rand(gen, 30, 5) * torch.logspace(1, -1, 5, dtype=torch.float64)
    m = _rand(gen, 4, 5)
    lr, lr_inv = gram_root(xr.T @ xr, damping=0.0)
    a, b = bilinear_factors(m, 2, l_right=lr, l_right_inv=lr_inv)
    err = float(((m @ xr.T - a @ b.T @ xr.T) ** 2).sum())
    # Source: Eckart–Young on M xr^T (numpy.linalg.svd).
    assert err == pytest.approx(_np_dropped_sq(m.numpy() @ xr.numpy().T, 2), rel=1e-8)


# ---------------------------------------------------------------- query-key with bias

def _qk_setup(gen, d=6, head_dim=3, seq=7):
    """Random head: inputs, query/key weights and biases."""
    return (_rand(gen, seq, d), _rand(gen, head_dim, d), _rand(gen, head_dim),
            _rand(gen, head_dim, d), _rand(gen, head_dim))


def test_qk_bias_form_softmax_identity(gen):
    x, wq, bq, wk, bk = _qk_setup(gen)
    ref = torch.softmax((x @ wq.T + bq) @ (x @ wk.T + bk).T, dim=-1)  # (seq_q, seq_k)
    m = qk_bias_form(wq, bq, wk)
    assert m.shape == (7, 6)
    xa = torch.cat([x, torch.ones(x.shape[0], 1, dtype=torch.float64)], dim=1)
    # Identity: query-only score terms are constant along a row and cancel in torch.softmax.
    np.testing.assert_allclose(torch.softmax(xa @ m @ x.T, dim=-1).numpy(), ref.numpy(), atol=1e-12)
    # The key bias really does change the raw scores (else the identity above would be vacuous).
    assert not torch.allclose((x @ wq.T + bq) @ (x @ wk.T + bk).T, xa @ m @ x.T)


def test_qk_factors_full_rank_rebuild_head(gen):
    x, wq, bq, wk, bk = _qk_setup(gen)
    head_dim = wq.shape[0]
    ref = torch.softmax((x @ wq.T + bq) @ (x @ wk.T + bk).T, dim=-1)
    a, b = bilinear_factors(qk_bias_form(wq, bq, wk), head_dim)  # M has rank <= head_dim: exact
    wq_new, bq_new, wk_new = split_qk_factors(a, b, 6)
    assert wq_new.shape == (head_dim, 6) and bq_new.shape == (head_dim,) and wk_new.shape == (head_dim, 6)
    # Identity: the rebuilt head (key bias 0) gives the same torch.softmax attention.
    new = torch.softmax((x @ wq_new.T + bq_new) @ (x @ wk_new.T).T, dim=-1)
    np.testing.assert_allclose(new.numpy(), ref.numpy(), atol=1e-10)


def test_qk_whitened_with_augmented_gram(gen):
    x, wq, bq, wk, _ = _qk_setup(gen, d=6, head_dim=4, seq=40)
    m = qk_bias_form(wq, bq, wk)
    xa = torch.cat([x, torch.ones(40, 1, dtype=torch.float64)], dim=1)
    ll, ll_inv = gram_root(augmented_gram(x.T @ x, x.sum(0), 40), damping=0.0)
    lr, lr_inv = gram_root(x.T @ x, damping=0.0)
    a, b = bilinear_factors(m, 2, ll, ll_inv, lr, lr_inv)
    err = float(((xa @ m @ x.T - xa @ a @ b.T @ x.T) ** 2).sum())
    # Source: Eckart–Young on the score matrix [x, 1] M x^T (numpy.linalg.svd).
    assert err == pytest.approx(_np_dropped_sq(xa.numpy() @ m.numpy() @ x.numpy().T, 2), rel=1e-8)


def test_qk_bias_form_without_bias(gen):
    x, wq, _, wk, _ = _qk_setup(gen)
    m = qk_bias_form(wq, None, wk)
    # Identity: with no bias the form is Wq^T Wk.
    np.testing.assert_allclose(m.numpy(), wq.numpy().T @ wk.numpy(), rtol=1e-12)
    wq_new, bq_new, wk_new = split_qk_factors(*bilinear_factors(m, 3), 6)
    assert bq_new is None
    np.testing.assert_allclose((x @ wq_new.T @ wk_new @ x.T).numpy(), (x @ wq.T @ wk @ x.T).numpy(), atol=1e-10)


# ---------------------------------------------------------------- value bias

def test_fold_value_bias_gqa(gen):
    d, head_dim, n_heads, n_kv, seq = 8, 3, 4, 2, 5
    x = _rand(gen, seq, d)
    wv, bv = _rand(gen, n_kv * head_dim, d), _rand(gen, n_kv * head_dim)
    wo, bo = _rand(gen, d, n_heads * head_dim), _rand(gen, d)
    probs = torch.softmax(_rand(gen, n_heads, seq, seq), dim=-1)  # row-stochastic attention per head

    def attend(bias):
        """Reference grouped attention output: query head h reads kv head h // (n_heads // n_kv)."""
        v = x @ wv.T + bias  # (seq, n_kv * head_dim)
        outs = []
        for h in range(n_heads):
            g = h // (n_heads // n_kv)  # grouped layout as in transformers' repeat_kv (from memory)
            outs.append(probs[h] @ v[:, g * head_dim:(g + 1) * head_dim])
        return torch.cat(outs, dim=1)  # (seq, n_heads * head_dim)

    ref = attend(bv) @ wo.T + bo
    new = attend(torch.zeros_like(bv)) @ wo.T + fold_value_bias(bv, wo, bo, n_heads, n_kv)
    # Identity: attention rows sum to one, so the value bias passes through unchanged.
    np.testing.assert_allclose(new.numpy(), ref.numpy(), atol=1e-12)
    # bo=None means zeros.
    np.testing.assert_allclose(fold_value_bias(bv, wo, None, n_heads, n_kv).numpy(),
                               (fold_value_bias(bv, wo, bo, n_heads, n_kv) - bo).numpy(), atol=1e-12)
    with pytest.raises(CompressError, match="evenly"):
        fold_value_bias(bv, wo, bo, 4, 3)


# ---------------------------------------------------------------- value-output groups

def _vo_setup(gen, d=7, head_dim=3, n=2):
    """Random kv group: value rows and the output slices of the n query heads sharing them."""
    return _rand(gen, head_dim, d), [_rand(gen, d, head_dim) for _ in range(n)]


def test_vo_group_product_orientation(gen):
    wv, wos = _vo_setup(gen)
    x = _rand(gen, 5, 7)
    m = vo_group_product(wv, wos)
    assert m.shape == (14, 7)
    # Identity: stacked per-head value paths x Wv^T Wo_h^T equal x M^T.
    stacked = np.concatenate([x.numpy() @ wv.numpy().T @ wo.numpy().T for wo in wos], axis=1)
    np.testing.assert_allclose((x @ m.T).numpy(), stacked, atol=1e-12)


def test_vo_full_rank_reproduces_heads(gen):
    wv, wos = _vo_setup(gen)
    x = _rand(gen, 5, 7)
    new_wv, new_wos = split_vo_factors(*vo_group_factors(wv, wos, 3), 2)
    assert new_wv.shape == (3, 7) and [w.shape for w in new_wos] == [(7, 3), (7, 3)]
    for wo, new_wo in zip(wos, new_wos):
        # Identity: the joint map has rank <= head_dim, so full rank is exact per head.
        np.testing.assert_allclose((x @ new_wv.T @ new_wo.T).numpy(), (x @ wv.T @ wo.T).numpy(), atol=1e-10)


@pytest.mark.parametrize("rank", [1, 2])
def test_vo_truncated_error_is_dropped_energy(gen, rank):
    wv, wos = _vo_setup(gen, d=7, head_dim=4, n=3)
    m_np = np.vstack([wo.numpy() for wo in wos]) @ wv.numpy()  # built independently of the module
    a, b = vo_group_factors(wv, wos, rank)
    # Source: Eckart–Young on the stacked map (numpy.linalg.svd).
    assert float(((torch.from_numpy(m_np) - a @ b.T) ** 2).sum()) == pytest.approx(_np_dropped_sq(m_np, rank),
                                                                                   rel=1e-10)
    # Source: numpy.linalg.svd; the product has rank <= head_dim, its other singular values are zero.
    np.testing.assert_allclose(vo_group_singular_values(wv, wos).numpy(),
                               np.linalg.svd(m_np, compute_uv=False)[:4], rtol=1e-10)
    new_wv, new_wos = split_vo_factors(a, b, 3)
    per_head = sum(float(((wo @ wv - nwo @ new_wv) ** 2).sum()) for wo, nwo in zip(wos, new_wos))
    assert per_head == pytest.approx(_np_dropped_sq(m_np, rank), rel=1e-10)  # same error, head by head


def test_vo_whitened_is_optimal_on_data(gen):
    wv, wos = _vo_setup(gen, d=6, head_dim=4, n=2)
    x = _rand(gen, 50, 6) * torch.logspace(-1, 1, 6, dtype=torch.float64)
    l, l_inv = gram_root(x.T @ x, damping=0.0)
    a, b = vo_group_factors(wv, wos, 2, l, l_inv)
    m = vo_group_product(wv, wos)
    err = _data_err_sq(x, m, a, b)
    # Source: Eckart–Young on x M^T (numpy.linalg.svd), as in the linear-map case.
    assert err == pytest.approx(_np_dropped_sq(x.numpy() @ m.numpy().T, 2), rel=1e-8)
    assert err == pytest.approx(float(truncation_error_sq(vo_group_singular_values(wv, wos, l), 2)), rel=1e-8)
    a0, b0 = vo_group_factors(wv, wos, 2)
    assert err <= _data_err_sq(x, m, a0, b0) * (1 + 1e-10)


def test_vo_bad_shapes(gen):
    wv, wos = _vo_setup(gen)
    with pytest.raises(CompressError, match="between 1 and 3"):
        vo_group_factors(wv, wos, 4)
    with pytest.raises(CompressError, match="output weight slice"):
        vo_group_product(wv, [wos[0].T])


# ---------------------------------------------------------------- product norm

def test_product_sq_norm_value_and_gradients(gen):
    a = _rand(gen, 9, 3, dtype=torch.float32).requires_grad_(True)
    b = _rand(gen, 7, 3, dtype=torch.float32).requires_grad_(True)
    val = product_sq_norm(a, b)
    assert val.dtype == torch.float32  # stays in the training dtype
    # Source: torch.linalg.matrix_norm (Frobenius) of the explicit product.
    ref = torch.linalg.matrix_norm(a.detach() @ b.detach().T) ** 2
    assert float(val.detach()) == pytest.approx(float(ref), rel=1e-5)
    val.backward()
    # Source: matrix calculus, d||A B^T||_F^2 / dA = 2 A (B^T B), / dB = 2 B (A^T A).
    ad, bd = a.detach(), b.detach()
    np.testing.assert_allclose(a.grad.numpy(), (2 * ad @ (bd.T @ bd)).numpy(), rtol=1e-4, atol=1e-4)
    np.testing.assert_allclose(b.grad.numpy(), (2 * bd @ (ad.T @ ad)).numpy(), rtol=1e-4, atol=1e-4)
    with pytest.raises(CompressError, match="same rank"):
        product_sq_norm(ad, bd[:, :2])


# ---------------------------------------------------------------- balance

def test_balance_pair_keeps_the_product_and_minimises_the_squared_norms(gen):
    scale = torch.tensor([1e3, 1e-2, 1.0, 5.0], dtype=torch.float64)
    a, b = _rand(gen, 9, 4) * scale, _rand(gen, 7, 4) / scale
    b[:, 2] = 0.0  # a component with a zero side stays as it is
    a2, b2 = balance_pair(a, b)
    # source: numpy's matmul of the unbalanced factors
    np.testing.assert_allclose((a2 @ b2.T).numpy(), a.numpy() @ b.numpy().T, rtol=1e-12, atol=1e-12)
    na, nb = np.linalg.norm(a.numpy(), axis=0), np.linalg.norm(b.numpy(), axis=0)
    live = [0, 1, 3]
    np.testing.assert_allclose(a2.norm(dim=0).numpy()[live], b2.norm(dim=0).numpy()[live], rtol=1e-12)
    # identity (AM–GM): min over c > 0 of ‖a_j / c‖² + ‖b_j c‖² is 2 ‖a_j‖ ‖b_j‖, reached at the balance
    got = a2.pow(2).sum(0).numpy()[live] + b2.pow(2).sum(0).numpy()[live]
    np.testing.assert_allclose(got, 2 * na[live] * nb[live], rtol=1e-12)
    np.testing.assert_array_equal(a2[:, 2].numpy(), a[:, 2].numpy())


def _layer_outputs(t, x, h, g, r, d):
    """Per-head value paths x vᵀ o_hᵀ, query-key scores (x q_h + bq)(x k_h + bk)ᵀ, and x bᵀ aᵀ, with numpy."""
    t = {n: v.double().numpy() for n, v in t.items()}
    x = x.numpy()
    qpk = h // g
    vo = [x @ t["L.attn.v.weight"][(i // qpk) * r:(i // qpk + 1) * r].T @ t["L.attn.o.weight"][:, i * r:(i + 1) * r].T
          for i in range(h)]
    qs = x @ t["L.attn.q.weight"].T + t["L.attn.q.bias"]
    ks = x @ t["L.attn.k.weight"].T + t["L.attn.k.bias"]
    scores = [qs[:, i * r:(i + 1) * r] @ ks[:, i * r:(i + 1) * r].T for i in range(h)]
    ff = x @ t["L.ff.up.b"] @ t["L.ff.up.a"].T
    return np.stack(vo), np.stack(scores), ff


def test_balance_layer_keeps_every_head_map_and_balances_each_component(gen):
    h, g, r, d, n = 4, 2, 3, 6, 5
    scale = (10.0 ** torch.linspace(-3, 3, g * r)).double()
    t = {"L.attn.v.weight": _rand(gen, g * r, d) * scale[:, None], "L.attn.v.bias": _rand(gen, g * r),
         "L.attn.o.weight": _rand(gen, d, h * r), "L.attn.q.weight": _rand(gen, h * r, d) * 100,
         "L.attn.q.bias": _rand(gen, h * r), "L.attn.k.weight": _rand(gen, h * r, d) / 100,
         "L.attn.k.bias": _rand(gen, h * r), "L.ff.up.a": _rand(gen, 8, r) * 1e3, "L.ff.up.b": _rand(gen, d, r)}
    t = {k: v.float() for k, v in t.items()}
    x = _rand(gen, n, d)
    before = _layer_outputs(t, x, h, g, r, d)
    bal = dict(t)
    balance_layer(h, g, False, bal, "L.")
    for want, got in zip(before, _layer_outputs(bal, x, h, g, r, d)):  # value bias: a component's, scaled with its row
        # identity: rescaling component j of a product by c and 1/c leaves the product; float32 storage
        np.testing.assert_allclose(got, want, rtol=1e-4, atol=1e-4 * np.abs(want).max())
    np.testing.assert_allclose(bal["L.attn.v.bias"].numpy() / bal["L.attn.v.weight"].norm(dim=1).numpy(),
                               t["L.attn.v.bias"].numpy() / t["L.attn.v.weight"].norm(dim=1).numpy(), rtol=1e-4)
    o = bal["L.attn.o.weight"].double().reshape(d, g, h // g, r)
    np.testing.assert_allclose(o.pow(2).sum((0, 2)).sqrt().reshape(-1).numpy(),
                               bal["L.attn.v.weight"].double().norm(dim=1).numpy(), rtol=1e-5)
    np.testing.assert_allclose(bal["L.attn.q.weight"].norm(dim=1).numpy(), bal["L.attn.k.weight"].norm(dim=1).numpy(),
                               rtol=1e-5)
    np.testing.assert_allclose(bal["L.ff.up.a"].norm(dim=0).numpy(), bal["L.ff.up.b"].norm(dim=0).numpy(), rtol=1e-5)
    rot = dict(t)
    balance_layer(h, g, True, rot, "L.")  # rotary query/key rows are source rows: untouched
    assert rot["L.attn.q.weight"] is t["L.attn.q.weight"] and rot["L.attn.k.weight"] is t["L.attn.k.weight"]
