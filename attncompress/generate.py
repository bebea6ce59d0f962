"""Sampling from a decoder with the KV cache: `attncompress generate`, and text drawn from the model itself.

Shape legend: b prompts in a batch, s prompt tokens, t cached positions, V vocabulary.

Decoding. Prompts of the same length share a batch (so every row has the same positions and no padding is
needed); each batch is prefilled once into a fresh cache, then fed one token per step. Greedy decoding
(temperature 0) takes the arg-max of the last logits, which is what the reference library's
`generate(do_sample=False)` does. Sampling divides the logits by the temperature, keeps the smallest set of
most likely tokens whose probability reaches `top_p` (nucleus sampling, Holtzman et al. 2020), and draws
from one seeded generator, so a seed and a batch size give the same tokens on every run (CPU).

Model samples as calibration text (`corpus:samples`). Without data, a model's own samples stand in for
its training distribution (data-free practice, LLM-QAT, Liu et al. 2023): every sequence starts from one
token drawn uniformly from the vocabulary, the next `greedy` tokens are the arg-max, the rest are sampled
at the temperature. The text is whatever the model writes; it is used for calibration only and is not
checked for content. Samples are cached under `cache_dir()` by (the model's file checksums, the settings),
so a second run reads the file instead of sampling again.
"""
from __future__ import annotations

import hashlib
import json
import math
import os
import sys
from dataclasses import asdict, dataclass
from pathlib import Path

import torch

from .errors import CompressError
from .model import KVCache, Transformer
from .progress import Progress

SAMPLES = "corpus:samples"  # the text name; "corpus:samples:N" asks for N tokens
CACHE_ENV = "ATTNCOMPRESS_CACHE"


@dataclass(frozen=True)
class SampleSettings:
    """How `corpus:samples` text is drawn from a model (everything that fixes the tokens, with the model)."""
    tokens: int = 20000  # total sampled tokens (rounded up to whole sequences)
    length: int = 256  # tokens per sequence, the random first token included
    batch: int = 16  # sequences decoded together; part of the result (the floating-point sums depend on it)
    seed: int = 0
    greedy: int = 3  # arg-max tokens after the random first one
    temperature: float = 1.0
    top_p: float = 1.0


def _pick(logits: torch.Tensor, temperature: float, top_p: float, g: torch.Generator) -> torch.Tensor:
    """Next token per row from (b, V) logits: arg-max at temperature 0, else nucleus sampling. Returns (b,)."""
    if temperature == 0:
        return logits.argmax(-1)
    probs = torch.softmax(logits.double() / temperature, dim=-1)  # (b, V)
    if top_p < 1:
        p, idx = probs.sort(-1, descending=True)  # (b, V) each
        # keep a token when the mass before it is still below top_p (so the most likely one always stays)
        keep = (p.cumsum(-1) - p) < top_p
        probs = torch.zeros_like(probs).scatter_(-1, idx, p * keep)
    return torch.multinomial(probs, 1, generator=g).squeeze(-1)


@torch.inference_mode()
def _decode_batch(model: Transformer, ids: torch.Tensor, new: int, temperature: float, top_p: float,
                  greedy: int, g: torch.Generator, bar: Progress) -> torch.Tensor:
    """`new` tokens after the prompts ids (b, s), the first `greedy` of them arg-max; returns (b, new)."""
    b, s = ids.shape
    cache = KVCache(model, b, s + new)
    logits = model.last_logits(ids, cache=cache, start=0)[:, -1]  # (b, V): only the next token matters
    out = []
    for i in range(new):
        nxt = _pick(logits.float(), 0 if i < greedy else temperature, top_p, g)  # (b,)
        out.append(nxt)
        bar.update(b)
        if i + 1 < new:
            logits = model(nxt[:, None], cache=cache, start=s + i)[:, -1]  # (b, 1, V) → (b, V)
    return torch.stack(out, 1)  # (b, new)


def generate_ids(model: Transformer, prompts: list[list[int]], *, max_tokens: int, temperature: float = 0.0,
                 top_p: float = 1.0, seed: int = 0, batch: int = 8, greedy: int = 0, quiet: bool = True,
                 label: str = "generate") -> list[list[int]]:
    """New token ids for each prompt (prompts of one length are decoded together, `batch` at a time).

    Args:
        model: a decoder runtime.
        prompts: token ids per prompt, each at least one token.
        max_tokens: new tokens per prompt.
        temperature: 0 for greedy decoding, else the sampling temperature.
        top_p: nucleus mass kept when sampling, in (0, 1].
        seed, batch: seed of the one generator; rows per forward pass (both fix the sampled tokens).
        greedy: the first `greedy` new tokens are arg-max whatever the temperature.
        quiet, label: the progress line on stderr.

    Returns:
        max_tokens ids per prompt, in the prompts' order.

    Raises:
        CompressError: an encoder, an empty prompt, bad numbers, or prompt + max_tokens beyond the positions.
    """
    _check(model, prompts, max_tokens, temperature, top_p, batch)
    g = torch.Generator().manual_seed(seed)
    order = sorted(range(len(prompts)), key=lambda i: (len(prompts[i]), i))  # same lengths side by side
    out: list[list[int] | None] = [None] * len(prompts)
    with Progress(len(prompts) * max_tokens, label, unit="tok", quiet=quiet) as bar:
        j = 0
        while j < len(order):
            n = len(prompts[order[j]])
            group = [i for i in order[j:j + batch] if len(prompts[i]) == n]
            ids = torch.tensor([prompts[i] for i in group], dtype=torch.long)  # (b, s)
            new = _decode_batch(model, ids, max_tokens, temperature, top_p, greedy, g, bar)  # (b, new)
            for row, i in enumerate(group):
                out[i] = new[row].tolist()
            j += len(group)
    return out


def _check(model, prompts, max_tokens, temperature, top_p, batch) -> None:
    """One-line errors for what cannot be generated."""
    if not model.is_decoder:
        raise CompressError(f"generate needs a decoder; this {model.shape.family} model is an encoder")
    if not prompts or any(len(p) == 0 for p in prompts):
        raise CompressError("--prompt: every prompt needs at least one token; give non-empty prompts")
    for name, v in (("max-tokens", max_tokens), ("batch", batch)):
        if isinstance(v, bool) or not isinstance(v, int) or v <= 0:
            raise CompressError(f"--{name}: must be a positive whole number, got {v!r}")
    if not (isinstance(temperature, (int, float)) and math.isfinite(temperature) and temperature >= 0):
        raise CompressError(f"--temperature: must be a number ≥ 0 (0: greedy), got {temperature!r}")
    if not (isinstance(top_p, (int, float)) and 0 < top_p <= 1):
        raise CompressError(f"--top-p: must be in (0, 1], got {top_p!r}")
    limit = model.shape.max_positions
    longest = max(len(p) for p in prompts)
    if limit and longest + max_tokens > limit:
        raise CompressError(f"--max-tokens {max_tokens}: a prompt of {longest} tokens plus that exceeds the model's "
                            f"{limit} positions; give at most {limit - longest}")


# ------------------------------------------------------------------------------------ samples as a text

def sample_text(model: Transformer, tokenizer, settings: SampleSettings, quiet: bool = True) -> str:
    """Sequences sampled from the model (see the module docstring), decoded and joined by blank lines."""
    vocab = min(model.shape.vocab_size, tokenizer.get_vocab_size())  # rows past the tokenizer are padding
    n = -(-settings.tokens // settings.length)
    g = torch.Generator().manual_seed(settings.seed)
    first = torch.randint(0, vocab, (n,), generator=g).tolist()
    new = generate_ids(model, [[t] for t in first], max_tokens=settings.length - 1,
                       temperature=settings.temperature, top_p=settings.top_p, seed=settings.seed + 1,
                       batch=settings.batch, greedy=settings.greedy, quiet=quiet, label="sample")
    return "\n\n".join(tokenizer.decode([t] + rest).strip() for t, rest in zip(first, new)) + "\n"


def cache_dir() -> Path:
    """$ATTNCOMPRESS_CACHE, else $XDG_CACHE_HOME/attncompress, else ~/.cache/attncompress."""
    if os.environ.get(CACHE_ENV):
        return Path(os.environ[CACHE_ENV])
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "attncompress"


def is_samples(name) -> bool:
    return str(name) == SAMPLES or str(name).startswith(SAMPLES + ":")


def parse_samples(name: str) -> SampleSettings:
    """`corpus:samples` → the default settings; `corpus:samples:N` → N tokens.

    Raises:
        CompressError: N is not a positive whole number.
    """
    rest = str(name)[len(SAMPLES) + 1:]
    if not rest:
        return SampleSettings()
    if not rest.isdigit() or int(rest) <= 0:
        raise CompressError(f"{name}: expected {SAMPLES} or {SAMPLES}:N with N a positive number of tokens")
    return SampleSettings(tokens=int(rest))


def samples_file(model_path: str | Path, settings: SampleSettings, quiet: bool = False) -> Path:
    """The cached sample text of a model with these settings, sampled now when it is not cached yet."""
    from .io.read import open_source
    from .loading import load_model
    from .builtin import resolve
    path = resolve(model_path)
    src = open_source(path)
    files = [{"name": f.name, "sha256": _sha256(f)} for f in src.files]
    key = hashlib.sha256(json.dumps({"model": files, "settings": asdict(settings)}, sort_keys=True).encode()).hexdigest()
    out = cache_dir() / f"samples-{settings.tokens}tok-seed{settings.seed}-{key[:16]}.txt"
    if out.is_file():
        return out
    loaded = load_model(path)
    if loaded.tokenizer is None:
        raise CompressError(f"{path}: {SAMPLES} needs the model's tokenizer; put tokenizer.json beside the weights")
    if not quiet:
        print(f"[samples] drawing {settings.tokens} tokens from {path.name} (cached in {out.parent})",
              file=sys.stderr, flush=True)
    text = sample_text(loaded.model, loaded.tokenizer, settings, quiet)
    _write_atomic(out, text, {"model": files, "settings": asdict(settings), "source": str(path)})
    return out


def resolve_texts(texts: list | None, model_path: str | Path, quiet: bool = False) -> list | None:
    """The texts with every `corpus:samples[:N]` replaced by the cached sample file of `model_path`."""
    if not texts:
        return texts
    return [str(samples_file(model_path, parse_samples(t), quiet)) if is_samples(t) else t for t in texts]


def _sha256(path: Path) -> str:
    from .compress import sha256_file
    return sha256_file(path)


def _write_atomic(out: Path, text: str, meta: dict) -> None:
    """The sample text and its settings beside it, each written to a temporary file and renamed."""
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        for path, data in ((out.with_suffix(".json"), json.dumps(meta, indent=1, sort_keys=True)), (out, text)):
            tmp = path.with_name(f".{path.name}.partial-{os.getpid()}")
            tmp.write_text(data, encoding="utf-8")
            os.replace(tmp, path)
    except OSError as e:
        raise CompressError(f"{out.parent}: cannot write the sample cache ({e.strerror or e}); set {CACHE_ENV} "
                            "to a writable folder") from None
