"""The Python API: one function per command, each returning a plain report dict."""
from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from pathlib import Path

import torch

from . import analysis, evaluate
from . import plan as planlib
from .progress import Progress
from .errors import CompressError
from .io.load import load_model, load_weights
from .models import resolve
from .texts import read_lines, read_texts


def _tokens(loaded, text: str) -> list[int]:
    if loaded.tokenizer is None:
        raise CompressError(f"{loaded.path}: no tokenizer found; expected tokenizer.json beside the weights or GGUF metadata")
    return loaded.tokenizer.encode(text).ids


def inspect(path: str, heads: int | None = None, kv_heads: int | None = None) -> dict:
    """Family, shape, parameter counts by group, the per-layer pairs and matrices, unused tensors, format and dtypes."""
    shape, weights, source, walk, manifest = load_weights(resolve(path), heads, kv_heads)
    layers = []
    for i in range(shape.n_layers):
        p = f"layers.{i}."

        def width(name):
            t = weights.get(p + name + ".weight", weights.get(p + name + ".a"))
            return list(t.shape) if p + name + ".weight" in weights else \
                [weights[p + name + ".a"].shape[0], weights[p + name + ".b"].shape[0]]
        q = weights.get(p + "attn.q.weight")
        v = weights.get(p + "attn.v.weight")
        entry = {
            "layer": i,
            "qk": {"heads": shape.n_heads, "kv_heads": shape.n_kv_heads,
                   "width": q.shape[0] // shape.n_heads, "rotary": shape.rotary},
            "vo": {"groups": shape.n_kv_heads, "heads_per_group": shape.q_per_kv, "width": v.shape[0] // shape.n_kv_heads},
            "ff": {},
        }
        for m in (("gate", "up", "down") if shape.gated else ("up", "down")):
            if p + f"ff.{m}.a" in weights:
                a, b = weights[p + f"ff.{m}.a"], weights[p + f"ff.{m}.b"]
                entry["ff"][m] = {"shape": [a.shape[0], b.shape[0]], "rank": a.shape[1]}
            else:
                entry["ff"][m] = {"shape": list(weights[p + f"ff.{m}.weight"].shape), "rank": None}
        layers.append(entry)
    return {
        "path": str(source.path), "format": "attncompress" if manifest else source.format, "family": shape.family,
        "model_type": (source.config or {}).get("model_type"), "shape": shape.__dict__.copy(),
        "parameters": evaluate.param_groups(weights), "block_matrix_parameters": evaluate.block_matrix_params(weights),
        "dtypes": source.dtypes(), "layers": layers, "unused": walk.unused if walk else [],
        "kv_bytes_per_token": kv_bytes_per_token(shape, weights) if shape.family != "bert" else None,
    }


def kv_bytes_per_token(shape, weights, bytes_per_element: int = 4) -> int:
    """Key and value bytes one token adds to the cache: Σ_layers g·(w_qk + w_vo)·bytes."""
    total = 0
    for i in range(shape.n_layers):
        q = weights[f"layers.{i}.attn.q.weight"]
        v = weights[f"layers.{i}.attn.v.weight"]
        total += shape.n_kv_heads * (q.shape[0] // shape.n_heads + v.shape[0] // shape.n_kv_heads)
    return total * bytes_per_element


def perplexity(path: str, texts: list[str], context: int = 512, stride: int | None = None,
               max_tokens: int | None = None, quiet: bool = False) -> dict:
    """Perplexity of a decoder over the concatenated token stream of the text files."""
    text, described = read_texts(texts)
    loaded = load_model(resolve(path))
    if not loaded.model.is_decoder:
        raise CompressError(f"{loaded.path}: perplexity needs a decoder; this {loaded.shape.family} model is an encoder")
    ids = _tokens(loaded, text)
    if max_tokens:
        ids = ids[:max_tokens]
    out = evaluate.perplexity(loaded.model, ids, context=context, stride=stride, quiet=quiet)
    return {"path": str(loaded.path), "texts": described, **out}


def embed(path: str, text: str, batch: int = 32) -> dict:
    """Mean-pooled sentence embeddings of an encoder, one sentence per line."""
    lines = read_lines(text)
    loaded = load_model(resolve(path))
    if loaded.model.is_decoder:
        raise CompressError(f"{loaded.path}: embed needs an encoder; this {loaded.shape.family} model is a decoder")
    if loaded.tokenizer is None:
        raise CompressError(f"{loaded.path}: no tokenizer.json found beside the weights")
    e = evaluate.embed(loaded.model, loaded.tokenizer, lines, batch=batch)
    return {"path": str(loaded.path), "lines": lines, "embeddings": e.tolist(), "dim": e.shape[1]}


# ----------------------------------------------------------------------------------------------- compress

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
    ids = _tokens(loaded, text)
    from .texts import token_blocks
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
    from .compress import Timer
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


def spectrum(path: str, texts: list[str] | None = None, damping: float = 0.01, quiet: bool = False) -> dict:
    """All spectra and energy-kept curves of a source model (whitened when texts are given)."""
    an = analyse(path, texts, damping=damping, quiet=quiet)
    layers = []
    for i, sp in enumerate(an.spectra):
        entry = {"layer": i}
        for kind, v in sp.items():
            e = analysis.energy_kept(v["gains"])
            n = len(e) - 1
            entry[kind] = {"values": v["values"].tolist(), "energy_kept": e,
                           "energy_at": {f"{q}%": e[round(n * q / 100)] for q in (75, 50, 25)}}
        layers.append(entry)
    return {"path": str(an.loaded.path), "family": an.loaded.shape.family, "whitened": bool(texts),
            "damping": damping, "calibration": an.calibration, "layers": layers}


def make_rank_plan(an: Analysed, keep: float | None, strategy: str, plan_file: str | None) -> "planlib.RankPlan":
    from .compress import check_plan_ranks, choose_pairs, spectra_list
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


def plan(path: str, out: str | None, keep: float | None = None, strategy: str = "global",
         texts: list[str] | None = None, damping: float = 0.01, quiet: bool = False) -> dict:
    """Choose ranks under a budget and (with `out`) write the plan JSON for the user to edit."""
    an = analyse(path, texts, damping=damping, quiet=quiet)
    p = make_rank_plan(an, keep, strategy, None)
    if out:
        from .io.write import write_json_atomic
        import json
        write_json_atomic(out, json.loads(p.to_json()))
    return {"plan": p, "summary": plan_summary(an.loaded.shape, p)}


def plan_summary(shape, p) -> dict:
    pc = planlib.count_params(shape, p)
    return {"strategy": p.strategy, "keep": p.keep, "block_params_kept": pc.block_kept,
            "block_params_dense": pc.block_dense, "kept_fraction": pc.block_kept / pc.block_dense,
            "kv_bytes_per_token": planlib.kv_cache_bytes(shape, p.layers, p.bytes_per_element),
            "kv_bytes_per_token_dense": planlib.kv_cache_bytes(shape, planlib.full_plan(shape).layers,
                                                               p.bytes_per_element),
            "layers": [{"layer": lr.layer, "qk": lr.qk, "vo": lr.vo, **{k: v for k, v in lr.ff.items()}}
                       for lr in p.layers]}


def compress(path: str, out: str, *, keep: float | None = None, plan_file: str | None = None,
             strategy: str = "global", texts: list[str] | None = None, weights_only: bool = False,
             damping: float = 0.01, force: bool = False, quiet: bool = False, context: int = CALIB_CONTEXT,
             n_blocks: int = CALIB_BLOCKS) -> dict:
    """Compress a source checkpoint into a directory our runtime (and `expand`) reads.

    Raises:
        CompressError: bad options, inputs or plan; the output exists without `force`.
    """
    from .compress import FORMAT_VERSION, factorize_layer, sha256_file
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
    summary = plan_summary(sh, p)
    return {"out": str(out), "source": str(src.path), "method": manifest["method"], "plan": summary,
            "seconds": an.timer.stages}


def _version() -> str:
    try:
        import importlib.metadata
        return importlib.metadata.version("attncompress")
    except Exception:
        return "0+unknown"
