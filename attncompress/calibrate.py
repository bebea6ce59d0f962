"""The calibration passes of the streaming pipeline, one layer's weights in memory at a time.

Shape legend: n calibration blocks, s tokens per block, d d_model, f d_ff, t = n·s positions.

`compress` reads each layer from the checkpoint when a pass needs it and hands it here as canonical weights;
these functions run the calibration hidden states (n, s, d) through it:

- `forward_layer`: the dense layer with the Gram hooks of `analysis`, its output replacing its input;
- `backward_layer`: the same layer again, from its saved input, with the gradient of the summed calibration
  loss flowing back through it (exactly one backward pass through the whole model, done layer by layer), and
  the sensitivity hooks of `sensitivity` on its matrices;
- `CutPath`: the sequential pass. It carries the dense model's hidden states and those of the model cut so
  far side by side, so layer i is whitened on the inputs the cut layers 0..i−1 produce and refit to
  reproduce the dense outputs from them (DESIGN.md, "Sequential calibration").
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import torch

from . import analysis, factorize as fz
from .model import Transformer, build_block
from .sensitivity import LayerSensitivity, calibration_loss, sensitivity_hooks
from .shape import ModelShape

BATCH = 8  # calibration blocks per forward pass


def _batches(n: int, batch: int = BATCH):
    """Slices of `batch` rows covering 0..n-1."""
    return [slice(j, min(j + batch, n)) for j in range(0, n, batch)]


def _runs(xs: torch.Tensor, mask: torch.Tensor | None):
    """Per batch: (rows, positions, attention mask (b, 1, 1, s) or None, real-token mask (b, s) or None).

    Padded sentences (mask given, longest first) run on their batch's longest sentence only, and padded keys
    are never attended; blocks of the text stream (mask None) use every position.
    """
    for sl in _batches(xs.shape[0]):
        if mask is None:
            yield sl, slice(None), None, None
            continue
        m = mask[sl]
        s = int(m.sum(1).max())
        real = m[:, :s].bool()
        yield sl, slice(0, s), real[:, None, None, :], real


def _block(shape: ModelShape, w: dict[str, torch.Tensor], layer: int):
    """A runtime block that never asks for weight gradients."""
    blk = build_block(shape, w, layer).eval()
    return blk.requires_grad_(False)


@torch.no_grad()
def embed(emb: Transformer, blocks: torch.Tensor) -> torch.Tensor:
    """The first block's input (n, s, d) for token blocks (n, s); `emb` is built without blocks or final norm."""
    xs = torch.empty(blocks.shape[0], blocks.shape[1], emb.shape.d_model)
    for sl in _batches(blocks.shape[0]):
        xs[sl] = emb.hidden(blocks[sl])
    return xs


@torch.no_grad()
def forward_layer(shape: ModelShape, w: dict[str, torch.Tensor], layer: int, xs: torch.Tensor,
                  mask: torch.Tensor | None = None) -> analysis.LayerStats:
    """Run dense block `layer` over xs (n, s, d) in place and return its statistics (`analysis.stat_hooks`).

    `mask` (n, s): 1 at real tokens (padded sentences); the statistics count real tokens only.
    """
    st = analysis.empty_stats(shape)
    blk = _block(shape, w, layer)
    real = analysis.RealTokens()
    handles = analysis.stat_hooks(blk, st, shape, real)
    try:
        for sl, pos, att, real.mask in _runs(xs, mask):
            # the block's output replaces its input: the next layer's input, and all the state carried over
            xs[sl, pos] = blk(xs[sl, pos], mask=att, cache=None, layer=layer, start=0)
    finally:
        for h in handles:
            h.remove()
    return st


def loss_gradient(top: Transformer, xs: torch.Tensor, blocks: torch.Tensor, mask: torch.Tensor | None = None,
                  seed: int = 0) -> tuple[torch.Tensor, int]:
    """∂S/∂(last block output) for every block, (n, s, d), and the number m of loss terms in S.

    `top` holds the model's final norm and output head (built without blocks); see `sensitivity` for S.
    Padded positions get no gradient (nothing reads them).
    """
    grad = torch.zeros_like(xs)
    terms = 0
    for sl, pos, _att, real in _runs(xs, mask):
        with torch.enable_grad():
            x = xs[sl, pos].detach().requires_grad_(True)
            s, m = calibration_loss(top, x, blocks[sl, pos], seed, sl.start, real)
            (grad[sl, pos],) = torch.autograd.grad(s, x)
        terms += m
    return grad, terms


def backward_layer(shape: ModelShape, w: dict[str, torch.Tensor], layer: int, xs_in: torch.Tensor,
                   grad: torch.Tensor, terms: int, mask: torch.Tensor | None = None) -> LayerSensitivity:
    """Back-propagate grad (n, s, d) through block `layer` from its input xs_in, in place: grad becomes ∂S/∂input.

    Returns the layer's sensitivities (`sensitivity.LayerSensitivity`); padded positions (`mask` 0) carry no
    gradient, so they add nothing, and only real tokens are counted.
    """
    n = int(mask.sum()) if mask is not None else xs_in.shape[0] * xs_in.shape[1]
    sens = LayerSensitivity(positions=n, terms=terms)
    blk = _block(shape, w, layer)
    handles = sensitivity_hooks(blk, sens)
    try:
        for sl, pos, att, _real in _runs(xs_in, mask):
            with torch.enable_grad():
                x = xs_in[sl, pos].detach().requires_grad_(True)
                y = blk(x, mask=att, cache=None, layer=layer, start=0)  # (b, s, d)
                (grad[sl, pos],) = torch.autograd.grad(y, x, grad[sl, pos])
    finally:
        for h in handles:
            h.remove()
    return sens


class InputStore:
    """Each layer's calibration input (n, s, d), kept on disk between the forward and the backward pass."""

    def __init__(self, folder: Path):
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)

    def _file(self, layer: int) -> Path:
        return self.folder / f"input-{layer}.pt"

    def save(self, layer: int, xs: torch.Tensor) -> None:
        torch.save(xs.clone(), self._file(layer))

    def pop(self, layer: int) -> torch.Tensor:
        """The saved input of `layer`, removed from disk."""
        xs = torch.load(self._file(layer), weights_only=True)
        self._file(layer).unlink()
        return xs


# -------------------------------------------------------------------------------------------- sequential

@dataclass
class CutStats:
    """Statistics of one layer on the cut path, with the cross Gram matrices against the dense path (float64)."""
    stats: analysis.LayerStats  # Gram matrices of the inputs the cut prefix produces (through the dense layer)
    attn_cross: torch.Tensor | None  # (d, d) Σ x'_t x_tᵀ of the attention inputs, cut (x') against dense (x)
    ff_cross: torch.Tensor | None  # (d, d) the same for the feed-forward inputs
    dense_down: list[torch.Tensor] | None  # per batch (b·s, f) the dense path's down inputs, for the down refit


def _capture(blk, real: analysis.RealTokens) -> tuple[dict[str, torch.Tensor], list]:
    """Hooks keeping the block's attention, feed-forward and down inputs of the next forward at `real`'s tokens, (t, width)."""
    got: dict[str, torch.Tensor] = {}

    def keep(name):
        def hook(_m, args):
            # a copy: the input may be a view of the hidden states that the caller overwrites with the output
            got[name] = real.rows(args[0]).clone()
        return hook
    return got, [blk.attn.register_forward_pre_hook(keep("attn")), blk.ff.register_forward_pre_hook(keep("ff")),
                 blk.ff.down.register_forward_pre_hook(keep("down"))]


class CutPath:
    """The dense and the cut model's hidden states, advanced one layer at a time (see the module note)."""

    def __init__(self, xs: torch.Tensor, refit: bool, mask: torch.Tensor | None = None):
        self.dense = xs.clone() if refit else None  # (n, s, d) the dense path, needed only for the cross Grams
        self.cut = xs  # (n, s, d) hidden states of the model cut so far
        self.refit = refit
        self.mask = mask  # (n, s) real tokens of padded sentences, or None

    @torch.no_grad()
    def stats(self, shape: ModelShape, w: dict[str, torch.Tensor], layer: int) -> CutStats:
        """Layer `layer`'s Gram matrices on the cut path; with refit also the cross Grams, advancing the dense path."""
        st = analysis.empty_stats(shape)
        real = analysis.RealTokens()
        cut_blk = _block(shape, w, layer)
        handles = analysis.stat_hooks(cut_blk, st, shape, real)
        got_c, cap_c = _capture(cut_blk, real)
        dense_blk = _block(shape, w, layer)  # a second copy: only the cut path's run feeds the statistics
        got_d, cap_d = _capture(dense_blk, real)
        attn_c = ff_c = 0
        downs = []
        try:
            for sl, pos, att, real.mask in _runs(self.cut, self.mask):
                cut_blk(self.cut[sl, pos], mask=att, cache=None, layer=layer, start=0)
                if self.refit:
                    self.dense[sl, pos] = dense_blk(self.dense[sl, pos], mask=att, cache=None, layer=layer, start=0)
                    attn_c = attn_c + got_c["attn"].double().T @ got_d["attn"].double()  # (t, d)ᵀ (t, d) → (d, d)
                    ff_c = ff_c + got_c["ff"].double().T @ got_d["ff"].double()
                    downs.append(got_d["down"])  # (b·s, f)
        finally:
            for h in handles + cap_c + cap_d:
                h.remove()
        if not self.refit:
            return CutStats(st, None, None, None)
        return CutStats(st, attn_c, ff_c, downs)

    @torch.no_grad()
    def down_grams(self, shape: ModelShape, w_cut: dict[str, torch.Tensor], layer: int, cs: CutStats
                   ) -> tuple[torch.Tensor, torch.Tensor]:
        """G' and C of the down matrix's inputs: the cut layer (before its down refit) against the dense one."""
        blk = _block(shape, w_cut, layer)
        real = analysis.RealTokens()
        got, cap = _capture(blk, real)
        gram = cross = 0
        try:
            for (sl, pos, att, real.mask), dense_down in zip(_runs(self.cut, self.mask), cs.dense_down):
                blk(self.cut[sl, pos], mask=att, cache=None, layer=layer, start=0)
                xc = got["down"].double()  # (b·s, f)
                gram = gram + xc.T @ xc
                cross = cross + xc.T @ dense_down.double()
        finally:
            for h in cap:
                h.remove()
        return gram, cross

    @torch.no_grad()
    def advance(self, shape: ModelShape, w_cut: dict[str, torch.Tensor], layer: int) -> None:
        """Run the finished cut layer over the cut path: its output is the next layer's input."""
        blk = _block(shape, w_cut, layer)
        for sl, pos, att, _real in _runs(self.cut, self.mask):
            self.cut[sl, pos] = blk(self.cut[sl, pos], mask=att, cache=None, layer=layer, start=0)


def refit_layer(shape: ModelShape, w: dict[str, torch.Tensor], new: dict[str, torch.Tensor], layer: int,
                cs: CutStats, roots: fz.Roots, damping: float) -> None:
    """Refit the query/key rows, value rows and gate/up inputs of a cut layer in place (`factorize.refit_*`).

    Each keeps its output side and is solved to reproduce, from the cut path's inputs, what the layer's matrix
    (its cut form for query/key, the dense one elsewhere) gives on the dense path's inputs. Biases stay.
    """
    p = f"layers.{layer}."
    ga, gf = cs.stats.attn_gram, cs.stats.ff_gram
    for m in ("q", "k"):
        new[p + f"attn.{m}.weight"] = fz.refit_dense(new[p + f"attn.{m}.weight"], ga, cs.attn_cross, damping).float()
    new[p + "attn.v.weight"] = fz.refit_values(w[p + "attn.v.weight"], w[p + "attn.o.weight"], new[p + "attn.o.weight"],
                                               shape.n_kv_heads, shape.q_per_kv, ga, cs.attn_cross, roots.vo_out,
                                               damping).float()
    for kind in shape.ff_kinds:
        if kind != "down":
            _refit_ff(w, new, p + f"ff.{kind}", gf, cs.ff_cross, getattr(roots, f"{kind}_out"), damping)


def refit_down(w: dict[str, torch.Tensor], new: dict[str, torch.Tensor], layer: int, gram: torch.Tensor,
               cross: torch.Tensor, roots: fz.Roots, damping: float) -> None:
    """Refit the down matrix of a cut layer in place, from its inputs on the cut path (`CutPath.down_grams`)."""
    _refit_ff(w, new, f"layers.{layer}.ff.down", gram, cross, roots.down_out, damping)


def _refit_ff(w, new, name: str, gram, cross, out_w, damping: float) -> None:
    """One feed-forward matrix: its input factor b with a fixed, or the whole weight when it stayed dense."""
    if name + ".a" in new:
        new[name + ".b"] = fz.refit_factor(w[name + ".weight"], new[name + ".a"], gram, cross, out_w, damping).float()
    else:
        new[name + ".weight"] = fz.refit_dense(w[name + ".weight"], gram, cross, damping).float()
