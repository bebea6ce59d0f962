"""The Python API: one function per command, each returning a plain report dict."""
from __future__ import annotations

import json
from pathlib import Path

import torch

from . import analysis, corpora, evaluate, factorize as fz, generate as gen
from . import compare as comparelib
from . import compress as pipeline
from .errors import CompressError
from .factorize import DEFAULT_DAMPING
from .io import storage
from .loading import load_model, load_weights, tokens
from .model import fuse, halve
from .builtin import resolve
from .strategies import DEFAULT_STRATEGY
from .texts import read_lines, read_texts
from . import tune as tunelib
from .tune import DEFAULT_DECAY, DEFAULT_DECAY_COEF


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
        for m in shape.ff_kinds:
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
        "dtypes": source.dtypes(), "storage": manifest.get("dtype", "float32") if manifest else None,
        "layers": layers, "unused": walk.unused if walk else [],
        "kv_bytes_per_token": evaluate.kv_bytes_per_token(shape, weights) if shape.is_decoder else None,
    }


def perplexity(path: str, texts: list[str], context: int = 512, stride: int | None = None,
               max_tokens: int | None = None, quiet: bool = False) -> dict:
    """Perplexity of a decoder over the concatenated token stream of the text files."""
    text, described = read_texts(texts)
    loaded = load_model(resolve(path))
    fuse(loaded.model)  # inference only: one product per shared input
    if not loaded.model.is_decoder:
        raise CompressError(f"{loaded.path}: perplexity needs a decoder; this {loaded.shape.family} model is an encoder")
    ids = tokens(loaded, text)
    if max_tokens:
        ids = ids[:max_tokens]
    out = evaluate.perplexity(loaded.model, ids, context=context, stride=stride, quiet=quiet)
    return {"path": str(loaded.path), "texts": described, **out}


def embed(path: str, text: str, batch: int = 32) -> dict:
    """Mean-pooled sentence embeddings of an encoder, one sentence per line."""
    lines = read_lines(text)
    loaded = load_model(resolve(path))
    fuse(loaded.model)
    if loaded.model.is_decoder:
        raise CompressError(f"{loaded.path}: embed needs an encoder; this {loaded.shape.family} model is a decoder")
    if loaded.tokenizer is None:
        raise CompressError(f"{loaded.path}: no tokenizer.json found beside the weights")
    e = evaluate.embed(loaded.model, loaded.tokenizer, lines, batch=batch)
    return {"path": str(loaded.path), "lines": lines, "embeddings": e.tolist(), "dim": e.shape[1]}


def generate(path: str, prompts: list[str], *, max_tokens: int = 64, temperature: float = 0.0, top_p: float = 1.0,
             seed: int = 0, batch: int = 8, decode_weights: str = "auto", decode_step: str = "auto",
             quiet: bool = False) -> dict:
    """Continue each prompt with a decoder (greedy at temperature 0); see `generate.generate_ids`. The model
    runs fused, its product weights in `compare.decode_weights_for(decode_weights, rows per step)`, its
    one-sequence steps by `compare.attach_step(model, decode_step)`."""
    import time
    weights = comparelib.decode_weights_for(decode_weights, min(batch, len(prompts)))
    comparelib.check_decode_step(decode_step)
    loaded = load_model(resolve(path))
    if not loaded.model.is_decoder:
        raise CompressError(f"{loaded.path}: generate needs a decoder; this {loaded.shape.family} model is an encoder")
    fuse(loaded.model)
    if weights == "float16":
        halve(loaded.model)
    step = comparelib.attach_step(loaded.model, decode_step)
    ids = [tokens(loaded, p) for p in prompts]
    t0 = time.perf_counter()
    new = gen.generate_ids(loaded.model, ids, max_tokens=max_tokens, temperature=temperature, top_p=top_p, seed=seed,
                           batch=batch, quiet=quiet)
    dt = time.perf_counter() - t0
    n = sum(len(x) for x in new)
    return {"path": str(loaded.path), "prompts": prompts, "completions": [loaded.tokenizer.decode(x) for x in new],
            "prompt_ids": ids, "ids": new, "tokens": n, "seconds": dt, "tokens_per_second": n / dt if dt > 0 else None,
            "settings": {"max_tokens": max_tokens, "temperature": temperature, "top_p": top_p, "seed": seed,
                         "batch": batch, "decode_weights": weights, "decode_step": step}}


# ------------------------------------------------------------------------------------ spectra and plans

def spectrum(path: str, texts: list[str] | None = None, damping: float = DEFAULT_DAMPING, quiet: bool = False) -> dict:
    """All spectra and energy-kept curves of a source model (whitened when texts are given)."""
    an = pipeline.analyse(path, gen.resolve_texts(texts, path, quiet), damping=damping, quiet=quiet)
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


def plan(path: str, out: str | None, keep: float | None = None, strategy: str | None = None,
         texts: list[str] | None = None, damping: float = DEFAULT_DAMPING, quiet: bool = False) -> dict:
    """Choose ranks under a budget and (with `out`) write the plan JSON for the user to edit.

    `strategy` None: `loss` with calibration text, `uniform` without (`compress.resolve_strategy`).
    """
    pipeline.resolve_strategy(strategy, bool(texts))  # refuse before the slow part
    an = pipeline.analyse(path, gen.resolve_texts(texts, path, quiet), damping=damping, quiet=quiet)
    p = pipeline.make_rank_plan(an, keep, strategy, None)
    if out:
        from .io.write import write_json_atomic
        write_json_atomic(out, json.loads(p.to_json()))
    return {"plan": p, "summary": pipeline.plan_summary(an, p)}



def compress(path: str, out: str, *, texts: list[str] | None = None, quiet: bool = False, **options) -> dict:
    """`compress.compress`, with `corpus:samples` among the texts first sampled from `path` (cached)."""
    return pipeline.compress(path, out, texts=gen.resolve_texts(texts, path, quiet), quiet=quiet, **options)


def tune(src_dir: str, texts: list[str], out: str, *, teacher: str | None = None, quiet: bool = False,
         **options) -> dict:
    """`tune.tune`, with `corpus:samples` among the texts first sampled from the source model (cached)."""
    if any(gen.is_samples(t) for t in texts or []):
        from .loading import read_manifest
        if not Path(src_dir).is_dir():
            raise CompressError(f"{src_dir}: no such directory; expected a directory written by `attncompress compress`")
        source, _ = tunelib.find_teacher(None if teacher == "none" else teacher, Path(src_dir), read_manifest(src_dir))
        texts = gen.resolve_texts(texts, source, quiet)
    return tunelib.tune(src_dir, texts, out, teacher=teacher, quiet=quiet, **options)


def compare(a: str, b: str, texts: list[str] | None = None, *, out: str | None = None, force: bool = False,
            **options) -> dict:
    """Model A against model B (see `compare.compare` for the options and the report); with `out`, the output
    directory is checked before the slow part (write it with `report.write_compare`)."""
    if out:
        from .io.write import check_output
        check_output(out, force)
    return comparelib.compare(a, b, texts, **options)


# ----------------------------------------------------------------------------------------------------- expand

def densify(shape, weights: dict) -> dict:
    """Compressed canonical weights → dense canonical weights of the original shapes (exactly the same function).

    Feed-forward factors multiply back (a @ bᵀ). Narrowed heads are padded with zero rows/columns at the
    dimensions they dropped: a zero query/key dimension adds nothing to any score, and rotary rotation never
    mixes one pair with another, so kept pairs go back to their own rows.
    """
    from . import arch
    hd, h, g = shape.head_dim, shape.n_heads, shape.n_kv_heads
    out = {}
    for name, t in weights.items():
        if name.endswith(".pairs"):
            continue
        if name.endswith(".b") and name[:-2] + ".a" in weights:
            continue
        if name.endswith(".a"):
            out[name[:-2] + ".weight"] = (weights[name].double() @ weights[name[:-2] + ".b"].double().T).float()
        else:
            out[name] = t
    for i in range(shape.n_layers):
        p = f"layers.{i}.attn."
        pairs = weights.get(p + "pairs")
        w_qk = out[p + "q.weight"].shape[0] // h
        if pairs is not None:
            dims = fz.pair_dims(pairs, hd)  # (g, 2p) kept rows per group
        else:
            dims = torch.arange(w_qk).expand(g, -1)  # refactorised heads fill their first w_qk rows
        rep = h // g
        for m, n, idx in (("q", h, dims.repeat_interleave(rep, 0)), ("k", g, dims)):
            for leaf in ("weight", "bias"):
                if p + f"{m}.{leaf}" in out:
                    out[p + f"{m}.{leaf}"] = _scatter_rows(out[p + f"{m}.{leaf}"], n, hd, idx)
        w_vo = out[p + "v.weight"].shape[0] // g
        vidx = torch.arange(w_vo).expand(g, -1)
        out[p + "v.weight"] = _scatter_rows(out[p + "v.weight"], g, hd, vidx)
        if p + "v.bias" in out:
            out[p + "v.bias"] = _scatter_rows(out[p + "v.bias"], g, hd, vidx)
        out[p + "o.weight"] = _scatter_rows(out[p + "o.weight"].T, h, hd, torch.arange(w_vo).expand(h, -1)).T.contiguous()
    order = arch.canonical_names(shape)
    return {n: out[n] for n in order if n in out} | {n: t for n, t in out.items() if n not in order}


def _scatter_rows(t, n: int, hd: int, idx) -> torch.Tensor:
    """(n*k, ...) rows → (n*hd, ...) with head j's k rows placed at idx[j] and zeros elsewhere."""
    k = t.shape[0] // n
    full = torch.zeros((n, hd) + tuple(t.shape[1:]), dtype=t.dtype)
    full.scatter_(1, idx.reshape(n, k, *([1] * (t.dim() - 1))).expand(n, k, *t.shape[1:]), t.reshape(n, k, *t.shape[1:]))
    return full.reshape((n * hd,) + tuple(t.shape[1:]))


def expand(path: str, out: str, force: bool = False, dtype: str | None = None) -> dict:
    """Multiply a compressed directory back into a dense model directory of the source family's layout.

    `dtype`: float format written (float32, bfloat16, float16); default the directory's own, float16 for int8.
    """
    import dataclasses
    from . import arch
    from .loading import is_compressed
    from .io.write import atomic_dir, check_output, dumps, save_tensors
    check_output(out, force)
    if not is_compressed(path):
        raise CompressError(f"{path}: not a directory written by attncompress compress; nothing to expand")
    if dtype is not None and storage.check_dtype(dtype) == "int8":
        raise CompressError("--dtype int8: expand writes the source family's float layout; choose float32, "
                            "bfloat16 or float16 (or use the compressed directory, which can be int8)")
    shape, weights, source, _, manifest = load_weights(path)
    dtype = dtype or storage.default_dtype(source, manifest)
    dtype = "float16" if dtype == "int8" else dtype
    dense = densify(shape, weights)
    adapter = arch.ADAPTERS[shape.family]
    cfg_path = Path(path) / "source-config.json"
    config = json.loads(cfg_path.read_text(encoding="utf-8")) if cfg_path.is_file() else None
    if config is None:
        raise CompressError(f"{cfg_path}: missing; expected the source config written by compress")
    has_o_bias = any(n.endswith("attn.o.bias") for n in dense)
    if has_o_bias and not shape.o_bias:
        if shape.family == "llama" and config.get("model_type") == "qwen2":
            raise CompressError(f"{path}: the folded value bias needs an output bias, which the qwen2 layout lacks; "
                                "use the compressed directory directly")
        config = dict(config, attention_bias=True)  # llama layout: biases on q, k, v and o
        for i in range(shape.n_layers):
            for m in ("q", "k", "v"):
                dense.setdefault(f"layers.{i}.attn.{m}.bias", torch.zeros(dense[f"layers.{i}.attn.{m}.weight"].shape[0]))
        shape = dataclasses.replace(shape, o_bias=True, qkv_bias=True)
    tensors = arch.to_source_layout(adapter, shape, dense)
    with atomic_dir(out, force) as tmp:
        save_tensors(tmp / "model.safetensors", tensors, dtype)
        (tmp / "config.json").write_text(dumps(config), encoding="utf-8")
        tok = Path(path) / "tokenizer.json"
        if tok.is_file():
            (tmp / "tokenizer.json").write_bytes(tok.read_bytes())
            (tmp / "tokenizer_config.json").write_text(dumps({"tokenizer_class": "PreTrainedTokenizerFast"}),
                                                       encoding="utf-8")
    return {"out": str(out), "tensors": len(tensors), "parameters": sum(t.numel() for t in tensors.values()),
            "dtype": dtype}


# -------------------------------------------------------------------------------------------- the whole job

# What `run` adds to the user's text for calibration and tuning (`--blend`): general text keeps the model
# general when the user's text is small and of one kind (measured: benchmarks/results/, README).
BLENDS = {"text": (), "samples": (gen.SAMPLES,), "pydoc": ("corpus:pydoc-calibration",),
          "samples+pydoc": (gen.SAMPLES, "corpus:pydoc-calibration")}
# A decoder's default: its own samples and the pydoc calibration half. The README demo, perplexity ratio on
# pydoc-heldout / licenses: samples alone 2.989x / 3.314x (benchmarks/results/readme_demo_samples_bf16.txt),
# samples+pydoc 1.294x / 2.644x (readme_demo_blend.txt); the licenses figure is the fair one (pydoc-heldout
# then shares its source with the blend, and `run` says so).
DEFAULT_BLEND = "samples+pydoc"
ENCODER_BLEND = "pydoc"  # an encoder writes no samples; general text of the bundled corpora instead
RUN_MIX = 0.5  # weight of the next-token loss in run's tune; the rest is distillation from the source
# Most tuning steps of `run`: a decoder's 60 (4 blocks of 128 tokens a step; more did not help the README demo,
# benchmarks/results/scans.md); an encoder's 250 (32 sentences a step, 237 s on 2 cores for the built-in MiniLM,
# benchmarks/results/encoder_tune_250.md).
RUN_STEPS = {"decoder": 60, "encoder": 250}


def run(path: str, out: str, *, keep: float, texts: list[str], eval_texts: list[str] | None = None,
        strategy: str | None = None, sequential: bool = True, refit: bool = True, blend: str | None = None,
        steps: int | None = None, batch: int | None = None, context: int = 128, lr: float | None = None,
        mix: float = RUN_MIX,
        decay: str = DEFAULT_DECAY, decay_coef: float = DEFAULT_DECAY_COEF, seed: int = 0,
        max_eval_tokens: int | None = 4096, compute: str = tunelib.DEFAULT_COMPUTE, decode_weights: str = "auto",
        decode_step: str = "auto",
        force: bool = False, quiet: bool = False) -> dict:
    """Compress, tune and compare in one go; `out` gets `compressed/`, `tuned/` and `report/`.

    The calibration and tuning text is `texts` plus the `blend` (a key of `BLENDS`; None: `DEFAULT_BLEND` for a
    decoder, `ENCODER_BLEND` for an encoder, which cannot write samples); `steps` None: `RUN_STEPS` of the kind.
    Each `eval_texts` file is scored on its own for the original, the compressed and the tuned model (an
    encoder's compressed model as "compare_compressed"). `compute` is the tune's (`tune.COMPUTES`),
    `decode_weights` and `decode_step` `compare`'s (how both decoders are timed).
    The whole directory is written atomically: an error or Ctrl-C leaves nothing behind.
    """
    import sys
    from .io.write import atomic_dir, check_output
    from .progress import Timer
    from .report import write_compare
    decoder = pipeline.open_model(path).shape.is_decoder
    if blend is None:
        blend = DEFAULT_BLEND if decoder else ENCODER_BLEND
    if steps is None:
        steps = RUN_STEPS["decoder" if decoder else "encoder"]
    if blend not in BLENDS:
        raise CompressError(f"--blend: unknown value {blend!r}; expected one of {', '.join(BLENDS)}")
    check_output(out, force)
    comparelib.decode_weights_for(decode_weights, 1)  # a bad choice fails before the long work
    comparelib.check_decode_step(decode_step)
    tunelib.resolve_compute(compute)
    read_texts(texts)  # refuse unreadable text before the long work
    if eval_texts:
        read_texts(eval_texts)

    def say(msg):
        if not quiet:
            print(f"[run] {msg}", file=sys.stderr, flush=True)
    timer = Timer()
    calib = list(texts) + [t for t in BLENDS[blend] if t not in texts]
    for t in set(eval_texts or []) & set(calib):
        say(f"warning: {t} is also calibration and tuning text; its perplexity is not a held-out figure")
    for t in sorted(set(eval_texts or []) - set(calib)):
        for c in calib:
            if (src := corpora.same_source(t, c)):
                say(f"note: {t} and the calibration text {c} are different passages of {src}: held out, "
                    "but of the same kind")
    calib = gen.resolve_texts(calib, path, quiet)
    timer.lap("sampling")
    with atomic_dir(out, force) as tmp:
        say(f"1/3 compress {path} to keep {keep} of the block matrices ({strategy or DEFAULT_STRATEGY}, whitened by "
            f"{', '.join(Path(t).name for t in calib)})")
        c = pipeline.compress(path, str(tmp / "compressed"), keep=keep, strategy=strategy, texts=calib, quiet=quiet,
                              sequential=sequential, refit=refit)
        timer.lap("compress")
        say(f"2/3 tune the factors for at most {steps} steps ({decay} decay, next-token weight {mix})")
        t = tunelib.tune(tmp / "compressed", calib, tmp / "tuned", steps=steps, batch=batch, context=context, lr=lr,
                         seed=seed, decay=decay, decay_coef=decay_coef, mix=mix, teacher=str(resolve(path)),
                         compute=compute, quiet=quiet)
        timer.lap("tune")
        say("3/3 compare the original with the tuned model, and the compressed model before tuning")
        scored = eval_texts or texts
        r = comparelib.compare(path, str(tmp / "tuned"), scored, max_tokens=max_eval_tokens,
                               decode_weights=decode_weights, decode_step=decode_step, quiet=quiet)
        rc = None
        if r["quality"] and r["quality"]["kind"] == "embedding":
            rc = comparelib.compare(path, str(tmp / "compressed"), scored, speed_runs=0, quiet=quiet)
        elif r["quality"]:
            before = comparelib.score_model(str(tmp / "compressed"), scored, max_tokens=max_eval_tokens, quiet=quiet)
            for entry, b in zip(r["quality"]["per_text"], before):
                entry["compressed"] = b["perplexity"][0]
        timer.lap("compare")
        r["run"] = {"blend": blend, "calibration": c.get("calibration"), "tune": {
            k: t[k] for k in ("steps", "steps_run", "heldout", "data", "warnings", "settings")},
            "seconds": timer.stages}
        write_compare(r, str(tmp / "report"), False)
    return {"out": str(out), "compress": c, "tune": t, "compare": r, "compare_compressed": rc,
            "seconds": timer.stages}
