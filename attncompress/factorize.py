"""Low-rank factorisations of linear maps and bilinear forms (pure maths, no I/O).

Shape legend
    d_out, d_in     output / input width of a linear map; its weight ``w`` is (d_out, d_in), y = x @ w.T
    rank, r         kept rank; a factorisation is ``a: (d_out, r)``, ``b: (d_in, r)`` with w ~= a @ b.T
    n               calibration rows; ``x: (n, d_in)`` (one token per row)
    gram            input Gram matrix G = x.T @ x, (d_in, d_in), accumulated in float64
    l, l_inv        a square root of the damped Gram, G_damped = l @ l.T, and its inverse, (d_in, d_in)
    d               model width (d_model)
    head_dim        width of one attention head
    n_heads         query heads; n_kv_heads key/value heads; q_per_kv = n_heads // n_kv_heads
    d_left, d_right the two sides of a bilinear form score = x_i @ m @ x_j, m: (d_left, d_right)

Every function takes torch tensors of any float dtype, computes in float64 and returns float64 (the
caller casts back), except ``product_sq_norm`` which is used inside training and stays in its input dtype.

Why whitening: plain SVD minimises ||W - A B^T||_F, which treats every input direction alike. What matters
is the output on real activations, ||x (W - A B^T)^T||_F^2 = tr((W - A B^T) G (W - A B^T)^T)
= ||(W - A B^T) L||_F^2 for G = L L^T, so the SVD of W L (not of W) gives the best rank-r map for the data.
"""
from __future__ import annotations

from dataclasses import dataclass

import torch

from .errors import CompressError

# Relative floor on eigenvalues in the eigendecomposition fallback of gram_root: keeps L invertible with
# cond(L) <= 1e5 (cond(G) <= 1e10, the scale of the worst Gram matrices we see) so L^{-1} stays usable in float64.
_EIG_FLOOR = 1e-10
# Whitening damping relative to the mean diagonal of the Gram (see gram_root); every stage and the CLI use it.
DEFAULT_DAMPING = 0.01
# Relative damping of the least-squares refit (as pseudo-inputs shared by both paths, see `refit_factor`):
# measured on the built-in SmolLM2 at keep 0.8 / 0.5 (0.05 against 1e-3, 1e-2, 0.1; benchmarks/quality_table.py).
DEFAULT_REFIT_DAMPING = 0.05


# ----------------------------------------------------------------------------------------------------------
# small helpers
# ----------------------------------------------------------------------------------------------------------

def _as_f64(t: torch.Tensor, name: str, ndim: int) -> torch.Tensor:
    """Check a float tensor of the given rank with finite entries and return it as float64."""
    if not isinstance(t, torch.Tensor) or not t.is_floating_point():
        got = f"dtype {t.dtype}" if isinstance(t, torch.Tensor) else type(t).__name__
        raise CompressError(f"{name}: expected a floating-point torch tensor, got {got}")
    if t.dim() != ndim:
        raise CompressError(f"{name}: expected a {ndim}-D tensor, got shape {tuple(t.shape)}")
    t = t.detach().to(torch.float64)
    if not torch.isfinite(t).all():
        raise CompressError(f"{name}: contains NaN or infinite entries; check the checkpoint or calibration data")
    return t


def _check_rank(rank: int, max_rank: int, what: str) -> None:
    """Raise CompressError unless 1 <= rank <= max_rank."""
    if isinstance(rank, bool) or not isinstance(rank, int) or rank < 1 or rank > max_rank:
        raise CompressError(f"{what}: rank must be an integer between 1 and {max_rank}, got {rank!r}; "
                            f"choose a rank in that range")


def _check_root(l: torch.Tensor | None, l_inv: torch.Tensor | None, dim: int, name: str):
    """Validate a (root, inverse root) pair of width dim; both None means no whitening on that side."""
    if l is None and l_inv is None:
        return None, None
    if l is None or l_inv is None:
        raise CompressError(f"{name}: pass both the Gram root and its inverse (from gram_root), or neither")
    l = _as_f64(l, name, 2)
    l_inv = _as_f64(l_inv, name + "_inv", 2)
    if l.shape != (dim, dim) or l_inv.shape != (dim, dim):
        raise CompressError(f"{name}: expected Gram roots of shape ({dim}, {dim}) to match the matrix, got "
                            f"{tuple(l.shape)} and {tuple(l_inv.shape)}; the Gram must come from this layer's input")
    return l, l_inv


def _split_sqrt(u: torch.Tensor, s: torch.Tensor, vh: torch.Tensor, rank: int):
    """Truncate an SVD and split S_r evenly: (U_r S_r^1/2, V_r S_r^1/2)."""
    # Splitting S^1/2 to both sides balances the factors (equal column norms), the spectral initialisation.
    sq = s[:rank].clamp_min(0.0).sqrt()  # (rank,)
    return u[:, :rank] * sq, vh[:rank].T * sq  # (m, rank), (n, rank)


def _product_svd(left: torch.Tensor, right: torch.Tensor):
    """Thin SVD of left @ right through a QR of left, for left (m, k), right (k, n) with small k."""
    # left @ right = Q (R right); Q has orthonormal columns, so the SVD of the small (k, n) matrix R right
    # gives that of the product without forming the (m, n) matrix: O((m + n) k^2) instead of O(m n min(m, n)).
    q, r = torch.linalg.qr(left, mode="reduced")  # (m, k), (k, k)
    u_small, s, vh = torch.linalg.svd(r @ right, full_matrices=False)  # (k, k'), (k',), (k', n)
    return q @ u_small, s, vh  # (m, k'), (k',), (k', n)


def _whitened_truncation(m: torch.Tensor, rank: int, left, right):
    """Best rank-r factors of m under ||L_l^T (m - a b^T) L_r||_F; left/right are (l, l_inv) or (None, None)."""
    l_left, l_left_inv = left
    l_right, l_right_inv = right
    target = m
    if l_left is not None:
        target = l_left.T @ target  # (d_left, d_right): whiten the row side
    if l_right is not None:
        target = target @ l_right  # whiten the column side
    u, s, vh = torch.linalg.svd(target, full_matrices=False)
    a, b = _split_sqrt(u, s, vh, rank)  # (d_left, rank), (d_right, rank)
    # Undo the whitening: L_l^T a b^T L_r = trunc(target)  =>  a b^T = L_l^{-T} trunc(target) L_r^{-1}.
    if l_left_inv is not None:
        a = l_left_inv.T @ a
    if l_right_inv is not None:
        b = l_right_inv.T @ b
    return a, b


# ----------------------------------------------------------------------------------------------------------
# linear maps
# ----------------------------------------------------------------------------------------------------------

def spectral_factors(w: torch.Tensor, rank: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Best rank-r factors of a weight in the Frobenius norm (truncated SVD, spectral initialisation).

    With w = U S V^T, returns A = U_r S_r^1/2 and B = V_r S_r^1/2, so A B^T is the Eckart–Young truncation
    and A, B have equal column norms sqrt(sigma_k).

    Args:
        w: (d_out, d_in) weight, any float dtype.
        rank: kept rank, 1 <= rank <= min(d_out, d_in).

    Returns:
        a: (d_out, rank) float64.
        b: (d_in, rank) float64, with w ~= a @ b.T.

    Raises:
        CompressError: w is not a finite 2-D float tensor, or rank is out of range.
    """
    w = _as_f64(w, "weight", 2)  # (d_out, d_in)
    _check_rank(rank, min(w.shape), f"weight of shape {tuple(w.shape)}")
    return _whitened_truncation(w, rank, (None, None), (None, None))


def singular_values(w: torch.Tensor, l: torch.Tensor | None = None) -> torch.Tensor:
    """Singular values of w, or of w @ l (whitened) when l is given.

    Args:
        w: (d_out, d_in) weight.
        l: optional (d_in, d_in) Gram root from gram_root.

    Returns:
        s: (min(d_out, d_in),) float64, descending. Dropped sigma^2 past rank r is the (data) truncation error.

    Raises:
        CompressError: bad shapes or non-finite entries.
    """
    w = _as_f64(w, "weight", 2)
    if l is not None:
        l = _as_f64(l, "gram root", 2)
        if l.shape != (w.shape[1], w.shape[1]):
            raise CompressError(f"gram root: expected shape ({w.shape[1]}, {w.shape[1]}) to match the weight's "
                                f"input width, got {tuple(l.shape)}")
        w = w @ l  # (d_out, d_in): whitened weight
    return torch.linalg.svdvals(w)


def gram_root(gram: torch.Tensor, damping: float = DEFAULT_DAMPING) -> tuple[torch.Tensor, torch.Tensor]:
    """Square root L of a damped input Gram matrix, G_damped = L L^T, and its inverse.

    Damping: G_damped = G + damping * mean(diag(G)) * I. The Gram matrices of real activations reach condition
    numbers near 1e10 (directions the calibration text barely excites); whitening with such a G spends rank on
    those directions and amplifies them through L^{-1}. Adding a fraction of the mean diagonal (the mean
    activation energy per input coordinate) makes the damping scale-free (the same for x and 10 x) and bounds
    cond(G_damped) <= (d_in + damping) / damping, e.g. ~4e5 for d_in = 4096 and damping = 0.01. damping = 0
    gives the exact Gram (useful in tests). The 0.01 default is our choice, tuned by nothing more than keeping
    the condition number moderate.

    Cholesky first (L lower triangular). If it fails (G singular or slightly indefinite from round-off), a
    symmetric eigendecomposition G_damped = Q diag(lambda) Q^T with lambda clamped at 1e-10 * max(lambda) gives
    L = Q diag(sqrt(lambda)) (not triangular). An all-zero Gram (no calibration signal) gives the identity,
    so whitening falls back to the plain SVD.

    Args:
        gram: (d_in, d_in) symmetric positive semi-definite matrix, ideally accumulated in float64.
        damping: non-negative relative damping.

    Returns:
        l: (d_in, d_in) float64 with l @ l.T ~= G_damped.
        l_inv: (d_in, d_in) float64 inverse of l.

    Raises:
        CompressError: gram is not a finite square matrix, has a non-positive mean diagonal while non-zero,
            or damping is negative.
    """
    g = _as_f64(gram, "gram", 2)
    if g.shape[0] != g.shape[1]:
        raise CompressError(f"gram: expected a square (d_in, d_in) matrix, got {tuple(g.shape)}")
    if not damping >= 0.0:  # also rejects NaN
        raise CompressError(f"gram damping: expected a non-negative number, got {damping!r}")
    dim = g.shape[0]
    eye = torch.eye(dim, dtype=torch.float64)
    if not g.any():
        return eye.clone(), eye.clone()  # no signal: whitening is the identity
    g = 0.5 * (g + g.T)  # enforce exact symmetry; accumulation can leave round-off asymmetry
    mean_diag = torch.diagonal(g).mean()
    if mean_diag <= 0:
        raise CompressError(f"gram: mean diagonal is {mean_diag.item():.3g}, but a Gram x^T x has a non-negative "
                            f"diagonal; pass the Gram of the layer input, not another matrix")
    g = g + (damping * mean_diag) * eye  # (d_in, d_in) damped Gram

    l, info = torch.linalg.cholesky_ex(g)
    if info.item() == 0 and torch.isfinite(l).all():
        # Triangular solve is cheaper and more accurate than a general inverse.
        l_inv = torch.linalg.solve_triangular(l, eye, upper=False)
        return l, l_inv

    # Fallback: clamp tiny / negative eigenvalues (round-off or rank deficiency) to a positive floor.
    lam, q = torch.linalg.eigh(g)  # (d_in,), (d_in, d_in)
    top = lam.max()
    if top <= 0:
        raise CompressError("gram: the damped Gram has no positive eigenvalue; pass the Gram x^T x of the layer input")
    lam = lam.clamp_min(_EIG_FLOOR * top)
    root = lam.sqrt()  # (d_in,)
    l = q * root  # Q diag(sqrt(lambda)): l @ l.T = Q diag(lambda) Q^T
    l_inv = (q / root).T  # diag(1/sqrt(lambda)) Q^T, exact inverse since Q is orthogonal
    return l, l_inv


def augmented_gram(gram: torch.Tensor, col_sum: torch.Tensor, n_rows: int) -> torch.Tensor:
    """Gram matrix of the augmented input [x, 1] from the Gram of x, its column sums and its row count.

    Used to whiten the query side of qk_bias_form, whose left input is [x_i, 1].

    Args:
        gram: (d, d) x^T x.
        col_sum: (d,) x.sum(0).
        n_rows: number of rows of x.

    Returns:
        (d + 1, d + 1) float64 [[x^T x, x^T 1], [1^T x, n]].

    Raises:
        CompressError: shapes disagree or n_rows is negative.
    """
    g = _as_f64(gram, "gram", 2)
    s = _as_f64(col_sum, "gram column sum", 1)
    d = g.shape[0]
    if g.shape != (d, d) or s.shape != (d,):
        raise CompressError(f"gram: expected a (d, d) Gram and a (d,) column sum, got {tuple(g.shape)} and "
                            f"{tuple(s.shape)}")
    if n_rows < 0:
        raise CompressError(f"gram: row count must be non-negative, got {n_rows}")
    out = torch.empty(d + 1, d + 1, dtype=torch.float64)
    out[:d, :d] = g
    out[:d, d] = s  # x^T 1
    out[d, :d] = s
    out[d, d] = float(n_rows)  # 1^T 1
    return out


def whitened_factors(w: torch.Tensor, rank: int, l: torch.Tensor, l_inv: torch.Tensor
                     ) -> tuple[torch.Tensor, torch.Tensor]:
    """Activation-aware rank-r factors: minimise ||x (W - A B^T)^T||_F over the calibration inputs x.

    With G_damped = x^T x (+ damping) = L L^T the objective is ||(W - A B^T) L||_F, so with the SVD
    W L = U S V^T: A = U_r S_r^1/2, B = L^{-T} V_r S_r^1/2, i.e. A B^T = trunc_r(W L) L^{-1}. The data error
    squared equals the dropped sigma^2 of W L (see singular_values(w, l)).

    Args:
        w: (d_out, d_in) weight.
        rank: 1 <= rank <= min(d_out, d_in).
        l: (d_in, d_in) Gram root from gram_root.
        l_inv: (d_in, d_in) its inverse.

    Returns:
        a: (d_out, rank) float64.
        b: (d_in, rank) float64, with w ~= a @ b.T on the data.

    Raises:
        CompressError: bad shapes, non-finite entries, or rank out of range.
    """
    w = _as_f64(w, "weight", 2)  # (d_out, d_in)
    _check_rank(rank, min(w.shape), f"weight of shape {tuple(w.shape)}")
    right = _check_root(l, l_inv, w.shape[1], "gram root")
    if right[0] is None:
        raise CompressError("gram root: whitened_factors needs the Gram root and its inverse; "
                            "use spectral_factors for the plain SVD")
    # A linear map is a bilinear form whitened on its input (right) side only.
    return _whitened_truncation(w, rank, (None, None), right)


# ----------------------------------------------------------------------------------------------------------
# bilinear forms (query-key)
# ----------------------------------------------------------------------------------------------------------

def bilinear_factors(m: torch.Tensor, rank: int,
                     l_left: torch.Tensor | None = None, l_left_inv: torch.Tensor | None = None,
                     l_right: torch.Tensor | None = None, l_right_inv: torch.Tensor | None = None,
                     ) -> tuple[torch.Tensor, torch.Tensor]:
    """Rank-r factors of a bilinear form score_ij = x_i^T M y_j, optionally whitened on either side.

    Plain: truncated SVD of M. Whitened with Gram roots of the left inputs (G_left = L_l L_l^T) and right
    inputs (G_right = L_r L_r^T): the score error over all pairs is ||X (M - A B^T) Y^T||_F
    = ||L_l^T (M - A B^T) L_r||_F, so with the SVD L_l^T M L_r = U S V^T:
    A = L_l^{-T} U_r S_r^1/2, B = L_r^{-T} V_r S_r^1/2. Either side may be left unwhitened (pass None for
    both its root and inverse).

    Args:
        m: (d_left, d_right) form.
        rank: 1 <= rank <= min(d_left, d_right).
        l_left, l_left_inv: optional (d_left, d_left) Gram root of the left inputs and its inverse.
        l_right, l_right_inv: optional (d_right, d_right) Gram root of the right inputs and its inverse.

    Returns:
        a: (d_left, rank) float64.
        b: (d_right, rank) float64, with x_i^T a b^T y_j ~= score_ij.

    Raises:
        CompressError: bad shapes, a root without its inverse, non-finite entries, or rank out of range.
    """
    m = _as_f64(m, "bilinear form", 2)  # (d_left, d_right)
    _check_rank(rank, min(m.shape), f"bilinear form of shape {tuple(m.shape)}")
    left = _check_root(l_left, l_left_inv, m.shape[0], "left gram root")
    right = _check_root(l_right, l_right_inv, m.shape[1], "right gram root")
    return _whitened_truncation(m, rank, left, right)


def qk_bias_form(wq_h: torch.Tensor, bq_h: torch.Tensor | None, wk_h: torch.Tensor) -> torch.Tensor:
    """The query-key bilinear form of one head, with the query bias folded in and the key bias dropped.

    For one head, score_ij = (Wq x_i + bq)^T (Wk x_j + bk) (column vectors; the 1/sqrt(head_dim) scale is
    applied by the attention and is not part of M)
        = x_i^T Wq^T Wk x_j + bq^T Wk x_j + x_i^T Wq^T bk + bq^T bk.
    The last two terms depend only on the query position i, so they are constant along a softmax row (over
    keys j) and cancel in the softmax: the key bias is not needed. The rest is the bilinear form of [x_i; 1]
    against x_j with M = [Wq^T; bq^T] Wk. Only valid without rotary embeddings (the rotation between q and k
    depends on the positions and does not fold into one M).

    After a = (d + 1, r), b = (d, r) from bilinear_factors (left whitening: use augmented_gram), the new head
    has query weight a[:d].T (r, d), query bias a[d] (r,), key weight b.T (r, d) and key bias 0
    (see split_qk_factors).

    Args:
        wq_h: (head_dim, d) query weight rows of the head.
        bq_h: (head_dim,) query bias of the head, or None.
        wk_h: (head_dim, d) key weight rows of the head.

    Returns:
        m: (d + 1, d) float64 [Wq^T; bq^T] Wk when bq_h is given, (d, d) Wq^T Wk when it is None.

    Raises:
        CompressError: shapes disagree or entries are not finite.
    """
    wq = _as_f64(wq_h, "query weight", 2)  # (head_dim, d)
    wk = _as_f64(wk_h, "key weight", 2)  # (head_dim, d)
    if wq.shape != wk.shape:
        raise CompressError(f"query/key weights: expected equal (head_dim, d) shapes for one head, got "
                            f"{tuple(wq.shape)} and {tuple(wk.shape)}")
    left = wq  # (head_dim, d) -> rows of the left factor [Wq^T; bq^T]^T
    if bq_h is not None:
        bq = _as_f64(bq_h, "query bias", 1)
        if bq.shape != (wq.shape[0],):
            raise CompressError(f"query bias: expected shape ({wq.shape[0]},) to match the head, got {tuple(bq.shape)}")
        left = torch.cat([wq, bq[:, None]], dim=1)  # (head_dim, d + 1): the bias is the weight of a constant 1
    return left.T @ wk  # (d + 1, d) or (d, d)


def split_qk_factors(a: torch.Tensor, b: torch.Tensor, d: int
                     ) -> tuple[torch.Tensor, torch.Tensor | None, torch.Tensor]:
    """New query/key projections of a head from the factors of its qk_bias_form.

    Args:
        a: (d + 1, r) or (d, r) left factor (the extra row is the query bias).
        b: (d, r) right factor.
        d: model width.

    Returns:
        wq_new: (r, d) float64 query weight.
        bq_new: (r,) float64 query bias, or None when a has d rows.
        wk_new: (r, d) float64 key weight (the new key bias is zero).

    Raises:
        CompressError: shapes disagree.
    """
    a = _as_f64(a, "query factor", 2)
    b = _as_f64(b, "key factor", 2)
    if a.shape[0] not in (d, d + 1) or b.shape[0] != d or a.shape[1] != b.shape[1]:
        raise CompressError(f"query/key factors: expected ({d} or {d + 1}, r) and ({d}, r), got "
                            f"{tuple(a.shape)} and {tuple(b.shape)}")
    bq_new = a[d].clone() if a.shape[0] == d + 1 else None  # row d multiplies the constant 1
    return a[:d].T.contiguous(), bq_new, b.T.contiguous()


# ----------------------------------------------------------------------------------------------------------
# value / output path
# ----------------------------------------------------------------------------------------------------------

def fold_value_bias(bv: torch.Tensor, wo: torch.Tensor, bo: torch.Tensor | None,
                    n_heads: int, n_kv_heads: int) -> torch.Tensor:
    """Fold the value bias into the output bias.

    Attention rows sum to one, so each head's output gets exactly its value bias:
    P (x Wv^T + 1 bv^T) = P x Wv^T + 1 bv^T. Through the output projection that adds Wo bv_expanded to every
    position, where bv_expanded (n_heads * head_dim,) repeats kv head g's bias for its q_per_kv query heads
    (query head h reads kv head h // q_per_kv). Not valid if attention rows do not sum to one (e.g. dropout).

    Args:
        bv: (n_kv_heads * head_dim,) value bias.
        wo: (d, n_heads * head_dim) output projection weight.
        bo: (d,) output bias, or None (zeros).
        n_heads: query heads.
        n_kv_heads: key/value heads; must divide n_heads.

    Returns:
        bo_new: (d,) float64 output bias; the value bias becomes zero.

    Raises:
        CompressError: head counts or shapes disagree.
    """
    bv = _as_f64(bv, "value bias", 1)
    wo = _as_f64(wo, "output weight", 2)  # (d, n_heads * head_dim)
    if n_kv_heads < 1 or n_heads < 1 or n_heads % n_kv_heads:
        raise CompressError(f"value bias: {n_heads} query heads cannot share {n_kv_heads} key/value heads evenly")
    if bv.shape[0] % n_kv_heads or wo.shape[1] != (bv.shape[0] // n_kv_heads) * n_heads:
        raise CompressError(f"value bias: shape {tuple(bv.shape)} and output weight {tuple(wo.shape)} do not fit "
                            f"{n_heads} query heads on {n_kv_heads} key/value heads")
    head_dim = bv.shape[0] // n_kv_heads
    # kv head g serves query heads g*q_per_kv .. (g+1)*q_per_kv - 1, so repeat each kv block in place.
    bv_exp = bv.view(n_kv_heads, head_dim).repeat_interleave(n_heads // n_kv_heads, dim=0).reshape(-1)
    if bo is None:
        bo = torch.zeros(wo.shape[0], dtype=torch.float64)
    else:
        bo = _as_f64(bo, "output bias", 1)
        if bo.shape != (wo.shape[0],):
            raise CompressError(f"output bias: expected shape ({wo.shape[0]},), got {tuple(bo.shape)}")
    return bo + wo @ bv_exp  # (d,)


def _check_vo(wv_g: torch.Tensor, wo_heads) -> tuple[torch.Tensor, torch.Tensor]:
    """Validate a kv group's value rows and output slices; return wv_g and the stacked slices (n*d, head_dim)."""
    wv = _as_f64(wv_g, "value weight", 2)  # (head_dim, d)
    if len(wo_heads) == 0:
        raise CompressError("output weight: a key/value group needs at least one query head")
    slices = [_as_f64(w, "output weight slice", 2) for w in wo_heads]
    for w in slices:
        if w.shape != (wv.shape[1], wv.shape[0]):
            raise CompressError(f"output weight slice: expected shape ({wv.shape[1]}, {wv.shape[0]}) "
                                f"(d, head_dim) to match the value rows {tuple(wv.shape)}, got {tuple(w.shape)}")
    return wv, torch.cat(slices, dim=0)  # (head_dim, d), (n * d, head_dim)


def vo_group_product(wv_g: torch.Tensor, wo_heads) -> torch.Tensor:
    """Joint value-output map of one key/value group, as a weight in torch orientation.

    Orientation: for heads h_1..h_n sharing value rows Wv_g (head_dim, d), head h's value path (before the
    attention mixes positions, which acts on the other side) is x -> x Wv_g^T Wo_h^T. Stacking the heads'
    outputs gives the (n * d, d) weight
        M = [Wo_h1; ...; Wo_hn] Wv_g,   y_stacked = x @ M.T,
    i.e. the transpose of the (d, n * d) matrix Wv_g^T [Wo_h1^T ... Wo_hn^T]. A factorisation M ~= a b^T with
    a (n * d, r), b (d, r) then reads: new value rows b.T (r, d), new output slice of head h_k the k-th
    (d, r) block of a (see split_vo_factors). Its rank is at most head_dim.

    Args:
        wv_g: (head_dim, d) value projection rows of the group.
        wo_heads: list of n output projection slices (d, head_dim), one per query head of the group.

    Returns:
        m: (n * d, d) float64.

    Raises:
        CompressError: shapes disagree.
    """
    wv, wo_stack = _check_vo(wv_g, wo_heads)
    return wo_stack @ wv  # (n * d, head_dim) @ (head_dim, d)


def vo_group_singular_values(wv_g: torch.Tensor, wo_heads, l: torch.Tensor | None = None) -> torch.Tensor:
    """Singular values of vo_group_product (times the value-input Gram root l when given), without forming it.

    Args:
        wv_g: (head_dim, d) value rows of the group.
        wo_heads: list of n (d, head_dim) output slices.
        l: optional (d, d) Gram root of the value input x.

    Returns:
        s: (min(head_dim, d),) float64, descending; the product has no other non-zero singular values.

    Raises:
        CompressError: shapes disagree.
    """
    wv, wo_stack = _check_vo(wv_g, wo_heads)
    if l is not None:
        l = _as_f64(l, "gram root", 2)
        if l.shape != (wv.shape[1], wv.shape[1]):
            raise CompressError(f"gram root: expected shape ({wv.shape[1]}, {wv.shape[1]}), got {tuple(l.shape)}")
        wv = wv @ l  # (head_dim, d): whiten the input side
    _, r = torch.linalg.qr(wo_stack, mode="reduced")  # singular values of Q R wv are those of R wv
    return torch.linalg.svdvals(r @ wv)


def vo_group_factors(wv_g: torch.Tensor, wo_heads, rank: int,
                     l: torch.Tensor | None = None, l_inv: torch.Tensor | None = None
                     ) -> tuple[torch.Tensor, torch.Tensor]:
    """Rank-r factors of vo_group_product, plain or whitened by the Gram of the value input, without forming it.

    Plain: minimises ||M - a b^T||_F. Whitened (l, l_inv from gram_root of the value input x): minimises
    ||x (M - a b^T)^T||_F, the summed per-head value-path error on the data, via the SVD of M L. The SVD goes
    through a QR of the stacked output slices (n * d, head_dim), so the (n * d, d) product is never formed.

    Args:
        wv_g: (head_dim, d) value rows of the group.
        wo_heads: list of n (d, head_dim) output slices.
        rank: 1 <= rank <= min(head_dim, d).
        l, l_inv: optional (d, d) Gram root of the value input and its inverse.

    Returns:
        a: (n * d, rank) float64.
        b: (d, rank) float64, with vo_group_product(wv_g, wo_heads) ~= a @ b.T. Split with split_vo_factors.

    Raises:
        CompressError: shapes disagree, a root without its inverse, or rank out of range.
    """
    wv, wo_stack = _check_vo(wv_g, wo_heads)
    _check_rank(rank, min(wv.shape), f"value group with value rows {tuple(wv.shape)}")
    l, l_inv = _check_root(l, l_inv, wv.shape[1], "gram root")
    right = wv if l is None else wv @ l  # (head_dim, d)
    u, s, vh = _product_svd(wo_stack, right)  # (n*d, k), (k,), (k, d)
    a, b = _split_sqrt(u, s, vh, rank)  # (n*d, rank), (d, rank)
    if l_inv is not None:
        b = l_inv.T @ b  # a b^T = trunc(M L) L^{-1}
    return a, b


def split_vo_factors(a: torch.Tensor, b: torch.Tensor, n_heads_in_group: int
                     ) -> tuple[torch.Tensor, list[torch.Tensor]]:
    """New value rows and per-head output slices from factors of vo_group_product.

    Args:
        a: (n * d, r) left factor.
        b: (d, r) right factor.
        n_heads_in_group: n, the query heads sharing the group.

    Returns:
        new_wv_g: (r, d) float64 value rows (new value width r for the group).
        new_wo_heads: list of n (d, r) float64 output slices; head k's value path is x new_wv_g^T new_wo_k^T.

    Raises:
        CompressError: shapes disagree.
    """
    a = _as_f64(a, "output factor", 2)
    b = _as_f64(b, "value factor", 2)
    d = b.shape[0]
    if n_heads_in_group < 1 or a.shape != (n_heads_in_group * d, b.shape[1]):
        raise CompressError(f"value/output factors: expected ({n_heads_in_group} * {d}, r) and ({d}, r), got "
                            f"{tuple(a.shape)} and {tuple(b.shape)}")
    return b.T.contiguous(), [blk.contiguous() for blk in a.split(d, dim=0)]


# ----------------------------------------------------------------------------------------------------------
# one layer, kind by kind (the pipeline names the tensors; the spectra use the same slicing and roots)
# ----------------------------------------------------------------------------------------------------------

@dataclass
class Roots:
    """Whitening factors of one layer's inputs, each a pair (L, L⁻¹) with G_damped = L Lᵀ, or None (weights only)."""
    attn: tuple[torch.Tensor, torch.Tensor] | None  # (d, d) for the attention input x
    attn_aug: tuple[torch.Tensor, torch.Tensor] | None  # (d+1, d+1) for [x; 1]; non-rotary query side
    ff: tuple[torch.Tensor, torch.Tensor] | None  # (d, d) feed-forward input
    down: tuple[torch.Tensor, torch.Tensor] | None  # (d_ff, d_ff) input of the down matrix
    up_out: torch.Tensor | None = None  # (d_ff,) output-channel weights of the up matrix
    gate_out: torch.Tensor | None = None  # (d_ff,) the same for gate
    down_out: torch.Tensor | None = None  # (d,) the same for down (from the loss sensitivities only)
    vo_out: torch.Tensor | None = None  # (d,) output weights of every value-output map (the output projection's)

    def qk_sides(self, bias: bool):
        """(left, right) roots of a query-key form: [x; 1] on the query side when the query carries a bias."""
        return (self.attn_aug if bias else self.attn), self.attn

    def ff_sides(self, kind: str):
        """(input root, output-channel weights or None) of feed-forward matrix `kind` (down reads d_ff inputs)."""
        return (self.down if kind == "down" else self.ff), getattr(self, f"{kind}_out", None)


def head_slices(w: torch.Tensor, n: int) -> list[torch.Tensor]:
    """Split a (n*w, d) projection into n head blocks (w, d). Example: (8, 3), n=2 → two (4, 3)."""
    return list(w.reshape(n, -1, w.shape[-1]).unbind(0))


def group_output_heads(wo: torch.Tensor, n_kv_heads: int, q_per_kv: int) -> list[list[torch.Tensor]]:
    """The output slices of each key/value group's query heads: per group, q_per_kv (d, w) column blocks.

    Example: wo (3, 8), 2 groups of 2 heads → [[wo[:, 0:2], wo[:, 2:4]], [wo[:, 4:6], wo[:, 6:8]]].
    """
    w = wo.shape[1] // (n_kv_heads * q_per_kv)
    return [[wo[:, (g * q_per_kv + j) * w:(g * q_per_kv + j + 1) * w] for j in range(q_per_kv)]
            for g in range(n_kv_heads)]


def qk_forms(wq: torch.Tensor, bq: torch.Tensor | None, wk: torch.Tensor, n_heads: int, n_kv_heads: int
             ) -> list[torch.Tensor]:
    """Each head's query-key form (see qk_bias_form): n_heads matrices (d[+1], d) float64."""
    bqs = [None] * n_heads if bq is None else list(bq.reshape(n_heads, -1).unbind(0))
    return [qk_bias_form(q_h, b_h, k_h)
            for q_h, b_h, k_h in zip(head_slices(wq, n_heads), bqs, head_slices(wk, n_kv_heads))]


def pair_dims(pairs: torch.Tensor, head_dim: int) -> torch.Tensor:
    """The head dims of kept rotary pairs: (g, p) pair indices → (g, 2p), first halves then second halves.

    Example: pairs [[0, 2]], head_dim 8 → [[0, 2, 4, 6]] (pair i is dims i and i + head_dim/2).
    """
    return torch.cat([pairs, pairs + head_dim // 2], dim=1)


def _rows(n_heads: int, head_dim: int, idx: torch.Tensor) -> torch.Tensor:
    """Row indices of the kept dims `idx` (per head, (heads, k)) in a (n_heads*head_dim, d) projection."""
    return (torch.arange(n_heads)[:, None] * head_dim + idx).reshape(-1)


def rotary_rows(pairs: torch.Tensor, n_heads: int, n_kv_heads: int, head_dim: int
                ) -> tuple[torch.Tensor, torch.Tensor]:
    """Rows of the query and key projections a rotary layer keeps: (h·2p,) and (g·2p,) indices.

    Query head j keeps its group's pairs (j // q_per_kv), so every score keeps whole planes.
    """
    dims = pair_dims(pairs, head_dim)  # (g, 2p)
    rep = n_heads // n_kv_heads
    return _rows(n_heads, head_dim, dims.repeat_interleave(rep, 0)), _rows(n_kv_heads, head_dim, dims)


def qk_factors(wq: torch.Tensor, bq: torch.Tensor | None, wk: torch.Tensor, n_heads: int, n_kv_heads: int,
               rank: int, roots: Roots) -> tuple[torch.Tensor, torch.Tensor | None, torch.Tensor]:
    """New query and key projections of a non-rotary layer: each head's [x; 1] form cut to `rank`.

    Args:
        wq: (h·head_dim, d), bq: (h·head_dim,) or None, wk: (g·head_dim, d) dense projections.
        n_heads, n_kv_heads: h and g (equal without rotary: see plan.matrix_layout).
        rank: kept rank per head.
        roots: whitening of the layer (query side on [x; 1] when there is a bias).

    Returns:
        (q (h·rank, d), query bias (h·rank,) or None, k (h·rank, d)), float64. The key bias is gone exactly.
    """
    d = wq.shape[1]
    left, right = roots.qk_sides(bq is not None)
    nq, nb, nk = [], [], []
    for m in qk_forms(wq, bq, wk, n_heads, n_kv_heads):  # (d[+1], d) each
        if right is None:
            a, b = bilinear_factors(m, rank)
        else:
            a, b = bilinear_factors(m, rank, left[0], left[1], right[0], right[1])
        q_new, bq_new, k_new = split_qk_factors(a, b, d)
        nq.append(q_new), nk.append(k_new)
        if bq_new is not None:
            nb.append(bq_new)
    return torch.cat(nq), (torch.cat(nb) if nb else None), torch.cat(nk)


def vo_factors(wv: torch.Tensor, wo: torch.Tensor, n_kv_heads: int, q_per_kv: int, rank: int, roots: Roots
               ) -> tuple[torch.Tensor, torch.Tensor]:
    """New value and output projections: each key/value group's value-output maps cut jointly to `rank`.

    With `roots.vo_out` = D the truncation is that of diag(D) M L per group (output-weighted, whitened), and
    the output factor is unweighted after: o = D⁻¹ (weighted o).

    Args:
        wv: (g·head_dim, d), wo: (d, h·head_dim) dense projections (fold the value bias first).
        n_kv_heads, q_per_kv: g and the query heads per group.
        rank: kept rank per group.
        roots: whitening of the layer (the value input is the attention input) and its output weights.

    Returns:
        (v (g·rank, d), o (d, h·rank)), float64.
    """
    l = roots.attn if roots.attn is not None else (None, None)
    ow = None if roots.vo_out is None else roots.vo_out.double()[:, None]  # (d, 1)
    wo = wo.double() if ow is None else ow * wo.double()  # (d, h·head_dim) weighted output rows
    new_v, new_o = [], []
    for v_g, heads in zip(head_slices(wv, n_kv_heads), group_output_heads(wo, n_kv_heads, q_per_kv)):
        v_new, o_new = split_vo_factors(*vo_group_factors(v_g, heads, rank, l[0], l[1]), q_per_kv)
        new_v.append(v_new)
        new_o.extend(o_new)
    o = torch.cat(new_o, dim=1)  # (d, h·rank)
    return torch.cat(new_v), (o if ow is None else o / ow)


def ff_factors(w: torch.Tensor, rank: int, root, out_w: torch.Tensor | None) -> tuple[torch.Tensor, torch.Tensor]:
    """Factors of a feed-forward matrix: plain SVD, whitened on the input, or also weighted on the output.

    Args:
        w: (d_out, d_in) weight.
        rank: kept rank.
        root: (L, L⁻¹) of the input Gram, or None for plain SVD.
        out_w: (d_out,) output-channel weights, or None.

    Returns:
        a: (d_out, rank), b: (d_in, rank) float64.
    """
    if root is None:
        return spectral_factors(w, rank)
    if out_w is None:
        return whitened_factors(w, rank, root[0], root[1])
    # minimise ‖diag(out_w) (W − A Bᵀ) L‖: whitened on the input, weighted on the output side
    return bilinear_factors(w, rank, torch.diag(out_w), torch.diag(1 / out_w), root[0], root[1])


# ----------------------------------------------------------------------------------------------------------
# refit on the inputs the cut prefix produces
# ----------------------------------------------------------------------------------------------------------

def _pseudo_damped(gram_cut: torch.Tensor, cross: torch.Tensor, damping: float):
    """G' + λI and C + λI with λ = damping · mean diag(G'): the damping as λ pseudo-inputs seen alike by both paths."""
    lam = damping * float(torch.diagonal(gram_cut).mean())
    eye = torch.eye(gram_cut.shape[0], dtype=torch.float64)
    return gram_cut + lam * eye, cross + lam * eye


def refit_factor(w: torch.Tensor, a: torch.Tensor, gram_cut: torch.Tensor, cross: torch.Tensor,
                 out_w: torch.Tensor | None = None, damping: float = DEFAULT_REFIT_DAMPING) -> torch.Tensor:
    """The input factor b that best reproduces the dense outputs from the cut inputs, with a fixed.

    Minimises ‖(X' b aᵀ − X wᵀ) D‖_F over b, where X' (n, d_in) are the inputs the already-cut layers produce,
    X the dense model's inputs at the same positions, and D = diag(out_w) the output weights. The normal
    equations give b = G'⁻¹ C wᵀ D² a (aᵀ D² a)⁻¹ with G' = X'ᵀX' and C = X'ᵀX. Damping adds λ = damping ·
    mean diag(G') identical pseudo-inputs to both X' and X (G' + λI, C + λI): it pulls the solution towards
    the one for uncut inputs, never towards zero.

    Args:
        w: (d_out, d_in) the dense weight.
        a: (d_out, r) the output factor, kept.
        gram_cut: (d_in, d_in) G' = X'ᵀX', float64.
        cross: (d_in, d_in) C = X'ᵀX, float64.
        out_w: optional (d_out,) output weights.
        damping: relative damping (0: the exact least-squares solution, as numpy's lstsq gives).
    Returns:
        b: (d_in, r) float64.
    """
    w, a = _as_f64(w, "weight", 2), _as_f64(a, "output factor", 2)  # (d_out, d_in), (d_out, r)
    d2 = torch.ones(w.shape[0], dtype=torch.float64) if out_w is None else out_w.double().pow(2)  # (d_out,)
    g, c = _pseudo_damped(gram_cut.double(), cross.double(), damping)
    da = d2[:, None] * a  # (d_out, r) D² a
    rhs = c @ (w.T @ da)  # (d_in, d_in) @ (d_in, d_out) @ (d_out, r) → (d_in, r)
    return torch.linalg.solve(g, rhs) @ torch.linalg.inv(a.T @ da)  # (d_in, r) @ (r, r)


def refit_dense(w: torch.Tensor, gram_cut: torch.Tensor, cross: torch.Tensor,
                damping: float = DEFAULT_REFIT_DAMPING) -> torch.Tensor:
    """The weight w' minimising ‖X' w'ᵀ − X wᵀ‖_F: w'ᵀ = G'⁻¹ C wᵀ (damped as in `refit_factor`). (d_out, d_in) float64."""
    w = _as_f64(w, "weight", 2)
    g, c = _pseudo_damped(gram_cut.double(), cross.double(), damping)
    return torch.linalg.solve(g, c @ w.T).T  # (d_in, d_in) \ (d_in, d_out) → transpose to (d_out, d_in)


def refit_values(wv: torch.Tensor, wo: torch.Tensor, o_new: torch.Tensor, n_kv_heads: int, q_per_kv: int,
                 gram_cut: torch.Tensor, cross: torch.Tensor, out_w: torch.Tensor | None = None,
                 damping: float = DEFAULT_REFIT_DAMPING) -> torch.Tensor:
    """New value rows of every group, refit with the new output slices fixed (`refit_factor` per group).

    Each group's target is its dense value-output map M = [Wo_h1; …] Wv_g (`vo_group_product`), its output
    factor the new slices [o_h1; …] stacked, (rep·d, r), and its output weights `out_w` repeated per head.

    Args:
        wv: (g·head_dim, d), wo: (d, h·head_dim) dense projections; o_new: (d, h·r) the new output projection.
        n_kv_heads, q_per_kv: g and the query heads per group.
        gram_cut, cross: (d, d) G' and C of the attention inputs (the value input).
        out_w: optional (d,) output weights.
        damping: relative damping (see `refit_factor`).
    Returns:
        (g·r, d) float64 new value rows.
    """
    rows = []
    ow = None if out_w is None else out_w.double().repeat(q_per_kv)  # (rep·d,)
    for v_g, heads, new in zip(head_slices(wv, n_kv_heads), group_output_heads(wo, n_kv_heads, q_per_kv),
                               group_output_heads(o_new, n_kv_heads, q_per_kv)):
        m = vo_group_product(v_g, heads)  # (rep·d, d)
        a = torch.cat([o.double() for o in new], dim=0)  # (rep·d, r)
        rows.append(refit_factor(m, a, gram_cut, cross, ow, damping).T)  # (r, d)
    return torch.cat(rows)


# ----------------------------------------------------------------------------------------------------------
# norms and errors
# ----------------------------------------------------------------------------------------------------------

def product_sq_norm(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """||A B^T||_F^2 without forming the product, differentiable, in the input dtype.

    ||A B^T||_F^2 = tr(B A^T A B^T) = tr((A^T A)(B^T B)) = sum((A^T A) * (B^T B)) (both Gram matrices are
    symmetric), O((m + n) r^2) instead of O(m n r). Used as the Frobenius-decay penalty in training, so no
    float64 cast and no detach.

    Args:
        a: (m, r).
        b: (n, r).

    Returns:
        scalar tensor in a's dtype.

    Raises:
        CompressError: the ranks (second dims) differ or the tensors are not 2-D.
    """
    if a.dim() != 2 or b.dim() != 2 or a.shape[1] != b.shape[1]:
        raise CompressError(f"factors: expected (m, r) and (n, r) with the same rank, got {tuple(a.shape)} and "
                            f"{tuple(b.shape)}")
    return ((a.T @ a) * (b.T @ b)).sum()


def truncation_error_sq(s: torch.Tensor, rank: int) -> torch.Tensor:
    """Squared Frobenius error of keeping the top `rank` singular values: sum of the dropped sigma^2.

    Args:
        s: (k,) singular values, descending (from singular_values / vo_group_singular_values).
        rank: 0 <= rank <= k.

    Returns:
        scalar float64 tensor.

    Raises:
        CompressError: rank out of range.
    """
    s = _as_f64(s, "singular values", 1)
    if isinstance(rank, bool) or not isinstance(rank, int) or rank < 0 or rank > s.shape[0]:
        raise CompressError(f"singular values: rank must be an integer between 0 and {s.shape[0]}, got {rank!r}")
    return (s[rank:] ** 2).sum()  # Eckart–Young: the dropped energy


# ----------------------------------------------------------------------------------------------------------
# balance: the same products, factors of equal norm per component
# ----------------------------------------------------------------------------------------------------------
#
# Whitening, output weights and the refit leave a factor pair's product right but its split arbitrary: on
# the built-in MiniLM at keep 0.7 the up factor `a` averaged |3.2| and `b` |0.0007|. A product is the same
# for (a c⁻¹, b c) with any diagonal c > 0, but an optimiser is not: Adam moves every entry by about the
# learning rate, so the small side changes by a large fraction of itself and the tune wrecks the model.
# Balancing picks the c that minimises ‖a‖² + ‖b‖² for the product, c_j = (‖a_j‖ / ‖b_j‖)^½, after which
# both columns have norm (‖a_j‖ ‖b_j‖)^½, as the spectral initialisation U S^½, V S^½ has in the plain
# metric (and ‖a‖² + ‖b‖² = 2 Σ_j ‖a_j‖ ‖b_j‖ by AM–GM at equality).

def _balance_scale(na: torch.Tensor, nb: torch.Tensor) -> torch.Tensor:
    """c_j = (na_j / nb_j)^½ per component, 1 where either norm is zero (r,)."""
    ok = (na > 0) & (nb > 0)
    return torch.where(ok, (na / torch.where(ok, nb, 1.0)).sqrt(), torch.ones_like(na))


def balance_pair(a: torch.Tensor, b: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """(a c⁻¹, b c) with c_j = (‖a_j‖/‖b_j‖)^½: the same a bᵀ, columns j of equal norm. a (m, r), b (n, r); float64."""
    a, b = _as_f64(a, "output factor", 2), _as_f64(b, "input factor", 2)
    c = _balance_scale(a.norm(dim=0), b.norm(dim=0))  # (r,)
    return a / c, b * c


def balance_layer(n_heads: int, n_kv_heads: int, rotary: bool, t: dict[str, torch.Tensor], prefix: str) -> None:
    """Balance every factor pair of one layer's canonical tensors in place (float32 out), products unchanged.

    Feed-forward `a`, `b` per column; value rows against the output columns of their group's heads (a
    component of group g is value row g·r + j and output column (g·q_per_kv + t)·r + j of each head t);
    non-rotary query rows (with their bias) against key rows. Rotary query/key rows are kept source rows and
    stay as they are (a scale would have to be shared by each rotating pair).
    """
    for name in [n[:-2] for n in t if n.startswith(prefix + "ff.") and n.endswith(".a")]:
        a, b = balance_pair(t[name + ".a"], t[name + ".b"])
        t[name + ".a"], t[name + ".b"] = a.float().contiguous(), b.float().contiguous()
    v, o = t.get(prefix + "attn.v.weight"), t.get(prefix + "attn.o.weight")
    if v is not None and o is not None:
        v, o = v.double(), o.double()
        g, r = n_kv_heads, v.shape[0] // n_kv_heads
        o_groups = o.reshape(o.shape[0], g, n_heads // g, r)  # (d, g, q_per_kv, r)
        c = _balance_scale(o_groups.pow(2).sum((0, 2)).sqrt().reshape(-1), v.norm(dim=1))  # (g·r,)
        t[prefix + "attn.v.weight"] = (v * c[:, None]).float()
        t[prefix + "attn.o.weight"] = (o_groups / c.reshape(1, g, 1, r)).reshape(o.shape).float()
        if prefix + "attn.v.bias" in t:
            t[prefix + "attn.v.bias"] = (t[prefix + "attn.v.bias"].double() * c).float()
    q, k = t.get(prefix + "attn.q.weight"), t.get(prefix + "attn.k.weight")
    if not rotary and q is not None and k is not None and q.shape == k.shape:
        c = _balance_scale(k.double().norm(dim=1), q.double().norm(dim=1))  # (h·r,)
        t[prefix + "attn.q.weight"], t[prefix + "attn.k.weight"] = (q * c[:, None]).float(), (k / c[:, None]).float()
        for m, scale in (("q", c), ("k", 1 / c)):
            if prefix + f"attn.{m}.bias" in t:
                t[prefix + f"attn.{m}.bias"] = (t[prefix + f"attn.{m}.bias"].double() * scale).float()
