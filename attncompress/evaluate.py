"""Measuring a model: perplexity of a decoder, mean-pooled embeddings of an encoder, parameter counts."""
from __future__ import annotations

import math

import torch
import torch.nn.functional as F

from .errors import CompressError
from .model import Transformer
from .progress import Progress


def windows(n_tokens: int, context: int, stride: int) -> list[tuple[int, int, int]]:
    """Sliding windows over a token stream: (begin, end, n_new), input ids[begin:end], its last n_new targets scored.

    The protocol: every token after the first is scored exactly once, as the prediction from the tokens before
    it inside one window of at most `context` tokens. The first window ids[0:context] scores tokens
    1..context-1; each later window scores the next min(stride, context - 1) tokens and holds the `context`
    tokens ending with the last of them, so each prediction sees at least context - min(stride, context - 1)
    earlier tokens (with stride = context, consecutive windows overlap by one token).
    Example: n=10, context=4, stride=4 → [(0, 4, 3), (3, 7, 3), (6, 10, 3)];
    stride 2 → [(0, 4, 3), (2, 6, 2), (4, 8, 2), (6, 10, 2)].
    """
    if context < 2:
        raise CompressError(f"--context must be at least 2, got {context}")
    if not 1 <= stride <= context:
        raise CompressError(f"--stride must be between 1 and --context ({context}), got {stride}")
    step = min(stride, context - 1)  # a window of `context` tokens predicts at most context - 1 of them
    first = min(context, n_tokens)
    out = [(0, first, first - 1)] if first >= 2 else []
    scored = max(first, 1)  # targets 1..scored-1 are done
    while scored < n_tokens:
        end = min(scored + step, n_tokens)
        out.append((max(0, end - context), end, end - scored))
        scored = end
    return out


@torch.no_grad()
def perplexity(model: Transformer, ids: list[int] | torch.Tensor, context: int = 512, stride: int | None = None,
               batch: int = 4, quiet: bool = True, label: str = "perplexity") -> dict:
    """Token-level perplexity of a decoder over one token stream.

    Returns {"perplexity", "nll" (mean nats per token), "tokens" (scored), "context", "stride"}.
    """
    if not model.is_decoder:
        raise CompressError("perplexity needs a decoder; this model is an encoder (use `embed` or `compare`)")
    ids = torch.as_tensor(ids, dtype=torch.long)
    stride = stride or context
    wins = windows(len(ids), context, stride)
    if not wins:
        raise CompressError(f"text of {len(ids)} tokens is too short to score; give more text")
    total, count = 0.0, 0
    with Progress(sum(w[2] for w in wins), label, unit="tok", quiet=quiet) as bar:
        i = 0
        while i < len(wins):
            # batch windows of equal length together (all but perhaps the last)
            group = [wins[i]]
            while (len(group) < batch and i + len(group) < len(wins)
                   and wins[i + len(group)][1] - wins[i + len(group)][0] == group[0][1] - group[0][0]):
                group.append(wins[i + len(group)])
            x = torch.stack([ids[b:e] for b, e, _ in group])  # (n, s)
            logits = model(x)  # (n, s, vocab)
            for j, (b, e, new) in enumerate(group):
                lp = F.log_softmax(logits[j, -new - 1:-1].float(), dim=-1)  # predictions of the last `new` tokens
                tgt = x[j, -new:]
                total += float(-lp.gather(1, tgt[:, None]).sum())
                count += new
            bar.update(sum(g[2] for g in group), ppl=math.exp(total / count))
            i += len(group)
    return {"perplexity": math.exp(total / count), "nll": total / count, "tokens": count, "context": context,
            "stride": stride}


def mean_pool(hidden: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Mean of the hidden states (b, s, d) over the real tokens of the mask (b, s): (b, d), the sentence embedding."""
    m = mask[..., None].to(hidden.dtype)  # (b, s, 1)
    return (hidden * m).sum(1) / m.sum(1).clamp_min(1.0)  # mean over real tokens only


@torch.no_grad()
def pooled_embeddings(model: Transformer, ids: torch.Tensor, mask: torch.Tensor, batch: int = 32) -> torch.Tensor:
    """Mean-pooled last hidden states of padded sentences ids, mask (n, s): (n, d); each batch cut to its longest."""
    out = []
    for i in range(0, ids.shape[0], batch):
        m = mask[i:i + batch]
        s = int(m.sum(1).max())
        out.append(mean_pool(model(ids[i:i + batch, :s], attention_mask=m[:, :s]), m[:, :s]))  # (b, d)
    return torch.cat(out)


@torch.no_grad()
def embed(model: Transformer, tokenizer, lines: list[str], batch: int = 32, max_len: int | None = None) -> torch.Tensor:
    """Mean-pooled last hidden states of an encoder, one row per line: (n_lines, d)."""
    if model.is_decoder:
        raise CompressError("embed needs an encoder; this model is a decoder (use `perplexity`)")
    max_len = max_len or model.shape.max_positions
    out = []
    for i in range(0, len(lines), batch):
        ids, mask = encode_batch(tokenizer, lines[i:i + batch], max_len)
        out.append(mean_pool(model(ids, attention_mask=mask), mask))  # (b, d)
    return torch.cat(out)


def ranks(x: torch.Tensor) -> torch.Tensor:
    """Ranks 1..n of the values of a 1-D tensor, ties sharing their average rank. Example: [3, 1, 3] → [2.5, 1, 2.5]."""
    order = torch.argsort(x, stable=True)
    xs = x[order]
    new = torch.ones(len(xs), dtype=torch.bool)
    new[1:] = xs[1:] != xs[:-1]  # (n,) first member of each run of equal values
    run = torch.cumsum(new.long(), 0) - 1  # (n,) run index of each sorted value
    starts = torch.nonzero(new).flatten()  # (runs,) first sorted position of each run
    ends = torch.cat([starts[1:], torch.tensor([len(xs)])])  # (runs,) one past its last
    avg = (starts + ends + 1).double() / 2  # mean of the 1-based positions starts+1 .. ends
    out = torch.empty(len(xs), dtype=torch.float64)
    out[order] = avg[run]
    return out


def spearman(x: torch.Tensor, y: torch.Tensor) -> float:
    """Spearman's rank correlation of two 1-D tensors: Pearson's correlation of their average ranks."""
    rx, ry = ranks(x), ranks(y)
    rx, ry = rx - rx.mean(), ry - ry.mean()
    return float((rx * ry).sum() / (rx.norm() * ry.norm()).clamp_min(1e-300))


def embedding_agreement(ea: torch.Tensor, eb: torch.Tensor) -> dict:
    """How far two models' embeddings of the same sentences agree.

    Args:
        ea, eb: (n, d) embeddings of the same n sentences by models A and B (mean-pooled; any scale).
    Returns:
        {"cosine": {"mean", "p5", "min"}, "neighbour_agreement", "spearman", "cosines"}: the cosine of ea[i]
        and eb[i] per sentence (summarised; "cosines" lists them all), the fraction of sentences whose most
        similar other sentence is the same under both models, and the Spearman correlation of the n(n − 1)/2
        pairwise cosine similarities under A with those under B (does B order all pairs as A does?).
        Example: identical embeddings → cosine 1, agreement 1, Spearman 1.
    Raises:
        CompressError: fewer than 2 sentences.
    """
    n = ea.shape[0]
    if n < 2:
        raise CompressError(f"embedding agreement needs at least 2 lines of text, got {n}; give more lines")
    a, b = F.normalize(ea.double(), dim=1), F.normalize(eb.double(), dim=1)  # (n, d), unit rows
    cos = (a * b).sum(1)  # (n,)
    sa, sb = a @ a.T, b @ b.T  # (n, d) @ (d, n) → (n, n) similarities within each model
    iu = torch.triu_indices(n, n, offset=1)
    rho = spearman(sa[iu[0], iu[1]], sb[iu[0], iu[1]])  # each unordered pair once
    eye = torch.eye(n, dtype=torch.bool)
    sa, sb = sa.masked_fill(eye, -math.inf), sb.masked_fill(eye, -math.inf)  # a line is not its own neighbour
    agree = (sa.argmax(1) == sb.argmax(1)).double().mean()
    return {"cosine": {"mean": float(cos.mean()), "p5": float(torch.quantile(cos, 0.05)), "min": float(cos.min())},
            "neighbour_agreement": float(agree), "spearman": rho, "cosines": cos.tolist()}


def encode_batch(tokenizer, lines: list[str], max_len: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Token ids (b, s) padded with 0 and the attention mask (b, s) for a list of sentences."""
    encs = [tokenizer.encode(line) for line in lines]
    # a tokenizer.json may pad every line to a fixed length itself: keep only its real tokens
    seqs = [[i for i, m in zip(e.ids, e.attention_mask) if m][:max_len] for e in encs]
    s = max(len(q) for q in seqs)
    ids = torch.zeros(len(seqs), s, dtype=torch.long)
    mask = torch.zeros(len(seqs), s, dtype=torch.long)
    for j, q in enumerate(seqs):
        ids[j, :len(q)] = torch.tensor(q)
        mask[j, :len(q)] = 1
    return ids, mask


def sentence_batch(loaded, texts: list, max_len: int, n: int | None = None) -> tuple[torch.Tensor, torch.Tensor, list]:
    """Padded token ids and mask (n, s) of the sentences of text files (`texts.read_sentences`), and their description.

    Each sentence is tokenised alone with the tokenizer's own special tokens and cut to `max_len` tokens; with
    `n`, at most n sentences, evenly spaced over the texts (so they cover all of them, not only the first).

    Raises:
        CompressError: unreadable text, no tokenizer, or fewer than 2 sentences.
    """
    from .texts import read_sentences
    sentences, described = read_sentences(texts)
    if loaded.tokenizer is None:
        raise CompressError(f"{loaded.path}: no tokenizer found; expected tokenizer.json beside the weights")
    if len(sentences) < 2:
        raise CompressError(f"{', '.join(map(str, texts))}: {len(sentences)} sentence(s); an encoder needs at least "
                            "2 (one per line, or paragraphs separated by blank lines)")
    if n is not None and len(sentences) > n:
        sentences = [sentences[int(i)] for i in torch.linspace(0, len(sentences) - 1, n).round().long()]
    ids, mask = encode_batch(loaded.tokenizer, sentences, max_len)
    return ids, mask, described


def param_groups(weights: dict[str, torch.Tensor]) -> dict[str, int]:
    """Parameter counts by group from canonical names: embeddings, attention, feed-forward, norms, other."""
    groups = {"embeddings": 0, "attention": 0, "feed-forward": 0, "norms": 0, "other": 0}
    for name, t in weights.items():
        if not t.is_floating_point():
            continue  # index tensors (kept rotary pairs) are not parameters
        if name.startswith(("embed.tokens", "embed.positions", "embed.types", "lm_head")):
            g = "embeddings"
        elif "norm" in name:
            g = "norms"
        elif ".attn." in name:
            g = "attention"
        elif ".ff." in name:
            g = "feed-forward"
        else:
            g = "other"
        groups[g] += t.numel()
    groups["total"] = sum(groups.values())
    return groups


def kv_bytes_per_token(shape, weights: dict[str, torch.Tensor], bytes_per_element: int = 4) -> int:
    """Key and value bytes one token adds to the cache, with the widths the canonical weights store."""
    return shape.kv_bytes([(weights[f"layers.{i}.attn.q.weight"].shape[0] // shape.n_heads,
                            weights[f"layers.{i}.attn.v.weight"].shape[0] // shape.n_kv_heads)
                           for i in range(shape.n_layers)], bytes_per_element)


def block_matrix_params(weights: dict[str, torch.Tensor]) -> int:
    """Parameters of the transformer-block matrices (q, k, v, o and feed-forward weights or factors; no biases)."""
    return sum(t.numel() for n, t in weights.items()
               if n.startswith("layers.") and (".attn." in n or ".ff." in n) and n.endswith((".weight", ".a", ".b")))
