"""Two models side by side: size, KV cache, quality on the same text, and speed measured in one process.

`compare(a, b, ...)` is the API of `attncompress compare`. The speed figures come
from `time_decoders` / `time_encoders`, which run A and B interleaved in the same
process (so load on a shared machine hits both alike) and keep the median of
several runs, and from `measure_bandwidth`, the machine's streaming read rate,
which bounds a decode step from below: every weight is read once per token.
"""
from __future__ import annotations

import math
import os
import statistics
from contextlib import contextmanager
from dataclasses import dataclass

import torch

from . import evaluate
from . import threads as threadlib
from .io import storage
from .errors import CompressError
from .loading import Loaded, load_weights
from .model import STEP_ROWS, KVCache, Transformer, build, fuse, halve
from .builtin import resolve
from .progress import seconds
from .evaluate import embedding_agreement
from .texts import read_lines, read_texts

SCHEMA = "attncompress.compare/1"
PROMPT_TOKENS = 256  # prompt length of the prefill measurement
DECODE_TOKENS = 16  # single-token steps timed per run after the prompt
BATCH_LINES = 32  # sentences per encoder batch
RUNS = 5


@dataclass
class _Model:
    """A loaded model with its counts (see `model_facts`)."""
    loaded: Loaded
    facts: dict
    label: str


def _open(path: str, label: str) -> _Model:
    """Load a model the way `load_model` does, counting from the canonical weights before they are dropped."""
    shape, weights, source, walk, manifest = load_weights(resolve(path))
    model = fuse(build(shape, weights))  # the inference path: one product per shared input
    model.eval()
    loaded = Loaded(model, shape, source.tokenizer(), source, walk, manifest)
    return _Model(loaded, model_facts(loaded, weights), label)


# ----------------------------------------------------------------------------------------------- sizes

def model_facts(ld: Loaded, weights: dict) -> dict:
    """Counts of one model: parameters, bytes of its weight files, KV-cache bytes per token, the plan."""
    files = [{"name": f.name, "bytes": f.stat().st_size} for f in ld.source.files]
    quantised = ld.source.format == "gguf" and any(dt not in ("F32", "F16", "BF16", "F64")
                                                     for dt in ld.source.dtypes())
    groups = evaluate.param_groups(weights)
    plan = (ld.manifest or {}).get("plan")
    return {
        "path": str(ld.path),
        "format": "attncompress" if ld.manifest else ld.source.format,
        "family": ld.shape.family,
        "compressed": ld.manifest is not None,
        "parameters": {"total": groups["total"], "block_matrices": evaluate.block_matrix_params(weights),
                       "groups": groups},
        "disk": {"bytes": sum(f["bytes"] for f in files), "files": files, "quantised": quantised,
                 "dtypes": ld.source.dtypes(), "format": _storage_of(ld),
                 "note": ("quantised on disk; dequantised to float32 to run, so disk bytes understate memory"
                          if quantised else None)},
        "runtime_bytes": sum(p.numel() * p.element_size() for p in ld.model.parameters()),
        "kv_bytes_per_token": evaluate.kv_bytes_per_token(ld.shape, weights) if ld.model.is_decoder else None,
        "plan": None if plan is None else {"strategy": plan.get("strategy"), "keep": plan.get("keep"),
                                            "layers": plan.get("layers"), "full": _full_ranks(ld.shape)},
        "method": (ld.manifest or {}).get("method"),
    }


def _storage_of(ld: Loaded) -> str:
    """The storage format of a model's weights: a compressed directory's `dtype`, else its matrices' float width
    ("quantised" for a GGUF below 16 bits)."""
    if ld.manifest is not None:
        return storage.default_dtype(None, ld.manifest)
    widths = [ld.source.dtype(n) for n in ld.source.names() if len(ld.source.shape(n)) == 2]
    return storage.source_width(widths) if all(w in ("F64", "F32", "BF16", "F16") for w in widths) else "quantised"


def _full_ranks(shape) -> dict:
    """The most units each kind of matrix can keep: rotary pairs or rank for qk, rank for vo and feed-forward."""
    return {"qk": shape.n_pairs if shape.rotary else shape.head_dim, "vo": shape.head_dim,
            **{k: min(shape.d_model, shape.d_ff) for k in shape.ff_kinds}}


def _ratio(b, a):
    """b / a, or None when either is missing or a is zero."""
    return None if a in (None, 0) or b is None else b / a


# --------------------------------------------------------------------------------------------- quality

def _same_tokens(a: _Model, b: _Model, text: str) -> tuple[list[int], str]:
    """Token ids of `text` that both models read, and how the tokenizers were checked.

    Raises CompressError when the tokenizers split the text differently or neither model has one.
    """
    ta, tb = a.loaded.tokenizer, b.loaded.tokenizer
    if ta is None and tb is None:
        raise CompressError(f"{a.loaded.path} and {b.loaded.path}: neither has a tokenizer.json; "
                            "put the source model's tokenizer.json beside the weights to score text")
    if ta is None or tb is None:
        have = a if ta is not None else b
        return have.loaded.tokenizer.encode(text).ids, f"only {have.label} has a tokenizer; used for both"
    ids_a, ids_b = ta.encode(text).ids, tb.encode(text).ids
    if ids_a != ids_b:
        at = next((i for i, (x, y) in enumerate(zip(ids_a, ids_b)) if x != y), min(len(ids_a), len(ids_b)))
        raise CompressError(f"{a.loaded.path} and {b.loaded.path}: the tokenizers split the text differently "
                            f"(first difference at token {at}); compare models that share one tokenizer")
    return ids_a, "identical on the text"


def score_texts(models: list[_Model], texts: list[str], context: int, stride: int | None, max_tokens: int | None,
                quiet: bool) -> list[dict]:
    """Perplexity of each decoder on each text separately, each text's token stream cut at `max_tokens`.

    Returns one dict per text: "text" (its description), "tokenizer" (how the ids were checked), "tokens",
    "context", "stride", and per model (in order) "perplexity" and "nll" (mean nats per token) lists.
    """
    ctx = min([context] + [m.loaded.shape.max_positions or context for m in models])
    out = []
    for path in texts:
        text, (desc,) = read_texts([path])
        ids, tok_note = _same_tokens(models[0], models[-1], text)
        if max_tokens:
            ids = ids[:max_tokens]
        runs = [evaluate.perplexity(m.loaded.model, ids, context=ctx, stride=stride, quiet=quiet,
                                    label=f"perplexity {m.label} {desc['name']}") for m in models]
        out.append({"text": desc, "tokenizer": tok_note, "tokens": runs[0]["tokens"], "context": runs[0]["context"],
                    "stride": runs[0]["stride"], "perplexity": [r["perplexity"] for r in runs],
                    "nll": [r["nll"] for r in runs]})
    return out


def score_model(path: str, texts: list[str], context: int = 512, stride: int | None = None,
                max_tokens: int | None = None, quiet: bool = True) -> list[dict]:
    """`score_texts` of one model given by its path."""
    return score_texts([_open(path, "C")], texts, context, stride, max_tokens, quiet)


def perplexities(a: _Model, b: _Model, texts: list[str], context: int, stride: int | None,
                 max_tokens: int | None, quiet: bool) -> dict:
    """Perplexity of both decoders on each text separately (each cut at `max_tokens`), and over all of them."""
    per = score_texts([a, b], texts, context, stride, max_tokens, quiet)
    n = sum(p["tokens"] for p in per)
    # all texts: the mean nats per token over every scored token of every text
    nll_a, nll_b = (sum(p["nll"][j] * p["tokens"] for p in per) / n for j in (0, 1))
    return {"kind": "perplexity", "texts": [p["text"] for p in per], "tokenizer": per[0]["tokenizer"], "tokens": n,
            "context": per[0]["context"], "stride": per[0]["stride"], "a": math.exp(nll_a), "b": math.exp(nll_b),
            "nll_a": nll_a, "nll_b": nll_b, "ratio": math.exp(nll_b - nll_a),
            "per_text": [{"name": p["text"]["name"], "tokens": p["tokens"], "a": p["perplexity"][0],
                          "b": p["perplexity"][1], "ratio": p["perplexity"][1] / p["perplexity"][0]} for p in per]}


def format_effect(a: _Model, b: _Model, texts: list[str], context: int, stride: int | None,
                  max_tokens: int | None, quiet: bool) -> dict | None:
    """What B's storage format alone does to perplexity, measured on A: A in float32 against A rounded to B's
    format (the rounding `io.storage` applies when writing). None when B is stored in float32."""
    fmt = b.facts["disk"]["format"]
    if fmt in ("float32", "quantised"):
        return None
    ids, _ = _same_tokens(a, b, read_texts(texts)[0])
    ids = ids[:max_tokens] if max_tokens else ids
    ctx = min(context, a.loaded.shape.max_positions or context)
    shape, weights, *_ = load_weights(resolve(a.loaded.path))
    stored = storage.encode_all(weights, fmt)
    rounded = fuse(build(shape, storage.decode(list(stored), stored.__getitem__))).eval()
    del weights, stored
    p32 = evaluate.perplexity(a.loaded.model, ids, context=ctx, stride=stride, quiet=quiet, label="perplexity A")
    pr = evaluate.perplexity(rounded, ids, context=ctx, stride=stride, quiet=quiet, label=f"perplexity A as {fmt}")
    return {"format": fmt, "measured_on": "a", "float32": p32["perplexity"], "rounded": pr["perplexity"],
            "ratio": pr["perplexity"] / p32["perplexity"], "tokens": p32["tokens"]}


def _line_sets(texts: list[str] | None, lines: list[str] | None) -> tuple[list[tuple[str, list[str]]], list[dict]]:
    """Sentences for an encoder, per text: (name, lines) for each text file (every non-empty line), or the given lines."""
    if lines is not None:
        return [("lines", [ln for ln in lines if ln.strip()])], []
    _, described = read_texts(texts)
    return [(d["name"], read_lines(t)) for t, d in zip(texts, described)], described


def _agreement(ea: torch.Tensor, eb: torch.Tensor) -> dict:
    """`evaluate.embedding_agreement` without the per-sentence list (kept once, on the whole comparison)."""
    out = embedding_agreement(ea, eb)
    out.pop("cosines")
    return out


def embeddings(a: _Model, b: _Model, sets: list[tuple[str, list[str]]], described: list[dict]) -> dict:
    """Agreement of two encoders' mean-pooled embeddings of the same sentences, over all and per text."""
    sentences = [ln for _, group in sets for ln in group]
    _, tok_note = _same_tokens(a, b, "\n".join(sentences))
    tok = a.loaded.tokenizer or b.loaded.tokenizer
    ea = evaluate.embed(a.loaded.model, tok, sentences)
    eb = evaluate.embed(b.loaded.model, tok, sentences)
    if ea.shape[1] != eb.shape[1]:
        raise CompressError(f"{a.loaded.path} and {b.loaded.path}: embedding widths differ "
                            f"({ea.shape[1]} vs {eb.shape[1]}); compare a model with its own compressed version")
    per_text, at = [], 0
    for name, group in sets:
        if len(sets) > 1 and len(group) >= 2:  # neighbours within one text: a search index of that kind
            per_text.append({"name": name, "lines": len(group), **_agreement(ea[at:at + len(group)],
                                                                            eb[at:at + len(group)])})
        at += len(group)
    return {"kind": "embedding", "texts": described, "tokenizer": tok_note, "lines": len(sentences),
            **embedding_agreement(ea, eb), "per_text": per_text}


# ----------------------------------------------------------------------------------------------- speed

@contextmanager
def _threads(n: int | None):
    """Run with `n` intra-op threads, restoring the previous count after."""
    old = torch.get_num_threads()
    if n:
        torch.set_num_threads(n)
    try:
        yield torch.get_num_threads()
    finally:
        torch.set_num_threads(old)


def measure_bandwidth(megabytes: int = 256, runs: int = 5, buffer: torch.Tensor | None = None) -> float:
    """Streaming read bandwidth in bytes per second: the median time to sum a float32 tensor much larger than caches.

    Args:
        megabytes: size of the tensor read (keep it well above the last-level cache); ignored with `buffer`.
        runs: timed sums after one untimed one.
        buffer: a float32 tensor to read instead of allocating one (to sample repeatedly).
    Returns:
        bytes / second.
    """
    x = buffer if buffer is not None else torch.ones(megabytes * (1 << 20) // 4)  # (n,) float32, pages mapped
    x.sum()
    ts = [seconds(x.sum) for _ in range(runs)]
    return x.numel() * x.element_size() / statistics.median(ts)


def decode_bytes(model: Transformer, cached: int) -> int:
    """Bytes one decode step must read: every weight once, plus the keys and values of `cached` positions.

    The token (and position) tables are read one row per step, except a tied table that is also the output
    head, which is read whole.
    """
    n = sum(p.numel() * p.element_size() for name, p in model.named_parameters()
            if name not in ("tokens", "positions", "types"))
    if model.is_decoder and model.lm_head is None:
        n += model.tokens.numel() * model.tokens.element_size()  # the tied output head
    kv = model.shape.kv_bytes(model.kv_widths)  # float32 cache
    return n + kv * cached


def prefill(model: Transformer, ids: torch.Tensor, cache: KVCache) -> torch.Tensor:
    """Process a prompt into the cache and return the logits of its last position only: (b, 1, vocab)."""
    return model.last_logits(ids, cache=cache, start=0)  # generation needs only the next token's distribution


def time_decoders(models: list[Transformer], runs: int = RUNS, prompt_tokens: int = PROMPT_TOKENS,
                  decode_tokens: int = DECODE_TOKENS, seed: int = 0, probe=None) -> dict:
    """Prompt (1×prompt_tokens) and per-token decode time of each model, finely interleaved, per run.

    A run prefills a fresh cache per model with the same prompt (timed as "prompt"), then feeds
    `decode_tokens` single tokens, alternating the models step by step so that a change in the machine's
    load hits all of them alike; a model's "decode" time of the run is the mean of its steps. The order of
    the models alternates from run to run. `probe()`, when given, runs once per run (e.g. a bandwidth sample)
    and its return values are collected. Times in seconds: {"prompt": [[per run] per model], "decode": [...],
    "probe": [...], "prompt_tokens", "decode_tokens"}.
    """
    vocab = min(m.shape.vocab_size for m in models)
    limit = min((m.shape.max_positions or 1 << 30) for m in models)
    prompt_tokens = max(1, min(prompt_tokens, limit - decode_tokens))
    g = torch.Generator().manual_seed(seed)
    ids = torch.randint(0, vocab, (1, prompt_tokens + decode_tokens), generator=g)  # (1, s) the same for all
    out = {"prompt": [[] for _ in models], "decode": [[] for _ in models], "probe": []}

    def run(order: list[int], record: bool):
        caches = {j: KVCache(models[j], 1, prompt_tokens + decode_tokens) for j in order}
        for j in order:
            tp = seconds(lambda: prefill(models[j], ids[:, :prompt_tokens], caches[j]))
            if record:
                out["prompt"][j].append(tp)
        steps = {j: 0.0 for j in order}
        for i in range(prompt_tokens, prompt_tokens + decode_tokens):
            for j in order:
                steps[j] += seconds(lambda: models[j](ids[:, i:i + 1], cache=caches[j], start=i))  # (1, 1, vocab)
        if record:
            for j in order:
                out["decode"][j].append(steps[j] / decode_tokens)

    with torch.inference_mode():
        run(list(range(len(models))), record=False)  # warm-up: allocator, kernels, rotary tables, page faults
        for r in range(runs):
            order = list(range(len(models)))
            run(order if r % 2 == 0 else order[::-1], record=True)
            if probe is not None:
                out["probe"].append(probe())
    return {**out, "prompt_tokens": prompt_tokens, "decode_tokens": decode_tokens}


def time_encoders(models: list[Transformer], ids: torch.Tensor, mask: torch.Tensor, runs: int = RUNS) -> dict:
    """Forward time of each encoder on one batch (ids, mask: (b, s)), interleaved, per run. Returns {"batch": [...]}."""
    out = [[] for _ in models]
    with torch.inference_mode():
        for m in models:
            m(ids, attention_mask=mask)  # warm-up
        for r in range(runs):
            order = range(len(models)) if r % 2 == 0 else reversed(range(len(models)))
            for j in order:
                out[j].append(seconds(lambda: models[j](ids, attention_mask=mask)))
    return {"batch": out}


def _side(times: list[list[float]]) -> dict:
    """Median milliseconds of A and B and speedup = time A / time B, with the raw runs."""
    a, b = statistics.median(times[0]) * 1e3, statistics.median(times[1]) * 1e3
    return {"a_ms": a, "b_ms": b, "speedup": a / b,
            "a_runs_ms": [t * 1e3 for t in times[0]], "b_runs_ms": [t * 1e3 for t in times[1]]}


DECODE_WEIGHTS = ("auto", "float32", "float16")
# How a decoder's one-sequence decode step runs: "auto" the compiled kernel where it applies (`native`), else torch
DECODE_STEPS = ("auto", "torch")


def check_decode_step(choice: str) -> str:
    """Raises CompressError unless choice is one of DECODE_STEPS; returns it."""
    if choice not in DECODE_STEPS:
        raise CompressError(f"--decode-step: expected one of {', '.join(DECODE_STEPS)}; got {choice!r}")
    return choice


def attach_step(model: Transformer, choice: str) -> str:
    """What the model's decode steps run (`native.attach` under "auto"), as a report line."""
    if check_decode_step(choice) == "torch":
        model.native = None
        return "torch (asked for)"
    from . import native
    return native.attach(model)


def decode_weights_for(choice: str, rows: int) -> str:
    """The product weights decoding runs with: float16 (`model.halve`) or float32. `auto` takes float16 when
    a step has at most `model.STEP_ROWS` rows (one prompt, or a few decoded together), where torch's float16
    one-row kernel reads the weights about twice as fast on this project's machine (see `model.product`).

    Raises:
        CompressError: not one of DECODE_WEIGHTS.
    """
    if choice not in DECODE_WEIGHTS:
        raise CompressError(f"--decode-weights: expected one of {', '.join(DECODE_WEIGHTS)}; got {choice!r}")
    if choice == "auto":
        return "float16" if rows <= STEP_ROWS else "float32"
    return choice


def speed(a: _Model, b: _Model, runs: int = RUNS, threads: int | None = None,
          sentences: list[str] | None = None, bandwidth: bool = True, decode_weights: str = "auto",
          decode_step: str = "auto") -> dict:
    """The speed section of the comparison (see `compare` for the keys). Decoders are timed with their product
    weights in `decode_weights_for(decode_weights, 1)` (float16: both models are `halve`d in place), their
    steps by `attach_step(model, decode_step)`."""
    ma, mb = a.loaded.model, b.loaded.model
    with _threads(threads) as n_threads:
        # how the threads were chosen, and the load the timings ran under
        out = {"threads": n_threads, "runs": runs, "thread_choice": threadlib.current().to_json()}
        if ma.is_decoder:
            out["decode_weights"] = decode_weights_for(decode_weights, 1)
            if out["decode_weights"] == "float16":
                halve(ma)
                halve(mb)
            out["decode_step"] = {"a": attach_step(ma, decode_step), "b": attach_step(mb, decode_step)}
            buf = torch.ones(256 << 18) if bandwidth else None  # 256 MB of float32, far above any cache
            probe = (lambda: measure_bandwidth(runs=3, buffer=buf)) if bandwidth else None
            t = time_decoders([ma, mb], runs=runs, probe=probe)
            del buf
            out["prompt"] = {"tokens": t["prompt_tokens"], **_side(t["prompt"])}
            dec = {"cached_tokens": t["prompt_tokens"], "tokens_per_run": t["decode_tokens"], **_side(t["decode"])}
            if bandwidth:
                bw = statistics.median(t["probe"])  # sampled once per run, under the same load as the timings
                out["bandwidth_gb_s"] = bw / 1e9
                mid = t["prompt_tokens"] + t["decode_tokens"] // 2  # mean cache length during the timed steps
                for side, m in (("a", ma), ("b", mb)):
                    nbytes = decode_bytes(m, mid)
                    dec[f"{side}_bytes"] = nbytes
                    dec[f"{side}_limit_ms"] = nbytes / bw * 1e3
                    dec[f"{side}_over_limit"] = dec[f"{side}_ms"] / dec[f"{side}_limit_ms"]
                dec["limit_speedup"] = dec["a_bytes"] / dec["b_bytes"]
            dec["a_tokens_per_s"], dec["b_tokens_per_s"] = 1e3 / dec["a_ms"], 1e3 / dec["b_ms"]  # generation rate
            out["decode"] = dec
        else:
            tok = a.loaded.tokenizer or b.loaded.tokenizer
            if sentences and tok is not None:
                batch = [sentences[i % len(sentences)] for i in range(BATCH_LINES)]
                ids, mask = evaluate.encode_batch(tok, batch, ma.shape.max_positions or 512)
            else:  # no text: a fixed random batch of 64-token sentences
                g = torch.Generator().manual_seed(0)
                s = min(64, ma.shape.max_positions or 64)
                ids = torch.randint(0, min(ma.shape.vocab_size, mb.shape.vocab_size), (BATCH_LINES, s), generator=g)
                mask = torch.ones_like(ids)
            t = time_encoders([ma, mb], ids, mask, runs=runs)
            side = _side(t["batch"])
            out["batch"] = {"sentences": ids.shape[0], "tokens": int(mask.sum()), **side,
                            "a_sentences_s": ids.shape[0] / side["a_ms"] * 1e3,
                            "b_sentences_s": ids.shape[0] / side["b_ms"] * 1e3}
        out["load_average_after"] = round(os.getloadavg()[0], 2)
    return out


# ---------------------------------------------------------------------------------------------- compare

def compare(a: str, b: str, texts: list[str] | None = None, lines: list[str] | None = None, *,
            context: int = 512, stride: int | None = None, max_tokens: int | None = None,
            speed_runs: int | None = RUNS, threads: int | None = None, decode_weights: str = "auto",
            decode_step: str = "auto",
            quiet: bool = True) -> dict:
    """Compare two models (an original and its compressed or tuned version, or any two the tool reads).

    Args:
        a, b: model paths (directory, .safetensors, .gguf, compressed directory, or builtin:NAME).
        texts: UTF-8 text files. Decoders: perplexity of each text; encoders: one sentence per line.
        lines: sentences for encoders, instead of `texts`.
        context, stride, max_tokens: perplexity windows (see `evaluate.perplexity`) and a cap on the tokens
            scored of each text.
        speed_runs: timed runs per speed figure (median reported); None or 0 skips the speed section.
        threads: intra-op threads for the speed section (default: torch's current setting).
        decode_weights: product weights the decoders are timed with (see `decode_weights_for`); perplexities
            are always computed first, in float32.
        decode_step: "auto" (the compiled decode step where it applies, see `native`) or "torch".
        quiet: no progress lines.

    Returns:
        A JSON-ready dict, schema "attncompress.compare/1":

        - "schema": "attncompress.compare/1"
        - "a", "b": one model each: "path", "format" ("attncompress" for a compressed directory, else
          "safetensors" / "gguf" / "torch"), "family", "compressed" (bool),
          "parameters": {"total", "block_matrices", "groups": {embeddings, attention, feed-forward, norms,
          other, total}} (floating-point tensors of the canonical weights; block matrices are the q, k, v, o and
          feed-forward weights or factors, no biases),
          "disk": {"bytes" (sum of the weight files), "files": [{"name", "bytes"}], "quantised" (bool: a
          quantised GGUF), "dtypes": {stored dtype: tensor count}, "format" (float32 / bfloat16 / float16 /
          int8 / quantised), "note" (str or null)},
          "runtime_bytes" (float32 parameters in memory), "kv_bytes_per_token" (int; null for encoders),
          "plan" ({"strategy", "keep", "layers": [{"layer", "qk", "vo", "ff": {kind: rank|null}, "qk_pairs"}]}
          from the manifest, and "full": {kind: most units} (qk in rotary pairs or rank); null for a model
          that is not compressed), "method" (manifest's method or null).
        - "ratios": B over A for "parameters", "block_matrices", "disk_bytes", "runtime_bytes",
          "kv_bytes_per_token" (null for encoders).
        - "quality": null without text; decoders: {"kind": "perplexity", "texts": [{"name", "bytes", "sha256",
          "lines"}], "tokenizer" (how the token ids were checked), "tokens" (all texts), "context", "stride",
          "per_text": [{"name", "tokens", "a", "b", "ratio"}] (each text scored on its own, its first
          `max_tokens` tokens), "a", "b" (perplexities over all scored tokens of all texts), "nll_a", "nll_b"
          (nats per token), "ratio" (b / a)}; encoders: {"kind": "embedding",
          "texts", "tokenizer", "lines", "cosine": {"mean", "p5", "min"}, "neighbour_agreement", "spearman",
          "cosines" (per line), "per_text": [{"name", "lines", "cosine", "neighbour_agreement", "spearman"}] (one
          per text file, neighbours within that file; empty for one file)} (see `evaluate.embedding_agreement`).
        - "format_effect": null unless decoders with text and B stored narrower than float32; else
          {"format" (B's), "measured_on": "a", "float32", "rounded" (perplexities of A as it runs and of A
          rounded to B's format), "ratio" (rounded / float32), "tokens"}.
        - "speed": null when skipped; else {"threads", "runs", "thread_choice": {"threads", "wait_policy",
          "reason", "load_average", "cores"} (see `threads.decide`), "load_average_after"} and for decoders
          "decode_weights" ("float16" or "float32": the product weights both models were timed with),
          "decode_step" ({"a", "b"}: "compiled kernel", or "torch (why)"; see `attach_step`),
          "prompt": {"tokens", "a_ms", "b_ms", "speedup", "a_runs_ms", "b_runs_ms"} (prefill of 1×tokens,
          last-position logits), "decode": {"cached_tokens", "tokens_per_run", "a_ms", "b_ms" (per token),
          "speedup", "a_runs_ms", "b_runs_ms", "a_bytes", "b_bytes" (bytes read per step), "a_limit_ms",
          "b_limit_ms" (bytes / bandwidth), "a_over_limit", "b_over_limit" (time / limit), "limit_speedup",
          "a_tokens_per_s", "b_tokens_per_s" (generation rate: 1 / decode time)},
          "bandwidth_gb_s" (measured streaming read, 1e9 bytes/s); for encoders "batch": {"sentences", "tokens",
          "a_ms", "b_ms", "speedup", "a_runs_ms", "b_runs_ms", "a_sentences_s", "b_sentences_s"} (a batch of
          32 sentences of the text, repeated when it has fewer). Every "speedup" is time of A / time of B.

    Raises:
        CompressError: unreadable models; a decoder against an encoder; different vocabularies or tokenizers
            that split the text differently; unreadable text.
    """
    decode_weights_for(decode_weights, 1)  # a bad choice fails before the slow part
    check_decode_step(decode_step)
    ma, mb = _open(a, "A"), _open(b, "B")
    sa, sb = ma.loaded.shape, mb.loaded.shape
    if ma.loaded.model.is_decoder != mb.loaded.model.is_decoder:
        raise CompressError(f"{a} and {b}: one is a decoder and the other an encoder; compare like with like")
    if sa.vocab_size != sb.vocab_size:
        raise CompressError(f"{a} and {b}: vocabularies differ ({sa.vocab_size} vs {sb.vocab_size} tokens); "
                            "compare a model with its own compressed version")
    fa, fb = ma.facts, mb.facts
    report = {
        "schema": SCHEMA, "a": fa, "b": fb,
        "ratios": {"parameters": _ratio(fb["parameters"]["total"], fa["parameters"]["total"]),
                   "block_matrices": _ratio(fb["parameters"]["block_matrices"], fa["parameters"]["block_matrices"]),
                   "disk_bytes": _ratio(fb["disk"]["bytes"], fa["disk"]["bytes"]),
                   "runtime_bytes": _ratio(fb["runtime_bytes"], fa["runtime_bytes"]),
                   "kv_bytes_per_token": _ratio(fb["kv_bytes_per_token"], fa["kv_bytes_per_token"])},
        "quality": None, "format_effect": None, "speed": None,
    }
    sentences = None
    if ma.loaded.model.is_decoder:
        if texts:
            report["quality"] = perplexities(ma, mb, list(texts), context, stride, max_tokens, quiet)
            report["format_effect"] = format_effect(ma, mb, list(texts), context, stride, max_tokens, quiet)
    elif texts or lines:
        sets, described = _line_sets(list(texts) if texts else None, lines)
        report["quality"] = embeddings(ma, mb, sets, described)
        sentences = [ln for _, group in sets for ln in group]
    if speed_runs:
        report["speed"] = speed(ma, mb, runs=speed_runs, threads=threads, sentences=sentences,
                                decode_weights=decode_weights, decode_step=decode_step)
    return report
