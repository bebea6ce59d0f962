"""The calibration fine-tune: a short AdamW run over the factors of a compressed model.

Shape legend: b blocks in a batch, s tokens per block (context), V vocabulary, k cached teacher tokens,
d d_model, h query heads, g key/value groups, w_qk / w_vo per-head widths, r a factor rank.

What trains. Every factor tensor: the two thin matrices `a: (d_out, r)` and `bt: (r, d_in)` of each
factorised feed-forward matrix, and the narrowed query/key/value/output projections, which are the
attention factors (W_q^h, W_k^g of each query-key form, W_v^g, W_o^h of each value-output map). With
`train_norms` also the norm weights (and LayerNorm biases); with `train_dense` also the feed-forward
matrices the plan left dense. Embeddings, the output head and projection biases stay frozen.

Loss per block of `context` tokens:

    mix · CE(next token) + (1 − mix) · T² · KL(teacher_T ‖ student_T)  [+ penalty]

with both distributions softened by the temperature T; the T² keeps the soft-target gradients on the scale
of the hard ones (Hinton, Vinyals and Dean 2015, "Distilling the knowledge in a neural network"). The
default mix 0.5 weighs both terms equally; T = 1 keeps the teacher's own distribution. CE scores the s − 1
next tokens of a block, KL all s positions. Without a teacher the loss is CE alone.

Encoders (sentence embeddings). The data are sentences (`texts.split_sentences`: one per line, or cut from
paragraphs), each tokenised with the tokenizer's special tokens, at most `context` tokens, padded; a batch
is `batch` sentences, run as `SENTENCE_CHUNKS` sub-batches of similar length, each cut to its longest (the
same loss as the whole batch padded to its longest, with far less padding). The teacher (always needed)
gives each sentence's normalised mean-pooled embedding t (the pooling of `embed`), and the student's e is
pooled the same way:

    cos: mean over sentences of 1 − cos(e, t)        mse: mean squared error of e/‖e‖ against t
    [+ hidden_weight · Σ‖h − h_T‖² / Σ‖h_T‖² over the real tokens' last hidden states]  [+ penalty]

Teacher targets are computed once per sentence, alone and unpadded, and kept (they are small). The
held-out slice is `heldout` of the sentences, evenly spaced, as blocks are for a decoder.

Teacher cache. Full teacher logits cost V·s·4 bytes a block (25 MB for SmolLM2 at 128 tokens), so each
block keeps only its top-k teacher log-probabilities and their token ids (k = 64: 96 KiB a block at
s = 128), computed once, on its own (batch 1, so a cached and a recomputed block give the same bits). The KL
is then taken between the coarsened distributions over those k tokens plus one bin for the rest of the
vocabulary: exact when k ≥ V, otherwise a lower bound of the full KL (coarsening never increases a KL
divergence, the data-processing inequality). When the blocks a run touches would need more than
`CACHE_BYTES`, nothing is cached and the teacher runs every step.

Penalty (`decay`, the registry `DECAYS`; the default is Frobenius decay with λ = `DEFAULT_DECAY_COEF`):
    "frobenius": λ Σ ‖A Bᵀ‖_F² over every factor pair, as tr((AᵀA)(BᵀB)) — the product is never formed.
        The pairs: each factorised feed-forward matrix (a, b); for each query head h of group g the
        query-key form W_q^hᵀ W_k^g (d × d; with rotary embeddings the form at position offset zero — the
        rotation R(Δ) between the factors is ignored) and the value-output map W_o^h W_v^g (d × d). A dense
        feed-forward matrix W trained with `train_dense` is the pair (W, I): λ‖W‖_F². Biases are not
        penalised. AdamW's own weight decay is zero.
    "factor": AdamW's decoupled weight decay λ on every factor tensor (and trained dense matrix; not on norms).
    "none": neither.
  The penalty costs (m + n)·r² per pair and step, which at the ranks a 0.7 budget keeps is a sizeable
  fraction of a forward-backward pass of a few hundred tokens. So it is evaluated every `penalty_every`
  steps with weight penalty_every · λ ("lazy regularisation", Karras et al. 2020, StyleGAN2 §3.1): the sum
  of its gradients over any penalty_every steps is unchanged, its cost is divided by penalty_every, and its
  gradient is formed in closed form, 2λA(BᵀB) and 2λB(AᵀA), rather than by autograd through the Gram matrices.

Schedule. Linear warm-up over the first `WARMUP_FRACTION` of the steps, then cosine decay to
`LR_FLOOR` × lr at the end (both common practice, no source).

Data. Each text is cut into non-overlapping blocks of its own; `heldout` of all blocks, evenly spaced (so
every text gives its share), are held out and never trained on. The training blocks are visited in an
endless stream of seeded permutations (one per epoch), step t taking stream positions [t·batch,
(t + 1)·batch). The data position is therefore the step, and the order depends only on the seed and the
number of blocks. The report says how many times each text's blocks were visited, and warns when the run
reads more tokens than the training blocks hold.

Best step. Every `eval_every` steps (and before the first) the loss without the penalty is measured on the
held-out blocks; the trained tensors of the lowest held-out loss are the ones written, and the run stops
early when the held-out loss rose at `patience` evaluations in a row (a tune that memorises its text).

Checkpoints go to a sibling file of the output, `.{out}.tune-checkpoint.pt` (trained tensors, AdamW state,
step, RNG state, loss curve, held-out perplexities at the start, the held-out curve and the best
step's tensors), written to a temporary file and renamed,
so an interrupted run always leaves the last complete one. `resume` checks that the settings, data, model
and teacher are the ones that wrote it, and continues bit for bit as the uninterrupted run would (for the
same number of processes). The checkpoint is removed once the output directory is written.

Distributed. With WORLD_SIZE > 1 in the environment (torchrun), each process joins a gloo process group,
takes a contiguous slice of batch / WORLD_SIZE blocks of every global batch, and DistributedDataParallel
averages the gradients, so the update is that of the global batch on one process up to float rounding.
Rank 0 evaluates, checkpoints and writes; the others wait at a barrier.
"""
from __future__ import annotations

import contextlib
import copy
import hashlib
import json
import math
import os
import sys
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Callable

import torch
import torch.nn.functional as F

from . import allocator, evaluate
from .errors import CompressError
from .loading import is_compressed, load_model, read_manifest, tokens
from .model import LayerNorm, Linear, LowRankLinear, Transformer
from .io import storage
from .io.storage import decode
from .io.write import atomic_dir, check_output, write_model_dir
from .builtin import BUILTIN, resolve
from .progress import Progress, Timer
from .texts import read_texts, token_blocks

DEFAULT_MIX = 0.5
DEFAULT_TEMPERATURE = 1.0
DEFAULT_TOPK = 64
DEFAULT_PENALTY_EVERY = 4
DEFAULT_HELDOUT = 0.1  # fraction of the training blocks held out to pick the best step
DEFAULT_EVAL_EVERY = 10  # steps between held-out evaluations
DEFAULT_PATIENCE = 3  # held-out evaluations without a new best before the run stops
WARMUP_FRACTION = 0.1
LR_FLOOR = 0.1
CACHE_BYTES = 2 << 30  # teacher top-k cache limit per process
CHECKPOINT_FORMAT = 2


class TuneInterrupted(KeyboardInterrupt):
    """Ctrl-C during a tune; the message says which checkpoint is left and how to continue."""


@dataclass(frozen=True)
class TuneSettings:
    """Everything that fixes the result of a tune (with the model, the data and the teacher)."""
    steps: int
    batch: int  # global: blocks per optimiser step over all processes
    context: int
    lr: float
    seed: int
    decay: str
    decay_coef: float
    penalty_every: int
    temperature: float
    mix: float  # weight of the next-token loss; 1.0 when there is no teacher
    topk: int
    train_norms: bool
    train_dense: bool
    warmup: int
    heldout: float  # fraction of the blocks held out
    eval_every: int
    patience: int
    embed_loss: str | None = None  # encoders: "cos" or "mse" on the normalised pooled embedding
    hidden_weight: float = 0.0  # encoders: weight of the relative squared error of the last hidden states
    compute: str = "float32"  # the forward passes' products: "float32", or "bfloat16" under autocast

    def to_json(self) -> dict:
        return asdict(self)


# --------------------------------------------------------------------------------------------- the maths

class _PairSqNorm(torch.autograd.Function):
    """‖A Bᵀ‖_F² = Σ (AᵀA) ∘ (BᵀB) with the closed-form gradient 2A(BᵀB), 2B(AᵀA)."""

    @staticmethod
    def forward(ctx, a, b):
        ga, gb = a.T @ a, b.T @ b  # (r, d_out) @ (d_out, r), (r, d_in) @ (d_in, r) → (r, r) each
        ctx.save_for_backward(a, b, ga, gb)
        return (ga * gb).sum()  # both Gram matrices are symmetric, so this is tr(ga gb)

    @staticmethod
    def backward(ctx, grad):
        a, b, ga, gb = ctx.saved_tensors
        # one (m, r) @ (r, r) product per factor instead of autograd's two through each Gram matrix
        return (2 * grad) * (a @ gb), (2 * grad) * (b @ ga)


def pair_sq_norm(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """‖A Bᵀ‖_F² without the product, differentiable (same value as `factorize.product_sq_norm`).

    Args:
        a: (m, r).
        b: (n, r).

    Returns:
        scalar tensor in a's dtype.
    """
    assert a.dim() == 2 and b.dim() == 2 and a.shape[1] == b.shape[1]
    return _PairSqNorm.apply(a, b)


def _head_grams(w: torch.Tensor, heads: int, rows: bool) -> torch.Tensor:
    """Per-head Gram matrices of a projection: rows=True splits (heads·w, d) by rows, else (d, heads·w) by columns."""
    if rows:
        x = w.view(heads, -1, w.shape[1])  # (heads, w, d)
    else:
        x = w.view(w.shape[0], heads, -1).transpose(0, 1)  # (heads, d, w) → per head W^hᵀ is (w, d)
        x = x.transpose(1, 2)  # (heads, w, d)
    return x @ x.transpose(1, 2)  # (heads, w, d) @ (heads, d, w) → (heads, w, w)


def attention_pair_sq_norm(q: torch.Tensor, k: torch.Tensor, v: torch.Tensor, o: torch.Tensor,
                           n_heads: int, n_kv_heads: int) -> torch.Tensor:
    """Σ_h ‖W_q^hᵀ W_k^g‖_F² + ‖W_o^h W_v^g‖_F² over query heads h of group g, without any d × d product.

    ‖W_q^hᵀ W_k^g‖² = tr((W_q^h W_q^hᵀ)(W_k^g W_k^gᵀ)) and ‖W_o^h W_v^g‖² = tr((W_o^hᵀ W_o^h)(W_v^g W_v^gᵀ)),
    each a sum of the elementwise product of two small symmetric Gram matrices.

    Args:
        q: (h·w_qk, d), k: (g·w_qk, d), v: (g·w_vo, d), o: (d, h·w_vo) projection weights.
        n_heads, n_kv_heads: h and g.

    Returns:
        scalar tensor in q's dtype.
    """
    rep = n_heads // n_kv_heads
    gq, gk = _head_grams(q, n_heads, True), _head_grams(k, n_kv_heads, True)  # (h, w_qk, w_qk), (g, w_qk, w_qk)
    gv, go = _head_grams(v, n_kv_heads, True), _head_grams(o, n_heads, False)  # (g, w_vo, w_vo), (h, w_vo, w_vo)
    # query head j belongs to group j // rep, as in the forward pass
    qk = (gq * gk.repeat_interleave(rep, 0)).sum()
    vo = (go * gv.repeat_interleave(rep, 0)).sum()
    return qk + vo


def frobenius_penalty(model: Transformer, dense: bool = False) -> torch.Tensor:
    """Σ ‖A Bᵀ‖_F² over every factor pair of the model (see the module docstring for the pairs).

    Args:
        model: the runtime.
        dense: also Σ ‖W‖_F² over the dense feed-forward matrices (trained with `train_dense`).

    Returns:
        scalar tensor, differentiable with respect to the factor tensors.
    """
    total = torch.zeros((), dtype=model.tokens.dtype)
    for blk in model.blocks:
        a = blk.attn
        if all(isinstance(m, Linear) for m in (a.q, a.k, a.v, a.o)):
            total = total + attention_pair_sq_norm(a.q.weight, a.k.weight, a.v.weight, a.o.weight,
                                                   a.n_heads, a.n_kv_heads)
        for kind in model.shape.ff_kinds:
            lin = getattr(blk.ff, kind, None)
            if isinstance(lin, LowRankLinear):
                total = total + pair_sq_norm(lin.a, lin.bt.T)  # a: (d_out, r), b = btᵀ: (d_in, r)
            elif dense and isinstance(lin, Linear):
                total = total + lin.weight.pow(2).sum()
    return total


def teacher_targets(logits: torch.Tensor, k: int, temperature: float) -> tuple[torch.Tensor, torch.Tensor]:
    """The top-k teacher log-probabilities at a temperature and their token ids.

    Args:
        logits: (s, V) teacher logits of one block.
        k: tokens kept per position (clipped to V).
        temperature: T > 0.

    Returns:
        (logp, ids): (s, k) float32 log-probabilities of softmax(logits / T), descending, and (s, k) int64 ids.
    """
    logp = F.log_softmax(logits.float() / temperature, dim=-1)  # (s, V)
    top = torch.topk(logp, min(k, logp.shape[-1]), dim=-1)  # ties: torch's order, deterministic on CPU
    return top.values, top.indices


def distill_kl(student: torch.Tensor, logp: torch.Tensor, ids: torch.Tensor, temperature: float) -> torch.Tensor:
    """Mean KL(teacher ‖ student) per position over the top-k tokens plus one bin for the rest, times T².

    Args:
        student: (n, V) student logits.
        logp: (n, k) teacher log-probabilities at temperature T (from `teacher_targets`).
        ids: (n, k) their token ids.
        temperature: T.

    Returns:
        scalar tensor; the exact T²·KL when k = V.
    """
    lq = F.log_softmax(student.float() / temperature, dim=-1)  # (n, V)
    lq_top = lq.gather(1, ids)  # (n, k)
    p_top = logp.exp()
    kl_top = (p_top * (logp - lq_top)).sum(-1)  # (n,)
    # the tail bin: mass outside the k tokens, 1 − Σ p; log(1 − e^x) = log(−expm1(x)) stays accurate near x = 0
    lp_tail = torch.log((-torch.expm1(torch.logsumexp(logp, -1))).clamp_min(1e-30))  # (n,)
    lq_tail = torch.log((-torch.expm1(torch.logsumexp(lq_top, -1))).clamp_min(1e-30))  # (n,)
    p_tail = lp_tail.exp()
    # a tail below float32 resolution contributes nothing (0 · log 0 = 0)
    kl_tail = torch.where(p_tail > 1e-20, p_tail * (lp_tail - lq_tail), torch.zeros_like(p_tail))
    return (kl_top + kl_tail).mean() * temperature ** 2


class _TokenLosses(torch.autograd.Function):
    """(CE, T²·KL) of `next_token_loss` and `distill_kl` from one pass over the logits, gradient in closed form.

    Only a few entries of the log-probabilities enter either term (the next token's, the k teacher tokens'),
    so the forward needs just each row's logsumexp and two gathers, and the backward one softmax per
    temperature, not the (n, V) log-softmax that autograd would keep and run backwards once per term (at
    SmolLM2's 49k vocabulary and 4 × 128 tokens: 90 ms a step instead of 350). With lq = z/T − logsumexp(z/T):
      CE = mean over the rows r ∈ R of logsumexp(z_r) − z_{r,t_r};
      ∂CE/∂z_r = (softmax(z_r) − e_{t_r}) / |R|.
      KL row = Σ_i p_i (log p_i − lq_i) + p_tail (log p_tail − log(1 − Σ_i q_i)) over the k teacher tokens i,
      q_i = e^{lq_i}; ∂/∂lq_i = g_i = −p_i + p_tail q_i / (1 − Σ_j q_j),
      and ∂lq_i/∂z = (e_{id_i} − softmax(z/T)) / T,
      so ∂(T²·mean KL)/∂z_r = (T / n) (Σ_i g_i e_{id_i} − (Σ_i g_i) softmax(z_r/T)).
    (The chain rule through the log-softmax; tests/test_tune.py checks both against autograd of the plain ones.)
    """

    @staticmethod
    def forward(ctx, z, rows, tokens, logp, ids, temperature, want_ce, want_kl):
        zf = z.to(torch.promote_types(z.dtype, torch.float32))  # (n, V), float32 at least
        m1 = torch.logsumexp(zf, -1) if want_ce else None  # (n,)
        u = zf if temperature == 1.0 else zf / temperature
        mt = (m1 if temperature == 1.0 and want_ce else torch.logsumexp(u, -1)) if want_kl else None  # (n,)
        ce = kl = zf.new_zeros(())
        g = zf.new_empty(0)
        if want_ce:
            ce = (m1[rows] - zf[rows, tokens]).mean()
        if want_kl:
            lq_top = u.gather(1, ids) - mt[:, None]  # (n, k)
            p_top = logp.exp()
            kl_top = (p_top * (logp - lq_top)).sum(-1)  # (n,)
            # the tail bin: 1 − Σ p and 1 − Σ q; log(1 − e^x) = log(−expm1(x)) stays accurate near x = 0
            q_rest = -torch.expm1(torch.logsumexp(lq_top, -1))  # (n,)
            lp_tail = torch.log((-torch.expm1(torch.logsumexp(logp, -1))).clamp_min(1e-30))
            lq_tail = torch.log(q_rest.clamp_min(1e-30))
            p_tail = lp_tail.exp()
            live = (p_tail > 1e-20).to(zf.dtype)  # a tail below float32 resolution contributes nothing
            kl = (kl_top + live * p_tail * (lp_tail - lq_tail)).mean() * temperature ** 2
            tail_w = torch.where(q_rest > 1e-30, live * p_tail / q_rest.clamp_min(1e-30), torch.zeros_like(q_rest))
            g = -p_top + tail_w[:, None] * lq_top.exp()  # (n, k)
        ctx.save_for_backward(z, rows, tokens, ids, g)
        ctx.temperature, ctx.want = temperature, (want_ce, want_kl)
        return ce, kl

    @staticmethod
    def backward(ctx, g_ce, g_kl):
        z, rows, tokens, ids, g = ctx.saved_tensors
        want_ce, want_kl = ctx.want
        T, n = ctx.temperature, z.shape[0]
        zf = z.to(torch.promote_types(z.dtype, torch.float32))
        # row r: a coefficient times softmax(z_r / T) per temperature, plus a few sparse entries
        ce_coef = torch.zeros(n, dtype=zf.dtype)
        if want_ce:
            ce_coef[rows] = g_ce / rows.numel()
        if want_kl:
            kl_scale = g_kl * (T / n)
            kl_coef = -kl_scale * g.sum(-1)  # (n,)
            if T == 1.0:
                grad = torch.softmax(zf, -1).mul_((kl_coef + ce_coef)[:, None])
            else:
                grad = torch.softmax(zf / T, -1).mul_(kl_coef[:, None])
                if want_ce:
                    grad.add_(torch.softmax(zf, -1).mul_(ce_coef[:, None]))
            grad.scatter_add_(1, ids, (kl_scale * g).to(grad.dtype))
        else:
            grad = torch.softmax(zf, -1).mul_(ce_coef[:, None])
        if want_ce:
            grad.index_put_((rows, tokens), (-g_ce / rows.numel()).to(grad.dtype).expand(rows.numel()),
                            accumulate=True)
        return grad.to(z.dtype), None, None, None, None, None, None, None


def token_losses(logits: torch.Tensor, x: torch.Tensor, targets, temperature: float, want_ce: bool,
                 want_kl: bool) -> dict[str, torch.Tensor]:
    """{"ce": next_token_loss, "kl": distillation_loss}, those wanted, of logits (b, s, V), in one pass.

    The same values and gradients as the two functions (see `_TokenLosses`), in a fraction of the time.
    """
    b, s, vocab = logits.shape
    z = logits.reshape(-1, vocab)  # (b·s, V)
    pos = torch.arange(b * s).view(b, s)
    rows, tokens = pos[:, :-1].reshape(-1), x[:, 1:].reshape(-1)  # positions with a next token, and that token
    logp, ids = targets if want_kl else (z.new_zeros(0, 1), torch.zeros(0, 1, dtype=torch.long))
    ce, kl = _TokenLosses.apply(z, rows, tokens, logp, ids, float(temperature), want_ce, want_kl)
    return {**({"ce": ce} if want_ce else {}), **({"kl": kl} if want_kl else {})}


def lr_multiplier(step: int, steps: int, warmup: int, floor: float = LR_FLOOR) -> float:
    """Learning-rate factor for update `step` (0-based): linear warm-up, then cosine from 1 down towards `floor`.

    Example: steps=10, warmup=2 → 0.5, 1.0, 1.0, 0.96, ..., 0.14 (step 9).
    """
    if step < warmup:
        return (step + 1) / warmup
    progress = (step - warmup) / max(1, steps - warmup)  # in [0, 1): the last step stays above the floor
    return floor + (1 - floor) * 0.5 * (1 + math.cos(math.pi * progress))


def heldout_indices(n_blocks: int, fraction: float) -> torch.Tensor:
    """Indices of the held-out blocks: m = round(fraction · n) of them (at least one when fraction > 0 and
    n ≥ 2, at most n − 1), block ⌊(k + ½)·n/m⌋ for k = 0..m−1, evenly spaced and distinct.

    Example: n_blocks=10, fraction=0.2 → tensor([2, 7]); fraction=0 → no blocks.
    """
    if fraction <= 0 or n_blocks < 2:
        return torch.zeros(0, dtype=torch.long)
    m = min(n_blocks - 1, max(1, round(fraction * n_blocks)))
    return ((torch.arange(m, dtype=torch.float64) + 0.5) * n_blocks / m).floor().long()


def block_order(n_blocks: int, seed: int, start: int, count: int) -> torch.Tensor:
    """Block indices at positions start..start+count-1 of the stream of seeded permutations, one per epoch.

    Example: n_blocks=3, count=6 → every block twice, once in each of two different orders.
    """
    g = torch.Generator().manual_seed(seed)
    first, last = start // n_blocks, (start + count - 1) // n_blocks
    perms = [torch.randperm(n_blocks, generator=g) for _ in range(last + 1)]  # epochs 0..last, always from 0
    stream = torch.cat(perms[first:])
    off = start - first * n_blocks
    return stream[off:off + count]


# ------------------------------------------------------------------------------------- model bookkeeping

def _linear_params(name: str, lin) -> list[tuple[str, torch.nn.Parameter, bool]]:
    """(canonical name, parameter, stored transposed) of one projection's weight or factors."""
    if isinstance(lin, LowRankLinear):
        return [(name + ".a", lin.a, False), (name + ".b", lin.bt, True)]
    return [(name + ".weight", lin.weight, False)]


def factor_params(model: Transformer) -> list[tuple[str, torch.nn.Parameter, bool]]:
    """Every factor tensor: attention projections and factorised feed-forward matrices, with canonical names."""
    out = []
    for i, blk in enumerate(model.blocks):
        p = f"layers.{i}."
        for m in "qkvo":
            out += _linear_params(p + f"attn.{m}", getattr(blk.attn, m))
        for kind in model.shape.ff_kinds:
            lin = getattr(blk.ff, kind, None)
            if isinstance(lin, LowRankLinear):
                out += _linear_params(p + f"ff.{kind}", lin)
    return out


def dense_ff_params(model: Transformer) -> list[tuple[str, torch.nn.Parameter, bool]]:
    """The feed-forward matrices the plan left dense, with canonical names."""
    return [(f"layers.{i}.ff.{kind}.weight", lin.weight, False) for i, blk in enumerate(model.blocks)
            for kind in model.shape.ff_kinds if isinstance(lin := getattr(blk.ff, kind), Linear)]


def norm_params(model: Transformer) -> list[tuple[str, torch.nn.Parameter, bool]]:
    """Norm weights (and LayerNorm biases) with canonical names."""
    mods = [(f"layers.{i}.{n}", getattr(blk, n)) for i, blk in enumerate(model.blocks) for n in ("attn_norm", "ff_norm")]
    mods += [("final_norm", model.final_norm), ("embed.norm", model.embed_norm)]
    out = []
    for name, m in mods:
        if m is None:
            continue
        out.append((name + ".weight", m.weight, False))
        if isinstance(m, LayerNorm):
            out.append((name + ".bias", m.bias, False))
    return out


# --------------------------------------------------------------------------------------------- set-up

def _sha256_file(path: Path) -> str:
    from .compress import sha256_file
    return sha256_file(path)


def _identity(path: Path) -> dict:
    """A model's file names and checksums, as a manifest's `source.files` lists them."""
    from .io.read import open_source
    src = open_source(path)
    return {"path": Path(str(src.path)).name,
            "files": [{"name": f.name, "sha256": _sha256_file(f)} for f in src.files]}


def _same_files(ident: dict, manifest_source: dict) -> bool:
    """Do a model's files match the source files a manifest names (by name and checksum)?"""
    want = sorted((f["name"], f["sha256"]) for f in manifest_source.get("files", []))
    return bool(want) and want == sorted((f["name"], f["sha256"]) for f in ident["files"])


def find_teacher(teacher: str | None, src: Path, manifest: dict) -> tuple[Path | None, dict | None]:
    """The teacher's path and identity: `teacher` as given, nothing for "none", or the manifest's source model.

    The source is looked for at the manifest's `source.abs_path`, among the built-in models with the same
    file name, and beside the compressed directory; a candidate counts only when its checksums match.

    Raises:
        CompressError: an explicit path that does not exist, or no candidate matches the manifest.
    """
    if teacher == "none":
        return None, None
    msrc = manifest.get("source", {})
    if teacher is not None:
        path = resolve(teacher)
        if not path.exists():
            raise CompressError(f"--teacher {teacher}: no such file or directory; give the source model or 'none'")
        ident = _identity(path)
        return path, {**ident, "matches_source": _same_files(ident, msrc)}
    name = msrc.get("path", "")
    cands = []
    if msrc.get("abs_path"):
        cands.append(Path(msrc["abs_path"]))
    for key, (_, _, rel) in BUILTIN.items():
        if name and Path(rel).name == name:
            cands.append(f"builtin:{key}")
    if name:
        cands.append(src.parent / name)
    for c in cands:
        try:
            path = resolve(str(c)) if isinstance(c, str) else c
        except CompressError:
            continue
        if path.exists():
            ident = _identity(path)
            if _same_files(ident, msrc):
                return path, {**ident, "matches_source": True}
    raise CompressError(f"{src}: cannot find the source model {name or '(unnamed)'} its manifest names (with matching "
                        f"checksums); pass --teacher PATH, or --teacher none to train on the next-token loss alone")


def _check_options(steps, batch, context, lr, decay, decay_coef, penalty_every, temperature, mix, topk, save_every,
                   eval_tokens, world, embed_loss="cos", hidden_weight=0.0) -> None:
    """One-line errors for option values that cannot work."""
    if embed_loss not in EMBED_LOSSES:
        raise CompressError(f"--embed-loss: unknown value {embed_loss!r}; expected one of {', '.join(EMBED_LOSSES)}")
    if not (isinstance(hidden_weight, (int, float)) and math.isfinite(hidden_weight) and hidden_weight >= 0):
        raise CompressError(f"--hidden-weight: must be a number ≥ 0, got {hidden_weight!r}")
    def positive_int(name, v):
        if isinstance(v, bool) or not isinstance(v, int) or v <= 0:
            raise CompressError(f"--{name}: must be a positive whole number, got {v!r}")
    for name, v in (("steps", steps), ("batch", batch), ("penalty-every", penalty_every), ("topk", topk)):
        positive_int(name, v)
    if isinstance(context, bool) or not isinstance(context, int) or context < 2:
        raise CompressError(f"--context: must be at least 2 tokens, got {context!r}")
    if not (isinstance(lr, (int, float)) and math.isfinite(lr) and lr > 0):
        raise CompressError(f"--lr: must be a positive number, got {lr!r}")
    if decay not in DECAYS:
        raise CompressError(f"--decay: unknown value {decay!r}; expected one of {', '.join(DECAYS)}")
    if not (isinstance(decay_coef, (int, float)) and math.isfinite(decay_coef) and decay_coef >= 0):
        raise CompressError(f"--decay-coef: must be a number ≥ 0, got {decay_coef!r}")
    if not (isinstance(temperature, (int, float)) and math.isfinite(temperature) and temperature > 0):
        raise CompressError(f"--temperature: must be a positive number, got {temperature!r}")
    if not (isinstance(mix, (int, float)) and 0 <= mix <= 1):
        raise CompressError(f"--mix: must be between 0 and 1 (the weight of the next-token loss), got {mix!r}")
    if isinstance(save_every, bool) or not isinstance(save_every, int) or save_every < 0:
        raise CompressError(f"--save-every: must be a whole number of steps ≥ 0 (0: no checkpoints), got {save_every!r}")
    if eval_tokens is not None:
        positive_int("eval-tokens", eval_tokens)
    if batch % world:
        raise CompressError(f"--batch {batch} does not split over {world} processes; give a multiple of {world}")


def _check_heldout(heldout, eval_every, patience) -> None:
    """One-line errors for the held-out options."""
    if not (isinstance(heldout, (int, float)) and 0 <= heldout < 1):
        raise CompressError(f"--heldout: must be a fraction in [0, 1) of the training blocks, got {heldout!r}")
    for name, v in (("eval-every", eval_every), ("patience", patience)):
        if isinstance(v, bool) or not isinstance(v, int) or v <= 0:
            raise CompressError(f"--{name}: must be a positive whole number, got {v!r}")


def repeats(owner: torch.Tensor, n_texts: int, seed: int, steps: int, batch: int) -> list[float]:
    """How many times, on average, each text's training blocks are visited in `steps` steps of `batch` blocks.

    Example: 4 blocks of text 0 and 4 of text 1, 2 steps of 8 → [2.0, 2.0].
    """
    seen = torch.bincount(block_order(len(owner), seed, 0, steps * batch), minlength=len(owner)).double()  # (n,)
    return [float(seen[owner == i].mean()) if (owner == i).any() else 0.0 for i in range(n_texts)]


def _warn_repeats(run: "_Run", job: _Job, s: TuneSettings) -> None:
    """Record each text's repeats in the data description; warn when the run reads more than the text holds.

    Decoders only: an encoder's sentences carry no per-text owner.
    """
    if job.mask is not None:
        return
    reps = repeats(job.owner, len(job.data["files"]), s.seed, s.steps, s.batch)
    for desc, r in zip(job.data["files"], reps):
        desc["repeats"] = round(r, 3)
    if s.steps * s.batch * s.context > job.data["tokens"] and run.rank == 0:
        note = (f"warning: {s.steps} steps × {s.batch} blocks × {s.context} tokens read {s.steps * s.batch * s.context:,} "
                f"tokens from {job.data['tokens']:,} training tokens; the texts are repeated "
                + ", ".join(f"{d['name']} {r:.1f}×" for d, r in zip(job.data["files"], reps))
                + " (the held-out loss picks the step written; more or more varied text helps)")
        run.warnings.append(note)
        if not run.quiet:
            sys.stderr.write(note + "\n")


def _heldout_report(run: "_Run") -> dict | None:
    """The held-out curve, the step written and where the run stopped (None without a held-out slice)."""
    if run.best is None:
        return None
    return {"blocks": len(run.job.held), "curve": run.heldout, "best_step": run.best["step"],
            "best_loss": run.best["loss"], "stopped_early_at": run.stopped}


def _init_distributed() -> tuple[int, int, bool]:
    """(rank, world size, whether we created the process group) from torchrun's environment."""
    world = int(os.environ.get("WORLD_SIZE", "1"))
    if world <= 1:
        return 0, 1, False
    import torch.distributed as dist
    if dist.is_initialized():
        return dist.get_rank(), dist.get_world_size(), False
    dist.init_process_group("gloo")
    return dist.get_rank(), dist.get_world_size(), True


def _barrier(world: int) -> None:
    if world > 1:
        import torch.distributed as dist
        dist.barrier()


def _mean_over_ranks(values: list[float], world: int) -> list[float]:
    """Average a few floats over the processes (identity on one process)."""
    if world == 1:
        return values
    import torch.distributed as dist
    t = torch.tensor(values, dtype=torch.float64)
    dist.all_reduce(t)
    return (t / world).tolist()


def _eval_sets(loaded, eval_texts, eval_tokens, context) -> list[tuple[str, dict, list[int]]]:
    """(file name, description, token ids) per held-out file, each checked to hold at least one window."""
    out = []
    for path in eval_texts or []:
        text, (desc,) = read_texts([path])
        ids = tokens(loaded, text)
        if eval_tokens:
            ids = ids[:eval_tokens]
        if len(ids) < 2:
            raise CompressError(f"{path}: {len(ids)} tokens is too short to measure perplexity; give more text")
        out.append((str(path), desc, ids))
    return out


def _perplexities(model, sets, context) -> dict[str, dict]:
    return {desc["name"]: {"perplexity": r["perplexity"], "tokens": r["tokens"]}
            for _, desc, ids in sets for r in [evaluate.perplexity(model, ids, context=context)]}


def _agreements(model, teacher, sets) -> dict[str, dict]:
    """Per held-out file of sentences: the student's embeddings against the teacher's (`evaluate.embedding_agreement`)."""
    out = {}
    for _, desc, (ids, mask) in sets:
        r = evaluate.embedding_agreement(evaluate.pooled_embeddings(teacher, ids, mask),
                                         evaluate.pooled_embeddings(model, ids, mask))
        out[desc["name"]] = {"cosine": r["cosine"], "neighbour_agreement": r["neighbour_agreement"],
                             "spearman": r["spearman"], "sentences": ids.shape[0]}
    return out


def _held_out(job: "_Job", teacher, context: int) -> dict[str, dict]:
    """The held-out figures of the model now: perplexity of a decoder, embedding agreement of an encoder."""
    return _perplexities(job.model, job.sets, context) if job.mask is None else _agreements(job.model, teacher, job.sets)


def checkpoint_path(out: str | Path) -> Path:
    """Where the tune writing `out` keeps its checkpoint: a hidden sibling file."""
    out = Path(out)
    return out.parent / f".{out.name}.tune-checkpoint.pt"


def _save_checkpoint(path: Path, state: dict) -> None:
    """torch.save to a temporary sibling, then one rename: the file on disk is always a complete checkpoint."""
    tmp = path.with_name(f"{path.name}.partial-{os.getpid()}")
    try:
        torch.save(state, tmp)
        os.replace(tmp, path)
    except OSError as e:
        raise CompressError(f"{path}: writing the checkpoint failed ({e.strerror or e})") from None
    finally:
        tmp.unlink(missing_ok=True)


def _load_checkpoint(path: Path, fingerprint: dict) -> dict:
    """A checkpoint written by the same settings, data, model and teacher.

    Raises:
        CompressError: missing, unreadable, or written by a different run.
    """
    if not path.is_file():
        raise CompressError(f"{path}: no checkpoint to resume from; run without --resume to start")
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as e:  # a truncated or foreign file: pickle, zip and runtime errors alike
        raise CompressError(f"{path}: not a readable tune checkpoint ({e.__class__.__name__}); "
                            "delete it to start over") from None
    if not isinstance(state, dict) or state.get("format") != CHECKPOINT_FORMAT:
        raise CompressError(f"{path}: not a tune checkpoint of format {CHECKPOINT_FORMAT}; delete it to start over")
    old = state.get("fingerprint", {})
    diff = sorted(k for k in set(old) | set(fingerprint) if old.get(k) != fingerprint.get(k))
    if diff:
        raise CompressError(f"{path}: written by a run with other {', '.join(diff)}; use the same options to resume, "
                            "or pass --force without --resume to start over")
    return state


# --------------------------------------------------------------------------------- losses and penalties
#
# A loss term maps (logits (b, s, V), tokens x (b, s), teacher targets or None, temperature) to a scalar; a
# decay says whether AdamW decays the factors and which penalty, if any, joins the loss. A new loss or decay
# is one function and one entry here; `--decay` reads its choices from DECAYS.

def next_token_loss(logits: torch.Tensor, x: torch.Tensor, targets, temperature: float) -> torch.Tensor:
    """Cross-entropy of the s − 1 next tokens of each block (`targets`, `temperature` unused)."""
    vocab = logits.shape[-1]
    return F.cross_entropy(logits[:, :-1].reshape(-1, vocab).float(), x[:, 1:].reshape(-1))


def distillation_loss(logits: torch.Tensor, x: torch.Tensor, targets, temperature: float) -> torch.Tensor:
    """T²·KL(teacher ‖ student) over all s positions; targets = (logp, ids), each (b·s, k)."""
    logp, ids = targets
    return distill_kl(logits.reshape(-1, logits.shape[-1]), logp, ids, temperature)


@dataclass(frozen=True)
class SentenceTargets:
    """What an encoder's student is pulled towards on a batch of sentences."""
    mask: torch.Tensor  # (b, s) 1 at real tokens
    unit: torch.Tensor  # (b, d) the teacher's normalised mean-pooled embeddings
    hidden: torch.Tensor | None  # (b, s, d) the teacher's last hidden states (zero at padding), or None


def _student_unit(hidden: torch.Tensor, targets: SentenceTargets) -> torch.Tensor:
    """The student's normalised mean-pooled embeddings (b, d) from its last hidden states (b, s, d)."""
    return F.normalize(evaluate.mean_pool(hidden.float(), targets.mask), dim=-1)


def embedding_cosine_loss(hidden: torch.Tensor, x, targets: SentenceTargets, temperature: float) -> torch.Tensor:
    """Mean over sentences of 1 − cos(student embedding, teacher embedding) (`x`, `temperature` unused)."""
    return (1 - (_student_unit(hidden, targets) * targets.unit).sum(-1)).mean()


def embedding_mse_loss(hidden: torch.Tensor, x, targets: SentenceTargets, temperature: float) -> torch.Tensor:
    """Mean squared error of the normalised student embedding against the teacher's, over sentences and width."""
    return F.mse_loss(_student_unit(hidden, targets), targets.unit)


def hidden_state_loss(hidden: torch.Tensor, x, targets: SentenceTargets, temperature: float) -> torch.Tensor:
    """Σ ‖h − h_T‖² / Σ ‖h_T‖² over the real tokens' last hidden states (b, s, d): scale-free."""
    m = targets.mask.bool()
    h, t = hidden.float()[m], targets.hidden[m]  # (n_real, d) each
    return (h - t).pow(2).sum() / t.pow(2).sum().clamp_min(1e-30)


@dataclass(frozen=True)
class LossTerm:
    fn: Callable[[torch.Tensor, torch.Tensor, object, float], torch.Tensor]
    needs_teacher: bool


LOSSES: dict[str, LossTerm] = {"ce": LossTerm(next_token_loss, False), "kl": LossTerm(distillation_loss, True),
                               "cos": LossTerm(embedding_cosine_loss, True), "mse": LossTerm(embedding_mse_loss, True),
                               "hidden": LossTerm(hidden_state_loss, True)}
EMBED_LOSSES = ("cos", "mse")  # the encoder's embedding loss, `--embed-loss`
DEFAULT_EMBED_LOSS = "cos"
DEFAULT_SENTENCE_BATCH = 32  # sentences per step of an encoder tune (a decoder's default is 4 blocks)
# A decoder's peak learning rate: measured on the README demo's model (SmolLM2 keep 0.7, canal text + samples,
# 60 steps, perplexity ratio on 2048 held-out pydoc / license tokens; 3.30× / 5.67× before the tune):
# 1e-4 → 2.72× / 3.88×, 3e-4 → 2.85× / 4.00× (both held-out losses 2.738 → 2.552, still falling at step 60).
# (benchmarks/scans/demo_tune_scan.py, figures in benchmarks/results/scans.md)
# With the demo's blend of canal text + samples + pydoc (4096 tokens of each text; 1.76× / 3.58× before the
# tune), 60 steps: 1e-4 → 1.294× / 2.644×, 2e-4 → 1.243× / 2.555× (held-out loss 2.358 → 2.122 and → 2.110)
# (`benchmarks/run_demo.py --name demo-blend-lr2e-4 --lr 2e-4`, benchmarks/results/demo-blend-lr2e-4.json).
DEFAULT_LR = 2e-4
# An encoder's, and the weight of its hidden-state term: measured on the built-in MiniLM at keep 0.7, 150
# steps, mean cosine on held-out pydoc paragraphs 0.907 before: lr 1e-3 alone 0.930, lr 1e-3 + hidden 1
# 0.944, lr 3e-4 + hidden 1 0.950 (lr 1e-3 first raised the held-out loss for 20 steps; 3e-4 did not).
# (benchmarks/scans/encoder_tune_scan.py, figures in benchmarks/results/scans.md)
DEFAULT_SENTENCE_LR = 3e-4
DEFAULT_HIDDEN_WEIGHT = 1.0
# Sub-batches of similar length a batch of sentences runs as (`_Run._sentence_loss`), and how each loss term's
# chunk values add up to the whole batch's: by the chunk's share of the sentences (a mean over sentences), or
# by its share of the teacher's hidden-state energy (the denominator of `hidden_state_loss`).
SENTENCE_CHUNKS = 4
SENTENCE_SHARE = {"cos": "sentences", "mse": "sentences", "hidden": "energy"}


def loss_weights(mix: float, teacher: bool) -> dict[str, float]:
    """Weight of each loss term: mix·CE + (1 − mix)·KL with a teacher, CE alone without."""
    return {"ce": mix, "kl": 1 - mix} if teacher else {"ce": 1.0}


def sentence_loss_weights(embed_loss: str, hidden_weight: float) -> dict[str, float]:
    """Weight of each loss term of an encoder: the embedding loss, and the hidden states' when weighted."""
    return {embed_loss: 1.0, **({"hidden": hidden_weight} if hidden_weight > 0 else {})}


def step_loss(logits, x, targets, weights: dict[str, float], temperature: float):
    """(Σ weight·term, {name: term}) over the weighted loss terms, in LOSSES order."""
    fused = token_losses(logits, x, targets, temperature, "ce" in weights, "kl" in weights) if (
        "ce" in weights or "kl" in weights) else {}
    terms = {n: fused[n] if n in fused else LOSSES[n].fn(logits, x, targets, temperature)
             for n in LOSSES if n in weights}
    it = iter(terms.items())
    name, term = next(it)
    loss = weights[name] * term
    for name, term in it:
        loss = loss + weights[name] * term
    return loss, terms


@dataclass(frozen=True)
class Decay:
    label: str  # for messages
    weight_decay: bool  # AdamW's decoupled weight decay λ on the factor tensors
    penalty: Callable[..., torch.Tensor] | None = None  # (model, dense=...) → Σ term, weighted λ in the loss


DECAYS: dict[str, Decay] = {"frobenius": Decay("Frobenius", False, frobenius_penalty),
                            "factor": Decay("factor", True), "none": Decay("no", False)}
DEFAULT_DECAY = "frobenius"  # the tune, `run` and the API alike
# λ of the default decay: ‖A Bᵀ‖² sums to about 2e7 on SmolLM2-135M, so 1e-8 makes the penalty about 0.2 nats
DEFAULT_DECAY_COEF = 1e-8


# --------------------------------------------------------------------------------------- opening the job

@dataclass
class _Job:
    """A tune's inputs, checked: the compressed model, its manifest, the training blocks and held-out sets."""
    src: Path
    out: Path
    ckpt: Path
    manifest: dict
    loaded: object  # loading.Loaded
    blocks: torch.Tensor  # (n, s) training blocks, or an encoder's padded sentences
    owner: torch.Tensor  # (n,) which text each training block comes from
    held: torch.Tensor  # (m, s) held-out blocks (an encoder's sentences) of the same texts, never trained on
    data: dict  # the manifest's description of the training data
    sets: list  # (file name, description, token ids or (ids, mask) of sentences) per held-out file
    force: bool  # replace an existing output
    mask: torch.Tensor | None = None  # (n, s) an encoder's attention mask; None for a decoder's blocks
    held_mask: torch.Tensor | None = None  # (m, s) the same for the held-out sentences

    @property
    def model(self) -> Transformer:
        return self.loaded.model

    @property
    def tokens_per_item(self) -> float:
        """Tokens in one block, or in one sentence on average (the real ones)."""
        return self.data["tokens"] / self.blocks.shape[0]


def _open_job(src_dir, texts, out, *, context, heldout, eval_texts, eval_tokens, resume, force) -> _Job:
    """Check the paths, load the model and cut the text into blocks (errors in the order a user meets them)."""
    src = Path(src_dir)
    if not src.exists():
        raise CompressError(f"{src}: no such directory; expected a directory written by `attncompress compress`")
    if not is_compressed(src):
        raise CompressError(f"{src}: not a compressed model (no attncompress.json); compress the model first with "
                            "`attncompress compress`, then tune its output")
    out = Path(out)
    if out.resolve() == src.resolve():
        raise CompressError(f"--out {out}: is the model being tuned; choose another directory")
    check_output(out, force)
    ckpt = checkpoint_path(out)
    if ckpt.exists() and not resume and not force:
        raise CompressError(f"{ckpt}: a checkpoint of an earlier run exists; pass --resume to continue it or "
                            "--force to start over")
    if not texts:
        raise CompressError("no training text; give at least one --text FILE")
    manifest = read_manifest(src)
    loaded = load_model(src, balanced=True)  # Adam's steps need factors of like scale (factorize.balance_layer)
    max_pos = loaded.shape.max_positions
    if max_pos and context > max_pos:
        raise CompressError(f"--context {context}: longer than the model's {max_pos} positions; give at most {max_pos}")
    if not loaded.model.is_decoder:
        ids, mask, described = evaluate.sentence_batch(loaded, texts, context)  # (n, s) each
        sets = [(str(p), d, evaluate.sentence_batch(loaded, [p], context)[:2])
                for p, d in zip(eval_texts or [], read_texts(eval_texts)[1] if eval_texts else [])]
        keep = torch.ones(len(ids), dtype=torch.bool)
        keep[heldout_indices(len(ids), heldout)] = False
        data = {"files": described, "context": context, "sentences": int(keep.sum()),
                "heldout_sentences": int((~keep).sum()), "tokens": int(mask[keep].sum()),
                "tokens_sha256": hashlib.sha256(ids.numpy().tobytes() + mask.numpy().tobytes()).hexdigest()}
        owner = torch.zeros(int(keep.sum()), dtype=torch.long)
        return _Job(src, out, ckpt, manifest, loaded, ids[keep], owner, ids[~keep], data, sets, force, mask[keep],
                    mask[~keep])
    parts, described = [], []
    for path in texts:
        text, (desc,) = read_texts([path])
        parts.append(token_blocks(tokens(loaded, text), context, source=str(path)))  # (n_i, s)
        described.append(desc)
    blocks = torch.cat(parts)  # (n, s)
    owner = torch.cat([torch.full((len(b),), i) for i, b in enumerate(parts)])  # (n,)
    keep = torch.ones(len(blocks), dtype=torch.bool)
    keep[heldout_indices(len(blocks), heldout)] = False
    for desc, i in zip(described, range(len(parts))):
        desc.update(blocks=int((owner[keep] == i).sum()), heldout_blocks=int((owner[~keep] == i).sum()))
    sets = _eval_sets(loaded, eval_texts, eval_tokens, context)
    data = {"files": described, "context": context, "blocks": int(keep.sum()), "heldout_blocks": int((~keep).sum()),
            "tokens": int(blocks[keep].numel()), "tokens_sha256": hashlib.sha256(blocks.numpy().tobytes()).hexdigest()}
    return _Job(src, out, ckpt, manifest, loaded, blocks[keep], owner[keep], blocks[~keep], data, sets, force)


def _load_teacher(teacher: str | None, job: _Job, mix: float) -> tuple[Transformer | None, dict | None]:
    """The frozen teacher runtime and its identity, or (None, None) without distillation (a decoder's mix = 1)."""
    decoder = job.model.is_decoder
    if mix >= 1 and decoder:
        return None, None
    path, ident = find_teacher(teacher, job.src, job.manifest)
    if path is None:
        if not decoder:
            raise CompressError("--teacher none: an encoder is tuned towards its teacher's embeddings; give the "
                                "source model (or leave --teacher out to use the manifest's)")
        return None, ident
    tl = load_model(path)
    sh = job.loaded.shape
    if tl.model.is_decoder != decoder or tl.shape.vocab_size != sh.vocab_size or tl.shape.d_model != sh.d_model:
        kind = "a decoder" if decoder else "an encoder"
        raise CompressError(f"--teacher {path}: {kind} with {sh.vocab_size} tokens and width {sh.d_model} is expected, "
                            f"got a {tl.shape.family} model with {tl.shape.vocab_size} and {tl.shape.d_model}")
    tl.model.requires_grad_(False)
    return tl.model, ident


class TeacherCache:
    """Top-k teacher targets per block, each computed alone (batch 1, so the bits never depend on the batch).

    They are kept after the first use when the blocks a run touches fit in `CACHE_BYTES`, else recomputed.
    """

    def __init__(self, model: Transformer, blocks: torch.Tensor, topk: int, temperature: float, touched: int,
                 compute: str = "float32"):
        self.model, self.blocks, self.topk, self.temperature = model, blocks, topk, temperature
        self.compute = compute
        nbytes = touched * blocks.shape[1] * min(topk, model.shape.vocab_size) * 12  # float32 + int64
        self._kept: dict[int, tuple[torch.Tensor, torch.Tensor]] | None = {} if nbytes <= CACHE_BYTES else None

    @property
    def description(self) -> str:
        """How the manifest names the cache: "top-k" or "off"."""
        return f"top-{self.topk}" if self._kept is not None else "off"

    def block(self, j: int) -> tuple[torch.Tensor, torch.Tensor]:
        """(logp, ids) of block j, each (s, k)."""
        if self._kept is not None and j in self._kept:
            return self._kept[j]
        with torch.no_grad(), products_in(self.compute):
            logits = self.model(self.blocks[j:j + 1])[0]  # (s, V)
        tgt = teacher_targets(logits, self.topk, self.temperature)  # (s, k) each, float32
        if self._kept is not None:
            self._kept[j] = tgt
        return tgt

    def batch(self, idx: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """(logp, ids) of the blocks idx, each (b·s, k)."""
        tg = [self.block(int(j)) for j in idx]
        logp = torch.stack([t[0] for t in tg]).reshape(-1, tg[0][0].shape[-1])  # (b·s, k)
        ids = torch.stack([t[1] for t in tg]).reshape(-1, tg[0][1].shape[-1])  # (b·s, k)
        return logp, ids


class SentenceTeacher:
    """An encoder teacher's targets per sentence, each computed once, alone and unpadded (so bits never depend
    on the batch), and kept: (d,) normalised pooled embeddings, and (s, d) hidden states when they are trained on."""

    def __init__(self, model: Transformer, ids: torch.Tensor, mask: torch.Tensor, hidden: bool,
                 compute: str = "float32"):
        self.model, self.ids, self.mask, self.hidden, self.compute = model, ids, mask, hidden, compute
        self._kept: dict[int, tuple[torch.Tensor, torch.Tensor | None]] = {}
        self.description = "kept" + (" with hidden states" if hidden else "")

    def sentence(self, j: int) -> tuple[torch.Tensor, torch.Tensor | None]:
        """(unit (d,), hidden (n_j, d) or None) of sentence j."""
        if j not in self._kept:
            n = int(self.mask[j].sum())
            with torch.no_grad(), products_in(self.compute):
                h = self.model(self.ids[j:j + 1, :n])[0]
            h = h.float()  # (n, d): one sentence, no padding
            self._kept[j] = (F.normalize(h.mean(0), dim=-1), h if self.hidden else None)
        return self._kept[j]

    def batch(self, idx: torch.Tensor, s: int) -> SentenceTargets:
        """Targets of the sentences idx, the mask and hidden states cut to s positions."""
        got = [self.sentence(int(j)) for j in idx]
        hidden = None
        if self.hidden:
            hidden = torch.zeros(len(got), s, got[0][1].shape[-1])  # (b, s, d), zero at padding
            for i, (_, h) in enumerate(got):
                hidden[i, :h.shape[0]] = h
        return SentenceTargets(self.mask[idx, :s], torch.stack([u for u, _ in got]), hidden)


def _optimizer(model: Transformer, s: TuneSettings) -> tuple[torch.optim.AdamW, list]:
    """AdamW over what trains (see the module docstring), and the trained (name, parameter, transposed) list."""
    model.requires_grad_(False)
    factors = factor_params(model) + (dense_ff_params(model) if s.train_dense else [])
    norms = norm_params(model) if s.train_norms else []
    trained = factors + norms
    for _, p, _ in trained:
        p.requires_grad_(True)
    groups = [{"params": [p for _, p, _ in factors],
               "weight_decay": s.decay_coef if DECAYS[s.decay].weight_decay else 0.0}]
    if norms:
        groups.append({"params": [p for _, p, _ in norms], "weight_decay": 0.0})
    return torch.optim.AdamW(groups, lr=s.lr), trained  # the learning rate is set before every step


# ------------------------------------------------------------------------------------ product precision
# `compute`: the precision of the matrix products in the forward passes of the student and the teacher.
# "bfloat16" runs them under torch's autocast (the weights, the optimiser and every loss stay float32; the
# logits and hidden states are widened before any loss), where the CPU multiplies bfloat16 natively
# (AVX512-BF16 or AMX): measured on this project's 2-core machine, a 512×576×1536 product takes 1.2 ms
# against 5.3 in float32, and a tuning step of SmolLM2 at 4 × 128 tokens about half the time. Elsewhere
# bfloat16 is emulated and slower, so "auto" chooses float32.
COMPUTES = ("auto", "float32", "bfloat16")
DEFAULT_COMPUTE = "auto"
_BF16_FLAGS = ("avx512_bf16", "amx_bf16")


def native_bfloat16(cpuinfo: str | None = None) -> bool:
    """True when the CPU flags (Linux /proc/cpuinfo, or the given text) include a native bfloat16 product."""
    if cpuinfo is None:
        try:
            cpuinfo = Path("/proc/cpuinfo").read_text(encoding="utf-8", errors="replace")
        except OSError:
            return False
    flags = set()
    for line in cpuinfo.splitlines():
        if line.startswith("flags"):
            flags.update(line.split(":", 1)[-1].split())
    return any(f in flags for f in _BF16_FLAGS)


def resolve_compute(choice: str) -> str:
    """"auto" → "bfloat16" with native bfloat16 products, else "float32"; the others as given."""
    if choice not in COMPUTES:
        raise CompressError(f"--compute: unknown value {choice!r}; expected one of {', '.join(COMPUTES)}")
    if choice == "auto":
        return "bfloat16" if native_bfloat16() else "float32"
    return choice


def products_in(compute: str):
    """The context a forward pass runs in for `compute`: bfloat16 autocast, or none."""
    if compute == "bfloat16":
        return torch.autocast("cpu", dtype=torch.bfloat16)
    return contextlib.nullcontext()


# --------------------------------------------------------------------------------------------- the loop

@dataclass
class _Run:
    """One tune in progress on one process: what it trains, from which data, and where it checkpoints."""
    job: _Job
    settings: TuneSettings
    opt: torch.optim.AdamW
    trained: list
    teacher: TeacherCache | None
    held_teacher: TeacherCache | SentenceTeacher | None  # targets of the held-out blocks or sentences
    fingerprint: dict
    rank: int
    world: int
    save_every: int
    quiet: bool

    def __post_init__(self):
        self.net = self.job.model
        if self.world > 1:
            from torch.nn.parallel import DistributedDataParallel
            self.net = DistributedDataParallel(self.job.model)
        s = self.settings
        self.weights = (loss_weights(s.mix, self.teacher is not None) if self.job.mask is None
                        else sentence_loss_weights(s.embed_loss, s.hidden_weight))
        self.curve: list[dict] = []
        self.warnings: list[str] = []
        self.pen_value: float | None = None
        self.heldout: list[dict] = []  # {"step", "loss"} per held-out evaluation
        self.best: dict | None = None  # {"step", "loss", "params"} of the lowest held-out loss so far
        self.stale = 0  # held-out evaluations in a row whose loss rose
        self.stopped: int | None = None  # the step an early stop came at
        self.last = 0  # steps done

    def resume(self) -> tuple[int, dict | None]:
        """Load the checkpoint into the parameters, optimiser, RNG and curve; (its step, its eval_before)."""
        state = _load_checkpoint(self.job.ckpt, self.fingerprint)
        named = {n: p for n, p, _ in self.trained}
        with torch.no_grad():
            for n, t in state["params"].items():
                named[n].copy_(t)
        self.opt.load_state_dict(state["optimizer"])
        torch.set_rng_state(state["rng"])
        self.curve = state["curve"]
        self.pen_value = self.curve[-1]["penalty"] if self.curve else None
        self.heldout, self.best, self.stale = state["heldout"], state["best"], state["stale"]
        return state["step"], state["eval_before"]

    def _penalty(self, step: int, loss: torch.Tensor) -> torch.Tensor | None:
        """λ times the decay's penalty on the steps it is evaluated (lazily, every penalty_every steps)."""
        s = self.settings
        decay = DECAYS[s.decay]
        if decay.penalty is None or s.decay_coef <= 0 or step % s.penalty_every:
            return None
        pen = s.decay_coef * decay.penalty(self.job.model, dense=s.train_dense)
        self.pen_value = float(pen.detach())
        if step == 0 and self.pen_value > float(loss.detach()) and self.rank == 0:
            note = (f"warning: the {decay.label} penalty {self.pen_value:.4g} exceeds the loss "
                    f"{float(loss.detach()):.4g} at the start; λ = {s.decay_coef:g} will mostly shrink "
                    f"the factors (λ ≈ {0.05 * float(loss.detach()) * s.decay_coef / self.pen_value:.2g} "
                    "would make it 5% of the loss)")
            self.warnings.append(note)
            if not self.quiet:
                sys.stderr.write(note + "\n")
        return pen

    def step(self, step: int) -> dict:
        """One optimiser update on this process's slice of the step's global batch; returns its curve entry."""
        s, local = self.settings, self.settings.batch // self.world
        idx = block_order(self.job.blocks.shape[0], s.seed, step * s.batch, s.batch)[
            self.rank * local:(self.rank + 1) * local]
        x = self.job.blocks[idx]  # (b, s)
        lr = s.lr * lr_multiplier(step, s.steps, s.warmup)
        for g in self.opt.param_groups:
            g["lr"] = lr
        self.opt.zero_grad(set_to_none=True)
        loss, terms = self._loss(self.net, x, idx, self.teacher, self.job.mask)
        pen = self._penalty(step, loss)
        total = loss if pen is None else loss + s.penalty_every * pen  # lazy: the weight of the skipped steps
        total.backward()
        self.opt.step()
        vals = _mean_over_ranks([float(loss.detach())] + [float(terms[n].detach()) if n in terms else 0.0
                                                          for n in LOSSES], self.world)
        return {"step": step + 1, "loss": vals[0],
                **{n: v if n in terms else None for n, v in zip(LOSSES, vals[1:])},
                "penalty": self.pen_value, "lr": lr}

    def _checkpoint(self, step: int, eval_before) -> None:
        if self.rank == 0:
            _save_checkpoint(self.job.ckpt, {
                "format": CHECKPOINT_FORMAT, "fingerprint": self.fingerprint, "step": step,
                "params": {n: p.detach().clone() for n, p, _ in self.trained},
                "optimizer": self.opt.state_dict(), "rng": torch.get_rng_state(), "curve": self.curve,
                "eval_before": eval_before, "heldout": self.heldout, "best": self.best, "stale": self.stale})
        _barrier(self.world)

    def _loss(self, net, x: torch.Tensor, idx: torch.Tensor, teacher, mask: torch.Tensor | None):
        """(loss, terms) of rows x (b, s) = items idx of a set whose teacher targets and mask (None: blocks) are given."""
        if mask is None:
            with products_in(self.settings.compute):
                logits = net(x)  # (b, s, V), widened by the loss
            targets = teacher.batch(idx) if teacher is not None else None
        else:
            return self._sentence_loss(net, x, idx, teacher, mask)
        return step_loss(logits, x, targets, self.weights, self.settings.temperature)

    def _sentence_loss(self, net, x: torch.Tensor, idx: torch.Tensor, teacher, mask: torch.Tensor):
        """(loss, terms) of a batch of sentences, run as up to SENTENCE_CHUNKS sub-batches of similar length.

        Sorted by length, each chunk is cut to its own longest sentence, so far less of the work is padding
        (a batch of 32 of the built-in encoder's tuning sentences is 37% real tokens when padded as one, 75% in 4
        chunks). Padded keys are masked, so a sentence's hidden states do not depend on its chunk, and the
        chunks' terms are summed with the weights that make them the whole batch's: the embedding losses
        (means over sentences) by each chunk's share of the sentences, the hidden-state term
        (Σ‖h − h_T‖² / Σ‖h_T‖²) by its share of Σ‖h_T‖². One chunk under torchrun (DistributedDataParallel allows one forward per backward).
        """
        lengths = mask[idx].sum(1)  # (b,) real tokens of each sentence
        order = lengths.argsort(descending=True, stable=True)
        chunks = 1 if self.world > 1 else min(SENTENCE_CHUNKS, len(idx))
        parts = order.split(math.ceil(len(idx) / chunks))
        got = []
        for part in parts:
            n = int(lengths[part].max())
            targets = teacher.batch(idx[part], n)
            xs = x[part, :n]  # (b_c, n)
            with products_in(self.settings.compute):
                hidden = net(xs, attention_mask=targets.mask)
            hidden = hidden.float()  # (b_c, n, d) last hidden states
            _, chunk_terms = step_loss(hidden, xs, targets, self.weights, self.settings.temperature)
            got.append((len(part), targets, chunk_terms))
        energy = [float(t.hidden[t.mask.bool()].pow(2).sum()) if t.hidden is not None else 0.0 for _, t, _ in got]
        share = {"sentences": [b / len(idx) for b, _, _ in got],
                 "energy": [e / max(sum(energy), 1e-30) for e in energy]}
        terms = {name: sum(w * tm[name] for w, (_, _, tm) in zip(share[SENTENCE_SHARE[name]], got))
                 for name in got[0][2]}
        loss = sum(self.weights[name] * term for name, term in terms.items())
        return loss, terms

    @torch.no_grad()
    def heldout_loss(self) -> float:
        """The loss without the penalty over the held-out blocks or sentences (mean over them, `batch` at a time)."""
        held, b = self.job.held, self.settings.batch
        total = 0.0
        for i in range(0, len(held), b):
            idx = torch.arange(i, min(i + b, len(held)))
            loss, _ = self._loss(self.job.model, held[idx], idx, self.held_teacher, self.job.held_mask)
            total += float(loss) * len(idx)
        return total / len(held)

    def evaluate(self, step: int) -> bool:
        """Held-out loss after `step` steps; keeps the best tensors; True when the run should stop early."""
        loss = self.heldout_loss()
        rose = bool(self.heldout) and loss > self.heldout[-1]["loss"]
        self.heldout.append({"step": step, "loss": loss})
        if self.best is None or loss < self.best["loss"]:
            self.best = {"step": step, "loss": loss, "params": {n: p.detach().clone() for n, p, _ in self.trained}}
        # a loss still falling towards the best is not a reason to stop; only one that keeps rising is
        self.stale = self.stale + 1 if rose else 0
        return self.stale >= self.settings.patience

    def restore_best(self) -> None:
        """Put the tensors of the lowest held-out loss back into the model (no-op without a held-out slice)."""
        if self.best is not None:
            named = {n: p for n, p, _ in self.trained}
            with torch.no_grad():
                for n, t in self.best["params"].items():
                    named[n].copy_(t)

    def train(self, start: int, eval_before, timer: Timer) -> None:
        """Steps start..steps-1 with a progress line, held-out checks and checkpoints; Ctrl-C becomes TuneInterrupted."""
        s = self.settings
        last_ckpt = start if start else None
        step = self.last = start
        label = "tune" if start == 0 else f"tune (from step {start})"
        held = len(self.job.held) > 0
        if held and start == 0:
            self.evaluate(0)
        try:
            with Progress(s.steps - start, label, unit="step", quiet=self.quiet or self.rank != 0) as bar:
                for step in range(start, s.steps):
                    self.curve.append(self.step(step))
                    self.last = step + 1
                    dt = timer.lap("train")
                    stop = held and (self.last % s.eval_every == 0 or self.last == s.steps) and self.evaluate(self.last)
                    bar.update(1, step=f"{step + 1}/{s.steps}", loss=self.curve[-1]["loss"],
                               heldout=self.heldout[-1]["loss"] if held else "-",
                               penalty=self.pen_value if self.pen_value is not None else "-",
                               tok_s=f"{s.batch * self.job.tokens_per_item / dt:.0f}")
                    timer.lap("heldout")
                    if stop and self.last < s.steps:
                        self.stopped = self.last
                        break
                    if self.save_every and (step + 1) % self.save_every == 0 and step + 1 < s.steps:
                        self._checkpoint(step + 1, eval_before)
                        last_ckpt = step + 1
                    timer.lap("train")
        except KeyboardInterrupt:
            held = (f"the checkpoint {self.job.ckpt} holds step {last_ckpt}; continue with --resume" if last_ckpt
                    else "no checkpoint was written yet (see --save-every)")
            raise TuneInterrupted(f"interrupted at step {step + 1} of {s.steps}; {held}") from None


# ------------------------------------------------------------------------------------ writing the result

def _write_tuned(job: _Job, trained: list, section: dict, dtype: str) -> None:
    """The tuned directory in format `dtype`: the source's tensors with the trained ones replaced, its manifest
    with `tune`."""
    manifest = copy.deepcopy(job.manifest)
    manifest["dtype"] = dtype
    if "tune" in job.manifest:
        section["previous"] = job.manifest["tune"]
    manifest["tune"] = section
    source = job.loaded.source
    weights = decode(source.names(), source.get)  # float32 canonical tensors, int8 pairs multiplied back
    for n, p, transposed in trained:
        weights[n] = (p.detach().T if transposed else p.detach()).contiguous().clone()
    cfg_file = job.src / "source-config.json"
    config = json.loads(cfg_file.read_text(encoding="utf-8")) if cfg_file.is_file() else None
    with atomic_dir(job.out, job.force) as tmp:
        write_model_dir(tmp, weights, manifest, job.loaded.tokenizer, config, dtype)
    job.ckpt.unlink(missing_ok=True)


# ------------------------------------------------------------------------------------------- the tune

def tune(src_dir: str | Path, texts: list[str | Path], out: str | Path, *, steps: int = 100, batch: int | None = None,
         context: int = 128, lr: float | None = None, seed: int = 0, decay: str = DEFAULT_DECAY,
         decay_coef: float = DEFAULT_DECAY_COEF, penalty_every: int = DEFAULT_PENALTY_EVERY,
         temperature: float = DEFAULT_TEMPERATURE, mix: float = DEFAULT_MIX, teacher: str | None = None,
         topk: int = DEFAULT_TOPK, eval_texts: list[str | Path] | None = None, eval_tokens: int | None = None,
         save_every: int = 100, resume: bool = False, train_norms: bool = False, train_dense: bool = False,
         embed_loss: str = DEFAULT_EMBED_LOSS, hidden_weight: float | None = None, heldout: float = DEFAULT_HELDOUT,
         eval_every: int = DEFAULT_EVAL_EVERY, patience: int = DEFAULT_PATIENCE, force: bool = False,
         quiet: bool = False, dtype: str | None = None, compute: str = DEFAULT_COMPUTE) -> dict:
    """Fine-tune the factors of a compressed directory on text and write the tuned directory.

    Args:
        src_dir: a directory written by `compress` (or by an earlier tune).
        texts: UTF-8 training text files, cut into blocks of `context` tokens (an encoder's: into sentences of at
            most `context` tokens, see the module docstring).
        out: the directory to write (same layout as `src_dir`; its manifest gains a `tune` section).
        steps, batch, context, lr, seed: optimiser steps, global blocks (sentences) per step (default 4 blocks,
            `DEFAULT_SENTENCE_BATCH` sentences), tokens per block, peak learning rate (default `DEFAULT_LR`, an
            encoder's `DEFAULT_SENTENCE_LR`), seed of the data order.
        decay, decay_coef, penalty_every: a key of `DECAYS` ("frobenius" | "factor" | "none"), λ, and how often
            the Frobenius penalty is evaluated (see the module docstring).
        temperature, mix, teacher, topk: distillation temperature, weight of the next-token loss, teacher path
            (None: the manifest's source model, "none": no teacher), teacher tokens cached per position.
        eval_texts, eval_tokens: held-out text files scored (perplexity at `context`) before and after, at most
            `eval_tokens` tokens of each.
        save_every, resume: checkpoint every N steps (0: never); continue from the checkpoint.
        train_norms, train_dense: also train the norm weights; also the dense feed-forward matrices.
        embed_loss, hidden_weight: an encoder's embedding loss ("cos" | "mse") and the weight of its hidden-state
            term (0: none; default `DEFAULT_HIDDEN_WEIGHT`); decoders ignore them.
        heldout, eval_every, patience: fraction of the blocks held out, steps between held-out evaluations,
            evaluations without a new best before stopping (see "Best step" in the module docstring).
        force, quiet: replace `out` and a stale checkpoint; no progress line.
        dtype: format of the weights written (`io.storage`; default: the input directory's). The trained
            weights and the optimiser are float32 whatever `compute` is.
        compute: precision of the forward passes' products: "float32", "bfloat16" (autocast) or "auto"
            (bfloat16 where the CPU multiplies it natively; see `COMPUTES`). The manifest records the choice.

    Returns:
        A report dict: out, steps, steps_run, tokens, seconds, tokens_per_second, curve, heldout, data (with
        the repeats of each text), eval, teacher, settings, warnings.

    Raises:
        CompressError: a bad option, a missing or too short text, a directory that is not a compressed
            model, a teacher that cannot be found or does not fit, an existing output without `force`.
        TuneInterrupted: Ctrl-C; the last checkpoint (if any) is complete.
    """
    timer = Timer()
    if dtype is not None:
        storage.check_dtype(dtype)
    compute = resolve_compute(compute)
    allocator.keep_freed_memory()  # the same tensors every step: reuse their memory (see `allocator`)
    world_size = max(1, int(os.environ.get("WORLD_SIZE", "1")))
    hidden_weight = DEFAULT_HIDDEN_WEIGHT if hidden_weight is None else hidden_weight
    _check_options(steps, batch or world_size, context, lr or DEFAULT_LR, decay, decay_coef, penalty_every,
                   temperature, mix, topk, save_every, eval_tokens, world_size, embed_loss, hidden_weight)
    _check_heldout(heldout, eval_every, patience)
    job = _open_job(src_dir, texts, out, context=context, heldout=heldout, eval_texts=eval_texts,
                    eval_tokens=eval_tokens, resume=resume, force=force)
    encoder = job.mask is not None
    batch = batch or (DEFAULT_SENTENCE_BATCH if encoder else 4)
    lr = lr or (DEFAULT_SENTENCE_LR if encoder else DEFAULT_LR)
    _check_options(steps, batch, context, lr, decay, decay_coef, penalty_every, temperature, mix, topk, save_every,
                   eval_tokens, world_size)
    teacher_model, t_ident = _load_teacher(teacher, job, mix)
    settings = TuneSettings(steps=steps, batch=batch, context=context, lr=float(lr), seed=seed, decay=decay,
                            decay_coef=float(decay_coef), penalty_every=penalty_every, temperature=float(temperature),
                            mix=0.0 if encoder else float(mix) if teacher_model is not None else 1.0, topk=topk,
                            train_norms=train_norms, train_dense=train_dense,
                            warmup=max(1, round(WARMUP_FRACTION * steps)),
                            embed_loss=embed_loss if encoder else None,
                            hidden_weight=float(hidden_weight) if encoder else 0.0,
                            heldout=float(heldout), eval_every=eval_every, patience=patience, compute=compute)
    model_sha = _sha256_file(job.src / "model.safetensors")
    fingerprint = {"settings": json.dumps(settings.to_json(), sort_keys=True), "data": job.data["tokens_sha256"],
                   "model": model_sha, "teacher": json.dumps(t_ident, sort_keys=True)}
    opt, trained = _optimizer(job.model, settings)
    rank, world, created = _init_distributed()
    try:
        cache = held_cache = None
        if encoder:
            cache = SentenceTeacher(teacher_model, job.blocks, job.mask, settings.hidden_weight > 0, compute)
            held_cache = SentenceTeacher(teacher_model, job.held, job.held_mask, settings.hidden_weight > 0, compute)
        elif teacher_model is not None:
            touched = min(job.blocks.shape[0], steps * (batch // world))
            cache = TeacherCache(teacher_model, job.blocks, topk, settings.temperature, touched, compute)
            held_cache = TeacherCache(teacher_model, job.held, topk, settings.temperature, len(job.held), compute)
        run = _Run(job, settings, opt, trained, cache, held_cache, fingerprint, rank, world, save_every, quiet)
        start, eval_before = run.resume() if resume else (0, None)
        timer.lap("load")
        if eval_before is None and job.sets:
            if rank == 0:
                eval_before = _held_out(job, teacher_model, context)
            _barrier(world)
        timer.lap("eval_before")
        _warn_repeats(run, job, settings)
        run.train(start, eval_before, timer)
        run.restore_best()
        eval_after = _held_out(job, teacher_model, context) if job.sets and rank == 0 else None
        timer.lap("eval_after")
        section = {"settings": settings.to_json(), "data": job.data, "teacher": t_ident,
                   "teacher_cache": cache.description if cache is not None else None,
                   "from": {"path": job.src.name, "sha256": model_sha}, "processes": world,
                   "eval": {"files": [d for _, d, _ in job.sets], "tokens_cap": eval_tokens, "context": context,
                            "before": eval_before, "after": eval_after},
                   "curve": run.curve, "heldout": _heldout_report(run)}
        if rank == 0:
            _write_tuned(job, trained, section, dtype or storage.default_dtype(None, job.manifest))
        _barrier(world)
        timer.lap("write")
    finally:
        if created:
            import torch.distributed as dist
            dist.destroy_process_group()
    trained_tokens = round((run.last - start) * batch * job.tokens_per_item)
    t_train, stages = timer.total("train"), timer.stages
    return {"out": str(job.out), "steps": steps, "steps_run": run.last, "start_step": start, "tokens": trained_tokens,
            "tokens_per_second": trained_tokens / t_train if t_train > 0 else None,
            "seconds": {k: stages.get(k, 0.0) for k in ("load", "eval_before", "train", "heldout", "eval_after",
                                                        "write")},
            "heldout": section["heldout"], "data": job.data,
            "curve": run.curve, "eval": {"before": eval_before, "after": eval_after}, "teacher": t_ident,
            "warnings": run.warnings, "teacher_cache": section["teacher_cache"], "settings": settings.to_json(),
            "processes": world}
