"""From a source checkpoint to a smaller one: calibrate, analyse, plan, factorise, write.

`factorize_layer` is the pure step (canonical weights of one layer + its ranks →
new canonical weights); `compress` is the pipeline around it.
"""
from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass
from pathlib import Path

import torch

from . import analysis, factorize as fz, plan as planlib
from .analysis import Roots
from .errors import CompressError
from .shape import ModelShape

FORMAT_VERSION = 1
DEFAULT_DAMPING = 0.01


def _rows(n_heads: int, hd: int, idx: torch.Tensor) -> torch.Tensor:
    """Row indices of the kept dims `idx` (per head, (heads, k)) in a (n_heads*hd, d) projection."""
    return (torch.arange(n_heads)[:, None] * hd + idx).reshape(-1)


def factorize_layer(shape: ModelShape, w: dict[str, torch.Tensor], layer: int, ranks: planlib.LayerRanks,
                    roots: Roots) -> dict[str, torch.Tensor]:
    """New canonical tensors of one layer at the planned ranks (float32).

    Rotary qk keeps `ranks.qk_pairs` (g, p) rows exactly; non-rotary qk refactorises each head's
    [x; 1] bilinear form; vo refactorises each key/value group jointly after folding the value bias into
    the output bias; feed-forward matrices get spectral factors `a: (d_out, r)`, `b: (d_in, r)` or stay dense.
    Whitened when `roots` carry calibration Gram roots, plain SVD otherwise.
    """
    p = f"layers.{layer}."
    d, hd, h, g, rep = shape.d_model, shape.head_dim, shape.n_heads, shape.n_kv_heads, shape.q_per_kv
    out: dict[str, torch.Tensor] = {}
    for name in (p + "attn_norm.weight", p + "attn_norm.bias", p + "ff_norm.weight", p + "ff_norm.bias"):
        if name in w:
            out[name] = w[name]
    wq, wk, wv, wo = (w[p + f"attn.{m}.weight"] for m in "qkvo")
    bq, bk, bv, bo = (w.get(p + f"attn.{m}.bias") for m in "qkvo")
    # --- query-key
    if shape.rotary:
        pairs = torch.tensor(ranks.qk_pairs, dtype=torch.long)  # (g, p) sorted pair indices
        dims = torch.cat([pairs, pairs + hd // 2], dim=1)  # (g, 2p): first halves, then second halves
        q_rows = _rows(h, hd, dims.repeat_interleave(rep, 0))  # query head j uses its group's pairs
        k_rows = _rows(g, hd, dims)
        out[p + "attn.q.weight"], out[p + "attn.k.weight"] = wq[q_rows], wk[k_rows]
        if bq is not None:
            out[p + "attn.q.bias"], out[p + "attn.k.bias"] = bq[q_rows], bk[k_rows]
        out[p + "attn.pairs"] = pairs
    else:
        r = ranks.qk
        nq, nb, nk = [], [], []
        for i, (q_h, k_h) in enumerate(zip(analysis.head_slices(wq, h), analysis.head_slices(wk, g))):
            m = fz.qk_bias_form(q_h, None if bq is None else bq.reshape(h, hd)[i], k_h)  # (d[+1], d)
            left = roots.attn_aug if bq is not None else roots.attn
            if roots.attn is None:
                a, b = fz.bilinear_factors(m, r)
            else:
                a, b = fz.bilinear_factors(m, r, left[0], left[1], roots.attn[0], roots.attn[1])
            q_new, bq_new, k_new = fz.split_qk_factors(a, b, d)
            nq.append(q_new), nk.append(k_new)
            if bq_new is not None:
                nb.append(bq_new)
        out[p + "attn.q.weight"], out[p + "attn.k.weight"] = torch.cat(nq).float(), torch.cat(nk).float()
        if bq is not None:
            # the key bias only added query-constant terms to each softmax row, so it is gone exactly
            out[p + "attn.q.bias"] = torch.cat(nb).float()
            out[p + "attn.k.bias"] = torch.zeros(h * r)
    # --- value-output
    r = ranks.vo
    if bv is not None:
        bo = fz.fold_value_bias(bv, wo, bo, h, g).float()  # rows of attention sum to one: exact
    new_v, new_o = [], [None] * h
    for gi, v_g in enumerate(analysis.head_slices(wv, g)):
        heads = [wo[:, (gi * rep + j) * hd:(gi * rep + j + 1) * hd] for j in range(rep)]  # (d, hd) each
        if roots.attn is None:
            a, b = fz.vo_group_factors(v_g, heads, r)
        else:
            a, b = fz.vo_group_factors(v_g, heads, r, roots.attn[0], roots.attn[1])
        v_new, o_new = fz.split_vo_factors(a, b, rep)
        new_v.append(v_new)
        for j, o_h in enumerate(o_new):
            new_o[gi * rep + j] = o_h
    out[p + "attn.v.weight"] = torch.cat(new_v).float()  # (g*r, d)
    out[p + "attn.o.weight"] = torch.cat(new_o, dim=1).float()  # (d, h*r)
    if bv is not None:
        out[p + "attn.v.bias"] = torch.zeros(g * r)
    if bo is not None:
        out[p + "attn.o.bias"] = bo
    # --- feed-forward
    for kind in planlib.ff_kinds(shape):
        name = p + f"ff.{kind}"
        if name + ".bias" in w:
            out[name + ".bias"] = w[name + ".bias"]
        rank = ranks.ff[kind]
        if rank is None:
            out[name + ".weight"] = w[name + ".weight"]
            continue
        root = roots.down if kind == "down" else roots.ff
        if root is None:
            a, b = fz.spectral_factors(w[name + ".weight"], rank)
        else:
            a, b = fz.whitened_factors(w[name + ".weight"], rank, root[0], root[1])
        out[name + ".a"], out[name + ".b"] = a.float().contiguous(), b.float().contiguous()
    return out


def spectra_list(shape: ModelShape, per_layer: list[dict]) -> list[planlib.MatrixSpectrum]:
    """Attach the measured gains to the price list of every matrix."""
    out = []
    for cost in planlib.matrix_layout(shape):
        gains = per_layer[cost.layer][cost.kind]["gains"]
        gains = torch.sort(gains.double().clamp_min(0), descending=True).values
        out.append(cost.with_gains(gains.tolist()))
    return out


def choose_pairs(shape: ModelShape, plan: planlib.RankPlan, per_layer: list[dict]) -> planlib.RankPlan:
    """Fill each rotary layer's kept pairs: the highest-scoring `qk` pairs of each group (unless the plan names them)."""
    if not shape.rotary:
        return plan
    picks = {}
    for lr in plan.layers:
        if lr.qk_pairs is not None:
            continue
        sc = per_layer[lr.layer]["qk"]["scores"]  # (g, hd/2)
        top = torch.topk(sc, lr.qk, dim=1, sorted=True).indices  # ties: torch's order, deterministic on CPU
        picks[lr.layer] = [sorted(t.tolist()) for t in top]
    return plan.with_qk_pairs(picks) if picks else plan


def sha256_file(path: Path, chunk: int = 1 << 22) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while block := f.read(chunk):
            h.update(block)
    return h.hexdigest()


@dataclass
class Timer:
    """Wall time per stage, for the report."""
    def __post_init__(self):
        self.stages: dict[str, float] = {}
        self._t = time.perf_counter()

    def lap(self, name: str) -> None:
        now = time.perf_counter()
        self.stages[name] = round(now - self._t, 3)
        self._t = now


def check_plan_ranks(shape: ModelShape, plan: planlib.RankPlan, source: str) -> None:
    """Plan checks that need the pair structure: the kept pairs of a rotary layer name valid, distinct pairs."""
    plan.check(shape, source=source)
    for lr in plan.layers:
        if shape.rotary and lr.qk_pairs is not None:
            if len(lr.qk_pairs) != shape.n_kv_heads or any(len(set(gp)) != lr.qk or not all(0 <= i < shape.n_pairs for i in gp)
                                                           for gp in lr.qk_pairs):
                raise CompressError(f"{source}: layer {lr.layer} qk_pairs must list {lr.qk} distinct pairs in "
                                    f"0..{shape.n_pairs - 1} for each of {shape.n_kv_heads} groups")
