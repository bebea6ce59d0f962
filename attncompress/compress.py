"""From a source checkpoint to a smaller one: calibrate, analyse, plan, factorise, write.

`factorize_layer` is the pure step (canonical weights of one layer + its ranks →
new canonical weights); `compress` is the pipeline around it.
"""
from __future__ import annotations

import hashlib
import json
import time
from dataclasses import dataclass
from pathlib import Path

import torch

from . import analysis, factorize as fz, plan as planlib
from .io.load import load_model, tokens
from .models import resolve
from .progress import Progress
from .texts import read_texts, token_blocks
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


# ------------------------------------------------------------------------------------------- the pipeline

CALIB_CONTEXT = 128
CALIB_BLOCKS = 256


@dataclass
class Analysed:
    """A source model with its walk, weights, calibration statistics and spectra."""
    loaded: object
    weights: dict
    stats: list | None
    roots: list
    spectra: list[dict]
    calibration: dict | None
    timer: object


def _calibration_blocks(loaded, texts: list[str], context: int, n_blocks: int):
    text, described = read_texts(texts)
    ids = tokens(loaded, text)
    blocks = token_blocks(ids, context, source=", ".join(str(t) for t in texts))
    if blocks.shape[0] > n_blocks:
        # evenly spaced blocks cover the whole text, not only its beginning
        idx = torch.linspace(0, blocks.shape[0] - 1, n_blocks).round().long()
        blocks = blocks[idx]
    digest = hashlib.sha256(blocks.numpy().tobytes()).hexdigest()
    return blocks, {"files": described, "context": context, "blocks": int(blocks.shape[0]),
                    "tokens": int(blocks.numel()), "tokens_sha256": digest}


def analyse(path: str, texts: list[str] | None = None, *, damping: float = 0.01, context: int = CALIB_CONTEXT,
            n_blocks: int = CALIB_BLOCKS, quiet: bool = False, heads=None, kv_heads=None) -> Analysed:
    """Load a source model, collect calibration statistics (when texts are given) and compute all spectra."""
    timer = Timer()
    loaded = load_model(resolve(path), heads, kv_heads)
    if loaded.manifest is not None:
        raise CompressError(f"{loaded.path}: already compressed; analyse and compress the source model instead")
    weights = {n: p.detach() for n, p in _canonical_from_model(loaded)}
    timer.lap("load")
    stats = calib = None
    if texts:
        blocks, calib = _calibration_blocks(loaded, texts, min(context, loaded.shape.max_positions or context), n_blocks)
        stats = analysis.collect_stats(loaded.model, blocks, quiet=quiet)
        timer.lap("calibrate")
    sh = loaded.shape
    roots, spectra = [], []
    with Progress(sh.n_layers, "spectra", unit="layer", quiet=quiet) as bar:
        for i in range(sh.n_layers):
            r = analysis.layer_roots(stats[i] if stats else None, damping, with_bias_row=not sh.rotary and sh.qkv_bias)
            roots.append(r)
            spectra.append(analysis.layer_spectra(sh, weights, i, r))
            bar.update(1)
    timer.lap("spectra")
    return Analysed(loaded, weights, stats, roots, spectra, calib, timer)


def _canonical_from_model(loaded):
    """Canonical weights again from the walk (the runtime holds the same tensors)."""
    from . import arch
    return arch.canonical_weights(loaded.source, loaded.walk)


def make_rank_plan(an: Analysed, keep: float | None, strategy: str, plan_file: str | None) -> "planlib.RankPlan":
    sh = an.loaded.shape
    if plan_file:
        try:
            text = Path(plan_file).read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as e:
            raise CompressError(f"{plan_file}: cannot read the plan ({e.__class__.__name__})") from None
        p = planlib.RankPlan.from_json(text, source=plan_file)
        check_plan_ranks(sh, p, plan_file)
    else:
        if keep is None:
            raise CompressError("give --keep F (fraction of block-matrix parameters to keep) or --plan FILE")
        if strategy not in planlib.STRATEGIES:
            raise CompressError(f"--strategy {strategy!r} is unknown; expected one of {', '.join(planlib.STRATEGIES)}")
        p = planlib.make_plan(spectra_list(sh, an.spectra), sh, keep, strategy)
    return choose_pairs(sh, p, an.spectra)


def compress(path: str, out: str, *, keep: float | None = None, plan_file: str | None = None,
             strategy: str = "global", texts: list[str] | None = None, weights_only: bool = False,
             damping: float = 0.01, force: bool = False, quiet: bool = False, context: int = CALIB_CONTEXT,
             n_blocks: int = CALIB_BLOCKS) -> dict:
    """Compress a source checkpoint into a directory our runtime (and `expand`) reads.

    Raises:
        CompressError: bad options, inputs or plan; the output exists without `force`.
    """
    from .io.write import atomic_dir, check_output, write_model_dir
    check_output(out, force)
    if not texts and not weights_only:
        raise CompressError("give calibration text with --text FILE, or pass --weights-only for plain SVD")
    if texts and weights_only:
        raise CompressError("--text and --weights-only exclude each other")
    an = analyse(path, texts, damping=damping, quiet=quiet, context=context, n_blocks=n_blocks)
    sh = an.loaded.shape
    p = make_rank_plan(an, keep, strategy, plan_file)
    new: dict[str, torch.Tensor] = {n: t for n, t in an.weights.items() if not n.startswith("layers.")}
    with Progress(sh.n_layers, "factorise", unit="layer", quiet=quiet) as bar:
        for i in range(sh.n_layers):
            new.update(factorize_layer(sh, an.weights, i, p.ranks(i), an.roots[i]))
            bar.update(1)
    an.timer.lap("factorise")
    src = an.loaded.source
    manifest = {
        "format_version": FORMAT_VERSION, "tool": "attncompress", "tool_version": _version(),
        "source": {"path": Path(str(src.path)).name, "format": src.format,
                   "files": [{"name": f.name, "bytes": f.stat().st_size, "sha256": sha256_file(f)} for f in src.files]},
        "family": sh.family, "model_type": (src.config or {}).get("model_type"),
        "shape": json.loads(sh.to_json()), "plan": json.loads(p.to_json()),
        "method": {"factors": "whitened" if texts else "svd", "damping": damping if texts else None,
                   "spectral_split": "sqrt(S) on both factors"},
        "calibration": an.calibration,
    }
    with atomic_dir(out, force) as tmp:
        write_model_dir(tmp, new, manifest, an.loaded.tokenizer, src.config)
    an.timer.lap("write")
    summary = planlib.summary(sh, p)
    return {"out": str(out), "source": str(src.path), "method": manifest["method"], "plan": summary,
            "seconds": an.timer.stages}


def _version() -> str:
    try:
        import importlib.metadata
        return importlib.metadata.version("attncompress")
    except Exception:
        return "0+unknown"

