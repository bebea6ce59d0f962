"""Spectra of the per-head products and feed-forward matrices, and the calibration statistics they may use.

Shape legend: d d_model, f d_ff, hd head_dim, g key/value groups, h query heads, n calibration tokens.

Pure functions on tensors, except `collect_stats`, which runs our runtime with
hooks to accumulate the input Gram matrices the whitened spectra need:

    attention input x (d, d), with its column sums (for the [x; 1] query side)
    feed-forward input (d, d), and the input of the down/out matrix (f, f)

Gram matrices are summed in float64 from float32 per-batch products (the
products are exact enough per batch; the sum over tens of thousands of tokens
is where float32 would lose digits).

Padded batches (encoder sentences): whoever runs a batch sets `RealTokens.mask` to its (b, s) mask, and
every hook keeps only the rows of real tokens, so a padded batch adds exactly what its sentences would
add one by one.
"""
from __future__ import annotations

from dataclasses import dataclass

import torch

from . import factorize as fz
from .factorize import Roots
from .model import Transformer
from .progress import Progress
from .sensitivity import LayerSensitivity, form_price, output_scale, pair_prices, price
from .shape import ModelShape


@dataclass
class LayerStats:
    """Calibration statistics of one layer (float64)."""
    attn_gram: torch.Tensor  # (d, d) Σ xᵀx of the attention input
    attn_sum: torch.Tensor  # (d,) Σ x, for the Gram of [x; 1]
    ff_gram: torch.Tensor  # (d, d) feed-forward input
    down_gram: torch.Tensor  # (f, f) input of the down (out) matrix
    tokens: int
    up_sens: torch.Tensor | None = None  # (f,) Σ (∂ down-input / ∂ up-output)² per channel
    gate_sens: torch.Tensor | None = None  # (f,) the same for the gate output (gated feed-forward only)


@dataclass
class RealTokens:
    """The real (not padded) positions of the batch in flight: (b, s) bool, or None when every position is real.

    The runner sets `mask` before each forward pass; the statistic hooks read it.
    """
    mask: torch.Tensor | None = None

    def rows(self, x: torch.Tensor) -> torch.Tensor:
        """(b, s, w) activations → (n, w) rows of the real tokens. Example: mask [[1, 1, 0]] → the first 2 rows."""
        if self.mask is None:
            return x.reshape(-1, x.shape[-1])
        return x[self.mask.bool()]  # (n_real, w), in (batch, position) order


def empty_stats(shape: ModelShape) -> LayerStats:
    """Zero statistics for one layer, ready for `stat_hooks` to fill."""
    d, f = shape.d_model, shape.d_ff
    z = lambda *s: torch.zeros(*s, dtype=torch.float64)  # noqa: E731
    return LayerStats(z(d, d), z(d), z(d, d), z(f, f), 0)


def stat_hooks(blk, st: LayerStats, shape: ModelShape, real: RealTokens | None = None) -> list:
    """Install the hooks that accumulate one block's statistics into `st`; returns the handles to remove.

    With `real`, only the positions its current mask marks as real count (see the module docstring).
    """
    real = real if real is not None else RealTokens()

    def add(field):
        def hook(_module, args):
            x = real.rows(args[0])  # (n, d) or (n, f)
            g = getattr(st, field)
            g += (x.T @ x).double()  # float32 product per batch, float64 sum
            if field == "attn_gram":
                st.attn_sum += x.sum(0).double()
                st.tokens += x.shape[0]
        return hook
    return [blk.attn.register_forward_pre_hook(add("attn_gram")), blk.ff.register_forward_pre_hook(add("ff_gram")),
            blk.ff.down.register_forward_pre_hook(add("down_gram"))] + sensitivity_hooks(blk.ff, st, shape, real)


@torch.no_grad()
def collect_stats(model: Transformer, blocks: torch.Tensor, batch: int = 8, quiet: bool = True,
                  mask: torch.Tensor | None = None) -> list[LayerStats]:
    """Run calibration token blocks (n_blocks, s) through the whole model and accumulate per-layer statistics.

    `mask` (n_blocks, s), for padded sentences: 1 at real tokens; padded positions are neither attended nor
    counted. The output head is never run: only the blocks' inputs are needed. (`compress` streams layer by
    layer with the same hooks instead.)
    """
    sh = model.shape
    stats = [empty_stats(sh) for _ in range(sh.n_layers)]
    real = RealTokens()
    handles = [h for blk, st in zip(model.blocks, stats) for h in stat_hooks(blk, st, sh, real)]
    try:
        with Progress(blocks.shape[0] * blocks.shape[1], "calibration", unit="tok", quiet=quiet) as bar:
            for j in range(0, blocks.shape[0], batch):
                m = None if mask is None else mask[j:j + batch]
                real.mask = m
                model.hidden(blocks[j:j + batch], attention_mask=m)
                bar.update(blocks[j:j + batch].numel())
    finally:
        for h in handles:
            h.remove()
    return stats


def sensitivity_hooks(ff, st: LayerStats, shape: ModelShape, real: RealTokens | None = None) -> list:
    """Hooks that accumulate how strongly an error in each gate/up output channel reaches the down input.

    Gated: down input h = act(g) ⊙ u, so ∂h/∂u = act(g) and ∂h/∂g = act'(g) ⊙ u. Plain: h = act(u),
    ∂h/∂u = act'(u). The squares summed over tokens weight each output channel of gate/up when
    factorising them (`output_weights`). Only the real positions of `real` count. Returns the hook handles.
    """
    real = real if real is not None else RealTokens()
    seen: dict[str, torch.Tensor] = {}
    act = {"silu": torch.nn.functional.silu, "gelu": torch.nn.functional.gelu,
           "gelu_tanh": lambda z: torch.nn.functional.gelu(z, approximate="tanh")}[shape.activation]

    def keep(name):
        def hook(_m, _args, out):
            seen[name] = real.rows(out.detach())  # (n, f)
        return hook

    def derivative(z):
        with torch.enable_grad():  # act' by autograd, exact for every activation we support
            z = z.detach().requires_grad_(True)
            (g,) = torch.autograd.grad(act(z).sum(), z)
        return g

    def accumulate(_m, _args):
        f = shape.d_ff
        if shape.gated:
            g, u = seen.pop("gate"), seen.pop("up")
            up = act(g).pow(2)
            gate = (derivative(g) * u).pow(2)
            st.gate_sens = (st.gate_sens if st.gate_sens is not None else 0) + gate.reshape(-1, f).sum(0).double()
        else:
            up = derivative(seen.pop("up")).pow(2)
        st.up_sens = (st.up_sens if st.up_sens is not None else 0) + up.reshape(-1, f).sum(0).double()

    hs = [ff.up.register_forward_hook(keep("up")), ff.down.register_forward_pre_hook(accumulate)]
    if shape.gated:
        hs.append(ff.gate.register_forward_hook(keep("gate")))
    return hs


def output_weights(sens: torch.Tensor, down: torch.Tensor) -> torch.Tensor:
    """Per-channel output weights (f,) for gate/up: sqrt(sensitivity · ‖column of down‖²), mean square 1.

    An error e_j in channel j of the up (or gate) output moves the block output by about
    sens_j^½ · e_j · down[:, j]; weighting the channels so (a diagonal first-order model of what follows,
    cross-channel terms ignored) makes the truncation minimise the error that reaches the residual stream.
    Example: sens [1, 4], down columns of norm [1, 1] → weights [0.632, 1.265].
    """
    s = sens.double() * down.double().pow(2).sum(0)  # (f,)
    s = s / s.mean().clamp_min(1e-300)
    return s.clamp_min(1e-12).sqrt()  # a dead channel keeps a tiny weight so the map stays invertible


def layer_roots(stats: LayerStats | None, damping: float, with_bias_row: bool = False,
                down: torch.Tensor | None = None, sens: LayerSensitivity | None = None) -> Roots:
    """Damped Cholesky roots of one layer's Gram matrices (see `factorize.gram_root` for the damping).

    Output weights: with `sens` (the layer's loss sensitivities) √F of every matrix's output, for the
    feed-forward matrices and the value-output maps alike (`sensitivity.output_scale`); otherwise, with
    `down` (the layer's down weight (d, f)) and the stats' sensitivities, the down-reach weights of gate and up.
    """
    if stats is None:
        return Roots(None, None, None, None)
    aug = None
    if with_bias_row:
        aug = fz.gram_root(fz.augmented_gram(stats.attn_gram, stats.attn_sum, stats.tokens), damping)
    outs: dict[str, torch.Tensor | None] = {}
    if sens is not None:
        outs = {f"{k}_out": output_scale(sens, k) for k in ("gate", "up", "down") if k in sens.grad_sq}
        outs["vo_out"] = output_scale(sens, "o")
    elif down is not None and stats.up_sens is not None:
        outs["up_out"] = output_weights(stats.up_sens, down)
        outs["gate_out"] = output_weights(stats.gate_sens, down) if stats.gate_sens is not None else None
    return Roots(fz.gram_root(stats.attn_gram, damping), aug, fz.gram_root(stats.ff_gram, damping),
                 fz.gram_root(stats.down_gram, damping), **outs)


def ff_target(w: torch.Tensor, out_w: torch.Tensor | None) -> torch.Tensor:
    """The matrix whose truncation is optimal for the weighted objective: diag(out_w) W, or W."""
    return w.double() if out_w is None else out_w[:, None] * w.double()


def pair_scores(shape: ModelShape, wq: torch.Tensor, wk: torch.Tensor, root=None) -> torch.Tensor:
    """Score of each rotary pair in each key/value group: (g, hd/2).

    score[g, i] = Σ_{h in g} ‖Wq_{h,i} L‖_F · ‖Wk_{g,i} L‖_F, where Wq_{h,i} are the two rows of pair i
    (dims i and i + hd/2). With L from the calibration Gram, ‖W_i L‖² is the summed squared magnitude of that
    pair over the calibration tokens, so the score is the product of the query-pair and key-pair RMS
    magnitudes (rotation leaves a pair's magnitude unchanged); with L = I it is a weight-norm score.
    """
    p = shape.head_dim // 2
    wq, wk = wq.double(), wk.double()
    if root is not None:
        wq, wk = wq @ root[0], wk @ root[0]  # (rows, d) @ (d, d)
    q2 = wq.pow(2).sum(-1).reshape(shape.n_heads, 2, p).sum(1)  # (h, p) squared norm of each pair's two rows
    k2 = wk.pow(2).sum(-1).reshape(shape.n_kv_heads, 2, p).sum(1)  # (g, p)
    q2 = q2.reshape(shape.n_kv_heads, shape.q_per_kv, p)  # query head j belongs to group j // q_per_kv
    return (q2.sqrt() * k2.sqrt()[:, None, :]).sum(1)  # (g, p)


def layer_spectra(shape: ModelShape, w: dict[str, torch.Tensor], layer: int, roots: Roots,
                  sens: LayerSensitivity | None = None) -> dict[str, dict]:
    """Per kind, the values that rank the units of one layer.

    Returns kind → {"values": (groups, units) descending singular values or pair scores, "gains": (units,)
    energy won by each successive unit summed across heads/groups, and for rotary qk "scores": (g, hd/2)
    in pair order}. With `sens` (and `roots` made with it) every gain is a price in loss units, the expected
    rise of the mean calibration loss when that unit is dropped (`sensitivity`), comparable across kinds and
    layers; rotary "scores" are then the pairs' prices.
    """
    p = f"layers.{layer}."
    wq, wk, wv, wo = (w[p + f"attn.{m}.weight"] for m in "qkvo")
    out = {"qk": _qk_spectrum(shape, wq, wk, w.get(p + "attn.q.bias"), roots, sens)}
    l_attn = roots.attn[0] if roots.attn is not None else None
    if roots.vo_out is not None:
        wo = roots.vo_out.double()[:, None] * wo.double()  # diag(D) M: output-weighted value-output maps
    vals = torch.stack([fz.vo_group_singular_values(v_g, heads, l_attn)
                        for v_g, heads in zip(fz.head_slices(wv, shape.n_kv_heads),
                                              fz.group_output_heads(wo, shape.n_kv_heads, shape.q_per_kv))])  # (g, hd)
    out["vo"] = {"values": vals, "gains": _gains(vals, sens).sum(0)}
    for kind in shape.ff_kinds:
        root, out_w = roots.ff_sides(kind)
        s = fz.singular_values(ff_target(w[p + f"ff.{kind}.weight"], out_w), None if root is None else root[0])
        out[kind] = {"values": s[None], "gains": _gains(s, sens)}
    return out


def _gains(sigma: torch.Tensor, sens: LayerSensitivity | None) -> torch.Tensor:
    """σ² (energy), or its price in loss units σ̃² / (2m) when the spectrum is output-weighted by `sens`."""
    return sigma.double().pow(2) if sens is None else price(sigma, sens)


def _qk_spectrum(shape: ModelShape, wq, wk, bq, roots: Roots, sens: LayerSensitivity | None) -> dict:
    """The query-key entry of `layer_spectra`: rotary pair scores (or prices), or per-head form spectra."""
    if shape.rotary:
        sc = pair_scores(shape, wq, wk, roots.attn) if sens is None else pair_prices(shape, sens)  # (g, p)
        vals = sc.sort(dim=1, descending=True).values
        # a pair's score is the magnitude of its score term, so its square plays the part of σ²; a price is one
        return {"values": vals, "gains": (vals.pow(2) if sens is None else vals).sum(0), "scores": sc}
    left, right = roots.qk_sides(bq is not None)
    svs = []
    for m in fz.qk_forms(wq, bq, wk, shape.n_heads, shape.n_kv_heads):  # (d[+1], d) each
        if left is not None:
            m = left[0].T @ m @ right[0]  # Lᵀ M L: the bilinear form in whitened coordinates
        svs.append(torch.linalg.svdvals(m)[: shape.head_dim])
    vals = torch.stack(svs)  # (h, hd)
    gains = vals.pow(2).sum(0)
    if sens is not None:
        # no score gradient here: all the form's energy is priced as zeroing the query output, scaled by
        # FORM_PRICE_SCALE (module note of `sensitivity`)
        gains = gains * (form_price(sens) / float(gains.sum().clamp_min(1e-300)))
    return {"values": vals, "gains": gains}


def energy_kept(gains: torch.Tensor) -> list[float]:
    """Fraction of energy kept at 0..n units. Example: gains [3, 1] → [0.0, 0.75, 1.0]."""
    c = torch.cat([torch.zeros(1, dtype=torch.float64), gains.double().cumsum(0)])
    return (c / c[-1].clamp_min(1e-300)).tolist()
