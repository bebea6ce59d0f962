"""From a source checkpoint to a smaller one: calibrate, analyse, plan, factorise, write.

`factorize_layer` is the pure step (canonical weights of one layer + its ranks →
new canonical weights); `compress` is the pipeline around it.
"""
from __future__ import annotations

import dataclasses
import hashlib
import json
import shutil
import sys
from dataclasses import dataclass
from pathlib import Path

import torch

from . import allocator, analysis, arch, calibrate, factorize as fz, plan as planlib, strategies
from .loading import Loaded, is_compressed, tokens
from .io.read import open_source
from .io import storage
from .io.write import DEFAULT_SHARD_SIZE
from .model import build
from .builtin import resolve
from .progress import Progress, Timer
from .evaluate import sentence_batch
from .texts import read_texts, token_blocks
from .errors import CompressError
from .factorize import DEFAULT_DAMPING
from .sensitivity import LayerSensitivity
from .shape import ModelShape

FORMAT_VERSION = 1


def factorize_layer(shape: ModelShape, w: dict[str, torch.Tensor], layer: int, ranks: planlib.LayerRanks,
                    roots: fz.Roots) -> dict[str, torch.Tensor]:
    """New canonical tensors of one layer at the planned ranks (float32).

    Rotary qk keeps `ranks.qk_pairs` (g, p) rows exactly; non-rotary qk refactorises each head's
    [x; 1] bilinear form; vo refactorises each key/value group jointly after folding the value bias into
    the output bias; feed-forward matrices get spectral factors `a: (d_out, r)`, `b: (d_in, r)` or stay dense.
    Whitened when `roots` carry calibration Gram roots, plain SVD otherwise (the maths: `factorize`).
    """
    p = f"layers.{layer}."
    out = {n: w[n] for n in (p + "attn_norm.weight", p + "attn_norm.bias", p + "ff_norm.weight", p + "ff_norm.bias")
           if n in w}
    out.update(_qk_tensors(shape, w, p, ranks, roots))
    out.update(_vo_tensors(shape, w, p, ranks.vo, roots))
    out.update(_ff_tensors(shape, w, p, ranks, roots))
    return out


def _qk_tensors(shape: ModelShape, w: dict, p: str, ranks: planlib.LayerRanks, roots: fz.Roots) -> dict:
    """Query and key tensors of one layer: kept rotary rows (and the pairs), or cut [x; 1] forms."""
    wq, wk, bq, bk = w[p + "attn.q.weight"], w[p + "attn.k.weight"], w.get(p + "attn.q.bias"), w.get(p + "attn.k.bias")
    h, g = shape.n_heads, shape.n_kv_heads
    if shape.rotary:
        pairs = torch.tensor(ranks.qk_pairs, dtype=torch.long)  # (g, p) sorted pair indices
        q_rows, k_rows = fz.rotary_rows(pairs, h, g, shape.head_dim)
        out = {p + "attn.q.weight": wq[q_rows], p + "attn.k.weight": wk[k_rows], p + "attn.pairs": pairs}
        if bq is not None:
            out[p + "attn.q.bias"], out[p + "attn.k.bias"] = bq[q_rows], bk[k_rows]
        return out
    q, q_bias, k = fz.qk_factors(wq, bq, wk, h, g, ranks.qk, roots)
    out = {p + "attn.q.weight": q.float(), p + "attn.k.weight": k.float()}
    if bq is not None:
        # the key bias only added query-constant terms to each softmax row, so it is gone exactly
        out[p + "attn.q.bias"] = q_bias.float()
        out[p + "attn.k.bias"] = torch.zeros(h * ranks.qk)
    return out


def _vo_tensors(shape: ModelShape, w: dict, p: str, rank: int, roots: fz.Roots) -> dict:
    """Value and output tensors of one layer, the value bias folded into the output bias."""
    wv, wo, bv, bo = w[p + "attn.v.weight"], w[p + "attn.o.weight"], w.get(p + "attn.v.bias"), w.get(p + "attn.o.bias")
    if bv is not None:
        bo = fz.fold_value_bias(bv, wo, bo, shape.n_heads, shape.n_kv_heads).float()  # rows of attention sum to one
    v, o = fz.vo_factors(wv, wo, shape.n_kv_heads, shape.q_per_kv, rank, roots)
    out = {p + "attn.v.weight": v.float(), p + "attn.o.weight": o.float()}  # (g*r, d), (d, h*r)
    if bv is not None:
        out[p + "attn.v.bias"] = torch.zeros(shape.n_kv_heads * rank)
    if bo is not None:
        out[p + "attn.o.bias"] = bo
    return out


def _ff_tensors(shape: ModelShape, w: dict, p: str, ranks: planlib.LayerRanks, roots: fz.Roots) -> dict:
    """Feed-forward tensors of one layer: factors `a`, `b` at the planned rank, or the dense weight."""
    out = {}
    for kind in planlib.ff_kinds(shape):
        name = p + f"ff.{kind}"
        if name + ".bias" in w:
            out[name + ".bias"] = w[name + ".bias"]
        if ranks.ff[kind] is None:
            out[name + ".weight"] = w[name + ".weight"]
            continue
        a, b = fz.ff_factors(w[name + ".weight"], ranks.ff[kind], *roots.ff_sides(kind))
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
#
# Two passes over the layers, each holding one layer's weights at a time (read again from the checkpoint
# files), so memory is bounded by the largest layer plus the calibration state, never by the model:
#   1. analyse: the calibration hidden states (n_blocks, context, d) go forward through layer i with hooks for
#      its input Gram matrices (saved to a scratch directory, with the layer's input); then the gradient of
#      the summed calibration loss goes back through the layers in reverse, each read again, with hooks for
#      its output sensitivities (`calibrate`, `sensitivity`). Each layer's spectra, whitened and priced in
#      loss units, are all that stays in memory.
#   2. plan (needs every spectrum), then factorise each layer and stream it into safetensors shards. By
#      default sequentially: layer i is whitened on the inputs the already-cut layers produce and refit to
#      reproduce the dense outputs from them (`calibrate.CutPath`).
# The calibration runs calibrate.BATCH blocks per forward pass, the same batches through the same operations
# as running the whole model, so the numbers (and the bytes written) are those of the one-shot computation.

CALIB_CONTEXT = 128
CALIB_BLOCKS = 64  # 8192 tokens at 128: measured on SmolLM2, see benchmarks/quality_table.py and the README
# An encoder's calibration is sentences (about 40 tokens each in the bundled texts): 64 of them gave its
# 1536-wide down matrix a Gram of fewer tokens than dimensions. Measured on the built-in MiniLM at keep 0.7,
# mean cosine on held-out pydoc / license paragraphs: 64 → 0.907 / 0.824, 256 → 0.921 / 0.855, 512 → 0.925 /
# 0.856, 1024 → 0.928 / 0.868 (compress 34, 64, 103, 184 s; benchmarks/scans/encoder_calibration_scan.py,
# figures in benchmarks/results/scans.md).
CALIB_SENTENCES = 256


@dataclass
class Analysed:
    """A source model's walk, calibration description and the spectra of every layer; no weights.

    `loaded.model` is None: the layers were run one at a time. `scratch`, when set, holds each layer's
    calibration Gram matrices (`layer-{i}.safetensors`) and sensitivities (`sens-{i}.safetensors`) for the
    factorise pass; `calib` is the calibration input (token blocks, or padded sentences with their mask).
    """
    loaded: Loaded
    spectra: list[dict]
    calibration: dict | None
    timer: Timer
    damping: float = DEFAULT_DAMPING
    scratch: Path | None = None
    calib: Calibration | None = None
    priced: bool = False  # spectra in loss units (sensitivities measured)


def open_model(path, heads: int | None = None, kv_heads: int | None = None) -> Loaded:
    """Open and walk a source checkpoint without reading its tensors (`Loaded.model` is None).

    Raises:
        CompressError: unreadable or corrupt files, unknown family, shapes that disagree with the config,
            or a directory this tool wrote (compress its source instead).
    """
    source = open_source(resolve(path))
    if is_compressed(source.path):
        raise CompressError(f"{source.path}: already compressed; analyse and compress the source model instead")
    w = arch.walk(source, heads, kv_heads)
    return Loaded(None, w.shape, source.tokenizer(), source, w, None)


def layer_weights(loaded: Loaded, layer: int) -> dict[str, torch.Tensor]:
    """The canonical float32 tensors of one layer, read from the checkpoint now."""
    p = f"layers.{layer}."
    return {n: arch.load_tensor(loaded.source, ref) for n, ref in loaded.walk.refs.items() if n.startswith(p)}


def _ends(loaded: Loaded, prefixes: tuple[str, ...]):
    """The runtime without blocks, from the non-layer tensors with these name prefixes (embedding, or head too)."""
    w = {n: arch.load_tensor(loaded.source, ref) for n, ref in loaded.walk.refs.items() if n.startswith(prefixes)}
    return build(loaded.shape, w, blocks=False).requires_grad_(False)


@dataclass
class Calibration:
    """The calibration input: token ids (n, s), their mask (n, s) or None, and the manifest's description.

    Decoders read contiguous blocks of the text stream (mask None: every position real). Encoders read real
    sentences (`texts.split_sentences`), each with the tokenizer's own special tokens, sorted by length
    (longest first, so that a batch of neighbours wastes little on padding) and padded; mask is 1 at real
    tokens. The analysis pass and any later pass over the same text take these (ids, mask) batches.
    """
    ids: torch.Tensor
    mask: torch.Tensor | None
    description: dict


def _calibration(loaded, texts: list[str], context: int, n_blocks: int | None,
                 option: str = "--calib-context") -> Calibration:
    """The calibration input of a model: blocks for a decoder, sentences for an encoder (see `Calibration`);
    `n_blocks` None: CALIB_BLOCKS blocks, or CALIB_SENTENCES sentences."""
    context = min(context, loaded.shape.max_positions or context)  # a learned position table caps the context
    if loaded.shape.is_decoder:
        return _calibration_blocks(loaded, texts, context, n_blocks or CALIB_BLOCKS, option)
    return _calibration_sentences(loaded, texts, context, n_blocks or CALIB_SENTENCES)


def _calibration_blocks(loaded, texts: list[str], context: int, n_blocks: int, option: str) -> Calibration:
    """Token blocks (n_blocks, context) of the calibration texts."""
    text, described = read_texts(texts)
    ids = tokens(loaded, text)
    blocks = token_blocks(ids, context, source=", ".join(str(t) for t in texts), option=option)
    if blocks.shape[0] > n_blocks:
        # evenly spaced blocks cover the whole text, not only its beginning
        idx = torch.linspace(0, blocks.shape[0] - 1, n_blocks).round().long()
        blocks = blocks[idx]
    digest = hashlib.sha256(blocks.numpy().tobytes()).hexdigest()
    return Calibration(blocks, None, {"files": described, "context": context, "blocks": int(blocks.shape[0]),
                                      "tokens": int(blocks.numel()), "tokens_sha256": digest})


def _calibration_sentences(loaded, texts: list[str], context: int, n_sentences: int) -> Calibration:
    """At most n_sentences evenly spaced sentences of the texts, at most `context` tokens each, padded."""
    ids, mask, described = sentence_batch(loaded, texts, context, n_sentences)
    order = torch.sort(mask.sum(1), descending=True, stable=True).indices  # longest first
    ids, mask = ids[order], mask[order]
    digest = hashlib.sha256(ids.numpy().tobytes() + mask.numpy().tobytes()).hexdigest()
    return Calibration(ids, mask, {"files": described, "context": context, "sentences": int(ids.shape[0]),
                                   "tokens": int(mask.sum()), "tokens_sha256": digest})


def _save(scratch: Path, name: str, tensors: dict[str, torch.Tensor]) -> None:
    """Put one layer's statistics on disk (float64, exact) until the factorise pass needs them."""
    from safetensors.torch import save_file
    save_file(tensors, str(scratch / f"{name}.safetensors"))


def _load(scratch: Path, name: str, remove: bool = False) -> dict[str, torch.Tensor]:
    """Statistics as `_save` left them (and, with `remove`, give the disk back)."""
    from safetensors.torch import load_file
    f = scratch / f"{name}.safetensors"
    t = load_file(str(f))
    if remove:
        f.unlink()
    return t


def _stats_tensors(st: analysis.LayerStats) -> dict[str, torch.Tensor]:
    t = {"attn_gram": st.attn_gram, "attn_sum": st.attn_sum, "ff_gram": st.ff_gram, "down_gram": st.down_gram,
         "tokens": torch.tensor(st.tokens)}
    t.update({k: getattr(st, k) for k in ("up_sens", "gate_sens") if getattr(st, k) is not None})
    return t


def _stats_from(t: dict[str, torch.Tensor]) -> analysis.LayerStats:
    return analysis.LayerStats(t["attn_gram"], t["attn_sum"], t["ff_gram"], t["down_gram"], int(t["tokens"]),
                               t.get("up_sens"), t.get("gate_sens"))


def _roots(sh: ModelShape, st, damping: float, w: dict, layer: int, sens=None) -> fz.Roots:
    """The layer's whitening roots and output weights (see `analysis.layer_roots`)."""
    return analysis.layer_roots(st, damping, with_bias_row=not sh.rotary and sh.qkv_bias,
                                down=w[f"layers.{layer}.ff.down.weight"], sens=sens)


def _first_pass(loaded: Loaded, calib, damping: float, scratch: Path | None, quiet: bool, timer: Timer,
                priced: bool = True) -> Analysed:
    """Spectra of every layer, one layer in memory at a time (see the pipeline note above)."""
    allocator.release_large_frees()
    sh = loaded.shape
    if calib is None:
        spectra = []
        with Progress(sh.n_layers, "analyse", unit="layer", quiet=quiet) as bar:
            for i in range(sh.n_layers):
                w = layer_weights(loaded, i)
                spectra.append(analysis.layer_spectra(sh, w, i, _roots(sh, None, damping, w, i)))
                bar.update(1)
        timer.lap("spectra")
        return Analysed(loaded, spectra, None, timer, damping)
    blocks, mask = calib.ids, calib.mask
    scratch.mkdir()
    xs = calibrate.embed(_ends(loaded, ("embed.",)), blocks)  # (n_blocks, s, d)
    store = calibrate.InputStore(scratch / "inputs") if priced else None
    spectra: list[dict | None] = [None] * sh.n_layers
    with Progress(sh.n_layers, "calibrate", unit="layer", quiet=quiet) as bar:
        for i in range(sh.n_layers):
            w = layer_weights(loaded, i)
            if store is not None:
                store.save(i, xs)
            st = calibrate.forward_layer(sh, w, i, xs, mask)
            _save(scratch, f"layer-{i}", _stats_tensors(st))
            if not priced:
                spectra[i] = analysis.layer_spectra(sh, w, i, _roots(sh, st, damping, w, i))
            bar.update(1)
    timer.lap("calibrate")
    if priced:
        _backward_pass(loaded, calib, xs, store, scratch, damping, spectra, quiet, timer)
    return Analysed(loaded, spectra, calib.description, timer, damping, scratch, calib, priced)


def _backward_pass(loaded: Loaded, calib: Calibration, xs, store, scratch: Path, damping: float, spectra: list,
                   quiet: bool, timer: Timer) -> None:
    """The loss gradient back through the layers in reverse: sensitivities, then each layer's priced spectra."""
    sh = loaded.shape
    grad, terms = calibrate.loss_gradient(_ends(loaded, ("embed.", "final_norm.", "lm_head.")), xs, calib.ids,
                                          calib.mask)
    with Progress(sh.n_layers, "sensitivity", unit="layer", quiet=quiet) as bar:
        for i in reversed(range(sh.n_layers)):
            w = layer_weights(loaded, i)
            sens = calibrate.backward_layer(sh, w, i, store.pop(i), grad, terms, calib.mask)
            _save(scratch, f"sens-{i}", sens.to_tensors())
            timer.lap("sensitivity")
            roots = _roots(sh, _stats_from(_load(scratch, f"layer-{i}")), damping, w, i, sens)
            spectra[i] = analysis.layer_spectra(sh, w, i, roots, sens)
            timer.lap("spectra")
            bar.update(1)


def analyse(path: str, texts: list[str] | None = None, *, damping: float = DEFAULT_DAMPING,
            context: int = CALIB_CONTEXT, n_blocks: int | None = None, quiet: bool = False, heads=None,
            kv_heads=None, context_option: str = "--calib-context", scratch: Path | None = None,
            priced: bool = True) -> Analysed:
    """Open a source model and compute all spectra (whitened and priced by calibration when texts are given).

    One layer's weights are in memory at a time; see the pipeline note above. The calibration statistics go
    to `scratch` (a new folder), or to a temporary folder removed before returning.

    Raises:
        CompressError: unreadable, corrupt or unsupported checkpoints; bad text files; non-finite weights.
    """
    timer = Timer()
    loaded = open_model(path, heads, kv_heads)
    calib = _calibration(loaded, texts, context, n_blocks, context_option) if texts else None
    timer.lap("load")
    if calib is None or scratch is not None:
        return _first_pass(loaded, calib, damping, scratch, quiet, timer, priced)
    import tempfile
    with tempfile.TemporaryDirectory(prefix="attncompress-") as tmp:
        an = _first_pass(loaded, calib, damping, Path(tmp) / "calibration", quiet, timer, priced)
    an.scratch = None  # gone with the folder; the spectra are all a plan needs
    return an


def read_plan_file(plan_file: str, shape: ModelShape) -> planlib.RankPlan:
    """A plan JSON written by `attncompress plan --out` (maybe edited), checked against the model.

    Raises:
        CompressError: unreadable, not a plan, of another model, or ranks out of range.
    """
    try:
        text = Path(plan_file).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as e:
        reason = "not UTF-8 text" if isinstance(e, UnicodeDecodeError) else (e.strerror or e.__class__.__name__)
        raise CompressError(f"{plan_file}: cannot read the plan ({reason})") from None
    p = planlib.RankPlan.from_json(text, source=plan_file)
    notes = []
    # pairs listed for another pair count than the (edited) qk: choose them again rather than refuse
    resized = [lr.layer for lr in p.layers if lr.qk_pairs is not None and any(len(g) != lr.qk for g in lr.qk_pairs)]
    if resized:
        p = dataclasses.replace(p, layers=tuple(dataclasses.replace(lr, qk_pairs=None) if lr.layer in resized else lr
                                                for lr in p.layers))
        notes.append(f"qk_pairs of layer(s) {', '.join(map(str, resized))} did not match qk and will be chosen again")
    check_plan_ranks(shape, p, plan_file)
    p, stale = planlib.recount(shape, p, plan_file)
    if stale:
        notes.append(f"'predicted' was stale ({', '.join(stale)}); recomputed from the ranks")
    for note in notes:
        sys.stderr.write(f"note: plan {plan_file}: {note}\n")
    return p


def make_rank_plan(an: Analysed, keep: float | None, strategy: str | None, plan_file: str | None = None, *,
                   plan: planlib.RankPlan | None = None) -> planlib.RankPlan:
    """The plan to apply: `plan` or `plan_file` as given, else one made under `keep`; rotary pairs chosen."""
    sh = an.loaded.shape
    if plan is None and plan_file:
        plan = read_plan_file(plan_file, sh)
    if plan is None:
        strategy = resolve_strategy(strategy, an.priced)
        _check_budget(keep, strategy)
        plan = strategies.make_plan(spectra_list(sh, an.spectra), sh, keep, strategy)
    return choose_pairs(sh, plan, an.spectra)


def resolve_strategy(strategy: str | None, priced: bool) -> str:
    """The strategy to use: as given, else `loss` when the spectra are priced (calibration text), else `uniform`.

    Raises:
        CompressError: `loss` asked for without prices (no calibration text).
    """
    if strategy is None:
        return strategies.DEFAULT_STRATEGY if priced else strategies.WEIGHTS_ONLY_STRATEGY
    if strategy == "loss" and not priced:
        raise CompressError("--strategy loss prices cuts by the calibration loss; give calibration text with "
                            "--text, or choose another --strategy")
    return strategy


def plan_summary(an: Analysed, p: planlib.RankPlan) -> dict:
    """`plan.summary` plus, per kind, the block-matrix parameters kept and (priced spectra) the predicted loss rise."""
    sh = an.loaded.shape
    out = planlib.summary(sh, p)
    kept: dict[str, int] = {}
    for c in planlib.matrix_layout(sh):
        lr = p.ranks(c.layer)
        k = lr.qk if c.kind == "qk" else lr.vo if c.kind == "vo" else lr.ff[c.kind]
        kept[c.kind] = kept.get(c.kind, 0) + (c.dense_params if k is None else min(k * c.unit_params, c.dense_params))
    out["kept_by_kind"] = kept
    if an.priced:
        out["predicted_rise"] = strategies.predicted_rise(spectra_list(sh, an.spectra), p)
    return out


def _check_budget(keep: float | None, strategy: str) -> None:
    """--keep and --strategy, checked before any work."""
    if keep is None:
        raise CompressError("give --keep F (fraction of block-matrix parameters to keep) or --plan FILE")
    planlib.check_keep(keep)
    if strategy is not None and strategy not in strategies.STRATEGIES:
        raise CompressError(f"--strategy {strategy!r} is unknown; expected one of {', '.join(strategies.STRATEGIES)}")


def _cut_layer(an: Analysed, p: planlib.RankPlan, i: int, path, refit_damping: float) -> dict[str, torch.Tensor]:
    """Layer i at its planned ranks: whitened on the cut path's inputs and refit when `path` is given."""
    loaded, sh = an.loaded, an.loaded.shape
    w = layer_weights(loaded, i)
    st = sens = cs = None
    if an.scratch is not None:
        st = _stats_from(_load(an.scratch, f"layer-{i}", remove=True))
        if an.priced:
            sens = LayerSensitivity.from_tensors(_load(an.scratch, f"sens-{i}", remove=True))
    if path is not None:
        cs = path.stats(sh, w, i)
        st = cs.stats  # whitening on the inputs the cut layers produce
    roots = _roots(sh, st, an.damping, w, i, sens)
    new = factorize_layer(sh, w, i, p.ranks(i), roots)
    an.timer.lap("factorise")
    if path is not None and path.refit:
        calibrate.refit_layer(sh, w, new, i, cs, roots, refit_damping)
        gram, cross = path.down_grams(sh, new, i, cs)
        calibrate.refit_down(w, new, i, gram, cross, roots, refit_damping)
    fz.balance_layer(sh.n_heads, sh.n_kv_heads, sh.rotary, new, f"layers.{i}.")  # same products, see factorize
    if path is not None:
        path.advance(sh, new, i)
        an.timer.lap("refit" if path.refit else "sequential")
    return new


def _second_pass(an: Analysed, p: planlib.RankPlan, shards, quiet: bool, sequential: bool, refit: bool,
                 refit_damping: float) -> None:
    """Read each layer again, cut it at its planned ranks and append it to the shards (the rest as it is)."""
    loaded, timer = an.loaded, an.timer
    sh = loaded.shape
    path = None
    if sequential and an.calib is not None:
        path = calibrate.CutPath(calibrate.embed(_ends(loaded, ("embed.",)), an.calib.ids), refit, an.calib.mask)
    with Progress(sh.n_layers, "factorise", unit="layer", quiet=quiet) as bar:
        for i in range(sh.n_layers):
            new = _cut_layer(an, p, i, path, refit_damping)
            for name in sorted(new):
                shards.add(name, new.pop(name))
            timer.lap("write")
            bar.update(1)
    for name, ref in loaded.walk.refs.items():
        if not name.startswith("layers."):
            shards.add(name, arch.load_tensor(loaded.source, ref))
    timer.lap("write")


def compress(path: str, out: str, *, keep: float | None = None, plan_file: str | None = None,
             strategy: str | None = None, texts: list[str] | None = None, weights_only: bool = False,
             damping: float = DEFAULT_DAMPING, force: bool = False, quiet: bool = False, context: int = CALIB_CONTEXT,
             n_blocks: int | None = None, shard_size: int | str = DEFAULT_SHARD_SIZE, sequential: bool = True,
             refit: bool = True, refit_damping: float = fz.DEFAULT_REFIT_DAMPING, priced: bool = True,
             dtype: str | None = None) -> dict:
    """Compress a source checkpoint into a directory our runtime (and `expand`) reads.

    Streams: one layer's weights are in memory at a time (see the pipeline note above), and the output is
    written as it is made, to `model.safetensors`, or to shards with an index when it exceeds `shard_size`
    (bytes, or a size such as "2GB"), in format `dtype` (see `io.storage`; None: the source's own float
    width, 16-bit for a quantised GGUF). Everything goes to a temporary sibling of `out` that is renamed at the
    end, so a failure or an interruption leaves nothing behind.

    Args (beyond the command's options): `strategy` None picks `loss` with calibration text, `uniform`
    without; `sequential` whitens each layer on the cut prefix's outputs, `refit` then solves each layer's
    input factors by least squares against the dense outputs (damped by `refit_damping`); `priced` measures
    the loss sensitivities (output weights and prices); all need calibration text.

    Returns:
        A report: out, source, method, the plan summary, seconds per stage, the files written.
    Raises:
        CompressError: bad options, inputs or plan; the output exists without `force`; writing failed.
    """
    from .io.write import ShardWriter, atomic_dir, check_output, parse_size, write_model_dir
    check_output(out, force)
    if not texts and not weights_only:
        raise CompressError("give calibration text with --text FILE, or pass --weights-only for plain SVD")
    if texts and weights_only:
        raise CompressError("--text and --weights-only exclude each other")
    if not plan_file:
        _check_budget(keep, resolve_strategy(strategy, bool(texts) and priced))
    shard_bytes = parse_size(shard_size)
    if dtype is not None:
        storage.check_dtype(dtype)
    # Everything that can be checked without reading the weights is checked before any work.
    timer = Timer()
    loaded = open_model(path)
    given = read_plan_file(plan_file, loaded.shape) if plan_file else None
    calib = _calibration(loaded, texts, context, n_blocks) if texts else None
    timer.lap("load")
    sh, src = loaded.shape, loaded.source
    dtype = dtype or storage.default_dtype(src)
    with atomic_dir(out, force) as tmp:
        an = _first_pass(loaded, calib, damping, tmp / ".calibration", quiet, timer, priced)
        p = make_rank_plan(an, keep, strategy, plan=given)
        with ShardWriter(tmp, shard_bytes, dtype=dtype) as shards:
            _second_pass(an, p, shards, quiet, sequential, refit, refit_damping)
            files = shards.close()
        if an.scratch is not None:
            shutil.rmtree(an.scratch)
        method = _method(an, p, texts, damping, sequential, refit, refit_damping)
        manifest = {
            "format_version": FORMAT_VERSION, "tool": "attncompress", "tool_version": _version(),
            "source": {"path": Path(str(src.path)).name, "format": src.format,
                       "files": [{"name": f.name, "bytes": f.stat().st_size, "sha256": sha256_file(f)}
                                 for f in src.files]},
            "family": sh.family, "model_type": (src.config or {}).get("model_type"),
            "shape": json.loads(sh.to_json()), "plan": json.loads(p.to_json()), "method": method,
            "calibration": an.calibration, "dtype": dtype,
        }
        write_model_dir(tmp, None, manifest, loaded.tokenizer, src.config)
        timer.lap("write")
    return {"out": str(out), "source": str(src.path), "method": method, "plan": plan_summary(an, p),
            "seconds": timer.stages, "files": files}


def _method(an: Analysed, p, texts, damping: float, sequential: bool, refit: bool, refit_damping: float) -> dict:
    """The manifest's description of how the cut was made."""
    calibrated = bool(texts)
    seq = calibrated and sequential
    return {"factors": "whitened" if calibrated else "svd", "damping": damping if calibrated else None,
            "spectral_split": "sqrt(S) on both factors", "allocation": p.strategy,
            "output_weights": ("loss sensitivity" if an.priced else "down reach") if calibrated else None,
            "sequential": seq, "refit": seq and refit, "refit_damping": refit_damping if seq and refit else None}


def _version() -> str:
    try:
        import importlib.metadata
        return importlib.metadata.version("attncompress")
    except Exception:
        return "0+unknown"

