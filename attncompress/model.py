"""Plain PyTorch forward passes for the supported families, dense and factorised.

Shape legend:
    b batch, s new positions, t cached + new positions, d d_model
    h query heads, g key/value heads (groups), w_qk query/key width per head, w_vo value width per head
    p kept rotary pairs per group (w_qk = 2p), f feed-forward width, r a factor rank

A compressed model is the same network with narrower heads: query/key width
w_qk ≤ head_dim, value width w_vo ≤ head_dim, and feed-forward matrices stored
as two thin factors. The softmax scale stays 1/sqrt(head_dim) of the original
head, because the scores it scales are the original scores (approximated).
Weights are built from canonical names (see `arch`).
"""
from __future__ import annotations

import math

import torch
import torch.nn.functional as F
from torch import nn

from .shape import ModelShape


class RMSNorm(nn.Module):
    def __init__(self, weight: torch.Tensor, eps: float):
        super().__init__()
        self.weight = nn.Parameter(weight)
        self.eps = eps

    def forward(self, x):
        if x.dtype == torch.float32 and self.weight.dtype == torch.float32:
            return F.rms_norm(x, self.weight.shape, self.weight, self.eps)  # one fused op instead of eight
        # normalise in float32 whatever the activation dtype, as the reference does
        xf = x.float()
        return (xf * torch.rsqrt(xf.pow(2).mean(-1, keepdim=True) + self.eps)).type_as(x) * self.weight


class LayerNorm(nn.Module):
    def __init__(self, weight: torch.Tensor, bias: torch.Tensor, eps: float):
        super().__init__()
        self.weight, self.bias, self.eps = nn.Parameter(weight), nn.Parameter(bias), eps

    def forward(self, x):
        return F.layer_norm(x, self.weight.shape, self.weight, self.bias, self.eps)


def gemv_layout(w: torch.Tensor) -> torch.Tensor:
    """The same (d_out, d_in) matrix stored column-major (a copy): strides (1, d_out).

    Why: a one-row product x Wᵀ (a decode step) reads every weight once, and on CPU (MKL, measured on
    this project's machine with benchmarks/bandwidth.py) it streams W at 20–27 GB/s when Wᵀ is contiguous,
    against 10–20 GB/s when W is (a dot product per output), for every shape a decode step reads, tall
    or wide (earlier runs found wide ones as fast either way; the re-run of 2026-12-03 did not).
    Many-row products run at about the same speed either way. Example: (1536, 576) → strides (1, 1536).
    """
    if w.dim() == 2:
        return w.T.contiguous().T  # (d_out, d_in) with strides (1, d_out)
    return w.contiguous()


# ----------------------------------------------------------------------------------- products of weights
# `halve` stores a decoder's product weights in float16 for decoding. This CPU's float32 one-row product
# (MKL) reads weights at about 22 GB/s on one thread and does not gain from a second; torch's float16
# one-row kernel (float32 accumulation) reads half the bytes and splits the rows over the threads, so a
# decode step takes about half the time (benchmarks/results/speed.json). Its cost grows with the rows
# (one pass over W per row), so only products of at most STEP_ROWS rows use it; larger ones widen W to
# float32 into one reused buffer first (a prompt). Inputs are rounded to float16 for the product,
# outputs widened back: activations, norms, residuals and the cache stay float32.
STEP_ROWS = 4
_WIDE = {"buffer": torch.empty(0), "force": False}


def _widened(w: torch.Tensor) -> torch.Tensor:
    """W in float32, in a buffer reused by the next call (read it at once)."""
    buf = _WIDE["buffer"]
    if buf.numel() < w.numel():
        with torch.inference_mode(False):  # an ordinary tensor: usable in and out of inference mode later
            buf = _WIDE["buffer"] = torch.empty(w.numel())
    return buf[:w.numel()].view(w.shape).copy_(w)


def product(x: torch.Tensor, *weights: torch.Tensor, bias: torch.Tensor | None = None) -> torch.Tensor:
    """x W₁ᵀ W₂ᵀ … + b for float32 x (.., d_in) and matrices W_i (d_out_i, d_in_i), float32 or float16 (see
    `halve`); float32 out. A chain of float16 products stays float16 in between (each would round its input
    to float16 anyway), so a factor pair costs one rounding and one widening.
    """
    if weights[0].dtype == torch.float16 and x.numel() <= STEP_ROWS * x.shape[-1] and not _WIDE["force"]:
        y = x.half()
        for w in weights:
            y = F.linear(y, w)
        y = y.float()
        return y if bias is None else y.add_(bias)
    for w in weights[:-1]:
        x = F.linear(x, w if w.dtype == torch.float32 else _widened(w))
    w = weights[-1]
    return F.linear(x, w if w.dtype == torch.float32 else _widened(w), bias)


class Linear(nn.Module):
    """y = x Wᵀ + b with a dense weight (d_out, d_in) (the feed-forward ones laid out by `gemv_layout`)."""

    def __init__(self, weight: torch.Tensor, bias: torch.Tensor | None = None):
        super().__init__()
        self.weight = nn.Parameter(weight)
        self.bias = nn.Parameter(bias) if bias is not None else None

    @property
    def params(self) -> int:
        return self.weight.numel()

    def forward(self, x):
        return product(x, self.weight, bias=self.bias)


class LowRankLinear(nn.Module):
    """y = (x B) Aᵀ + b: two thin matmuls, never the (d_out, d_in) product.

    a: (d_out, r), b: (d_in, r). `b` is kept as `bt`, (r, d_in), the weight of the first product; `a` is
    column-major (`gemv_layout`), and `fuse` lays `bt` out so too for decoding.
    """

    def __init__(self, a: torch.Tensor, b: torch.Tensor, bias: torch.Tensor | None = None):
        super().__init__()
        self.a = nn.Parameter(gemv_layout(a))  # (d_out, r)
        self.bt = nn.Parameter(b.T.contiguous())  # (r, d_in)
        self.bias = nn.Parameter(bias) if bias is not None else None

    @property
    def b(self) -> torch.Tensor:
        return self.bt.T

    @property
    def params(self) -> int:
        return self.a.numel() + self.bt.numel()

    def forward(self, x):
        return product(x, self.bt, self.a, bias=self.bias)  # (.., d_in) @ (d_in, r) @ (r, d_out)


class SharedInput(nn.Module):
    """Projections of one input as one product: y_1, …, y_n of Linear or LowRankLinear parts.

    The parts' first matrices (a dense weight (d_out_i, d_in), or a factor bᵀ (r_i, d_in)) are stacked into
    one (Σ_i, d_in) matrix, read by one product per step instead of n; a low-rank part then applies its `a`.
    Output i is part i's output (the same products; the last bits may round differently).
    """

    def __init__(self, parts: list):
        super().__init__()
        first = [p.weight if isinstance(p, Linear) else p.bt for p in parts]
        self.sizes = [f.shape[0] for f in first]
        self.first = nn.Parameter(gemv_layout(torch.cat([f.detach() for f in first])))  # (Σ_i, d_in)
        dense_bias = [p.bias if isinstance(p, Linear) else None for p in parts]
        self.bias = None
        if any(b is not None for b in dense_bias):  # missing ones (and low-rank parts) add zeros
            self.bias = nn.Parameter(torch.cat([b.detach() if b is not None else torch.zeros(n)
                                                for b, n in zip(dense_bias, self.sizes)]))
        self.seconds = nn.ModuleList(
            [None if isinstance(p, Linear) else Linear(p.a.detach(), None if p.bias is None else p.bias.detach())
             for p in parts])

    @property
    def params(self) -> int:
        return self.first.numel() + sum(s.params for s in self.seconds if s is not None)

    def forward(self, x) -> tuple[torch.Tensor, ...]:
        h = product(x, self.first, bias=self.bias).split(self.sizes, dim=-1)  # (.., Σ_i) → (.., size_i) views
        return tuple(y if second is None else second(y) for y, second in zip(h, self.seconds))


def rotary_tables(inv_freq: torch.Tensor, start: int, length: int) -> tuple[torch.Tensor, torch.Tensor]:
    """cos and sin for positions start..start+length-1.

    inv_freq: (g, p) frequencies of the pairs each group keeps. Returns cos, sin: (g, s, 2p), the
    second half repeating the first, for `rotate_half` layout (pair i = dims i and i + p).
    """
    pos = torch.arange(start, start + length, dtype=torch.float32)
    ang = pos[None, :, None] * inv_freq[:, None, :]  # (g, s, p)
    ang = torch.cat([ang, ang], dim=-1)  # (g, s, 2p)
    return ang.cos(), ang.sin()


def apply_rotary(x: torch.Tensor, cos: torch.Tensor, sin: torch.Tensor) -> torch.Tensor:
    """Rotate each pair (i, i + p) of x: (b, heads, s, 2p) by cos/sin: (heads, s, 2p)."""
    x1, x2 = x.chunk(2, dim=-1)
    return x * cos + torch.cat([-x2, x1], dim=-1) * sin


def rotary_rows(inv_freq: torch.Tensor, length: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Position-major tables for positions 0..length-1, made once and sliced at run time.

    inv_freq: (g, p). Returns cos: (t, g, 2p) as `rotary_tables` (transposed) and a signed sin: (t, g, 2p)
    whose first half is negated, so that `rotate(x, cos, sin)` needs no negation or concatenation.
    """
    cos, sin = rotary_tables(inv_freq, 0, length)  # (g, t, 2p)
    p = inv_freq.shape[1]
    sin = torch.cat([-sin[..., :p], sin[..., p:]], dim=-1)  # rotate_half(x)·sin = roll(x, p)·[-sin, sin]
    return cos.transpose(0, 1).contiguous(), sin.transpose(0, 1).contiguous()  # (t, g, 2p)


def rotate(x: torch.Tensor, cos: torch.Tensor, sin: torch.Tensor) -> torch.Tensor:
    """`apply_rotary` with tables from `rotary_rows`: x (.., 2p) times cos, plus its halves swapped times signed sin.

    Example: one pair, x = [1, 0], angle θ → [cos θ, sin θ] (a rotation by θ).
    Without autograd, x is overwritten (one temporary instead of three); with it, x is kept.
    """
    swapped = x.roll(x.shape[-1] // 2, dims=-1)
    if torch.is_grad_enabled():
        return torch.addcmul(x * cos, swapped, sin)
    return x.mul_(cos).addcmul_(swapped, sin)


class KVCache:
    """Preallocated keys and values for every layer, at the reduced widths the model stores."""

    def __init__(self, model: "Transformer", batch: int, max_len: int, dtype=torch.float32):
        self.k, self.v = [], []
        for blk in model.blocks:
            a = blk.attn
            self.k.append(torch.zeros(batch, a.n_kv_heads, max_len, a.w_qk, dtype=dtype))  # (b, g, t, w_qk)
            self.v.append(torch.zeros(batch, a.n_kv_heads, max_len, a.w_vo, dtype=dtype))  # (b, g, t, w_vo)
        self.length = 0
        self.max_len = max_len
        self._bytes = batch * model.shape.kv_bytes(model.kv_widths, dtype.itemsize)

    @property
    def bytes_per_token(self) -> int:
        """Cache bytes one more position takes over the whole batch."""
        return self._bytes


class Attention(nn.Module):
    """Multi-head attention with grouped keys/values and injected projections.

    q, k, v, o are Linear or LowRankLinear. q: d → h*w_qk, k: d → g*w_qk, v: d → g*w_vo, o: h*w_vo → d.
    pairs: (g, p) long tensor of the rotary pairs each group keeps, or None without rotary.
    """

    def __init__(self, q, k, v, o, *, n_heads: int, n_kv_heads: int, head_dim: int, causal: bool,
                 pairs: torch.Tensor | None = None, rope_theta: float | None = None):
        super().__init__()
        self.q, self.k, self.v, self.o = q, k, v, o
        self.qkv = None  # a SharedInput replacing q, k, v after `fuse`
        self.n_heads, self.n_kv_heads, self.head_dim, self.causal = n_heads, n_kv_heads, head_dim, causal
        out_q = q.weight.shape[0] if isinstance(q, Linear) else q.a.shape[0]
        out_v = v.weight.shape[0] if isinstance(v, Linear) else v.a.shape[0]
        self.w_qk, self.w_vo = out_q // n_heads, out_v // n_kv_heads
        self.scale = 1.0 / math.sqrt(head_dim)  # the original head's scale, whatever w_qk is
        if pairs is not None:
            # frequency of pair i in the directory layout: theta^(-2i/head_dim)
            inv = rope_theta ** (-2.0 * pairs.double() / head_dim)
            self.register_buffer("pairs", pairs.long(), persistent=False)
            self.register_buffer("inv_freq", inv.float(), persistent=False)  # (g, p)
        else:
            self.pairs = None
        self._tables = None  # rotary (cos, sin) for keys (t, g, w_qk) and queries (t, g, 1, w_qk), grown on demand

    def _rotary(self, start: int, s: int) -> tuple[torch.Tensor, ...]:
        """cos and signed sin rows of positions start..start+s-1 for keys (s, g, w_qk) and queries (s, g, 1, w_qk)."""
        end = start + s
        if self._tables is None or self._tables[0].shape[0] < end:
            with torch.inference_mode(False):  # ordinary tensors, usable later with autograd too
                cos, sin = rotary_rows(self.inv_freq, max(256, 1 << (end - 1).bit_length()))
                self._tables = (cos, sin, cos[:, :, None], sin[:, :, None])  # the query views broadcast over rep
        return tuple(t[start:end] for t in self._tables)

    def forward(self, x, *, mask=None, cache: KVCache | None = None, layer: int = 0, start: int = 0):
        b, s, _ = x.shape
        h, g, wqk, wvo = self.n_heads, self.n_kv_heads, self.w_qk, self.w_vo
        rep = h // g
        q, k, v = self.qkv(x) if self.qkv is not None else (self.q(x), self.k(x), self.v(x))
        q = q.view(b, s, g, rep, wqk)  # (b, s, g, rep, w_qk): query head j = group j // rep, member j % rep
        k = k.view(b, s, g, wqk)  # (b, s, g, w_qk)
        v = v.view(b, s, g, wvo)  # (b, s, g, w_vo)
        if self.pairs is not None:
            cos, sin, cos_q, sin_q = self._rotary(start, s)  # (s, g, w_qk), (s, g, 1, w_qk)
            k = rotate(k, cos, sin)
            q = rotate(q, cos_q, sin_q)  # the queries of a group share its key's pairs
        if cache is not None and s == 1:
            return self._step(q, k, v, mask, cache, layer, start)
        q = q.view(b, s, h, wqk).transpose(1, 2)  # (b, h, s, w_qk)
        k, v = k.transpose(1, 2), v.transpose(1, 2)  # (b, g, s, w_qk), (b, g, s, w_vo)
        if cache is not None:
            cache.k[layer][:b, :, start:start + s] = k
            cache.v[layer][:b, :, start:start + s] = v
            k = cache.k[layer][:b, :, :start + s]  # (b, g, t, w_qk)
            v = cache.v[layer][:b, :, :start + s]  # (b, g, t, w_vo)
        t = k.shape[2]
        is_causal = False
        if self.causal and s > 1:
            if t == s and mask is None:
                is_causal = True
            else:
                # new positions start+i see cached positions ≤ start+i
                causal = torch.ones(s, t, dtype=torch.bool).tril(diagonal=t - s)
                mask = causal if mask is None else mask & causal
        # the CPU's fused kernel needs one width for q, k and v (else a slow unfused path runs); zero
        # columns add nothing to any score, and padded output columns are dropped
        if wqk < wvo:
            q, k = F.pad(q, (0, wvo - wqk)), F.pad(k, (0, wvo - wqk))  # (b, h|g, s, w_vo)
        elif wvo < wqk:
            v = F.pad(v, (0, wqk - wvo))  # (b, g, t, w_qk)
        y = F.scaled_dot_product_attention(q, k, v, attn_mask=mask, is_causal=is_causal, scale=self.scale,
                                           enable_gqa=g != h)  # (b, h, s, max(w_qk, w_vo))
        if wvo < wqk:
            y = y[..., :wvo]  # (b, h, s, w_vo)
        return self.o(y.transpose(1, 2).reshape(b, s, h * wvo))  # (b, s, d)

    def _step(self, q, k, v, mask, cache: KVCache, layer: int, start: int):
        """One new position against the cache: one batched matmul per product, the group's queries as rows.

        SDPA with grouped heads would expand the keys per query head; here the `rep` queries of a group
        are the rows of one (rep, w_qk) @ (w_qk, t) product against the group's cached keys, as stored.
        """
        b, _, g, rep, wqk = q.shape
        kc, vc = cache.k[layer], cache.v[layer]  # (B, g, T, w_qk), (B, g, T, w_vo)
        if b != kc.shape[0]:
            kc, vc = kc[:b], vc[:b]  # a smaller batch than the cache was made for
        kc.select(2, start).copy_(k.view(b, g, wqk))  # k: (b, 1, g, w_qk) → (b, g, w_qk)
        vc.select(2, start).copy_(v.view(b, g, self.w_vo))
        kc, vc = kc.narrow(2, 0, start + 1), vc.narrow(2, 0, start + 1)  # (b, g, t, w_qk), (b, g, t, w_vo)
        att = torch.matmul(q.view(b, g, rep, wqk), kc.transpose(2, 3)).mul_(self.scale)  # (b,g,rep,w)@(b,g,w,t) → (b,g,rep,t)
        if mask is not None:
            att = att.masked_fill(~mask[..., :start + 1], float("-inf"))  # mask: (b, 1, 1, t) padded keys
        y = torch.matmul(att.softmax(-1), vc)  # (b, g, rep, t) @ (b, g, t, w_vo) → (b, g, rep, w_vo)
        return self.o(y.view(b, 1, g * rep * self.w_vo))  # heads in order j = group·rep + member: (b, 1, d)


_ACTS = {"silu": F.silu, "gelu": F.gelu, "gelu_tanh": lambda x: F.gelu(x, approximate="tanh")}


class GatedMLP(nn.Module):
    def __init__(self, gate, up, down, activation: str):
        super().__init__()
        self.gate, self.up, self.down, self.act = gate, up, down, _ACTS[activation]
        self.gate_up = None  # a SharedInput replacing gate and up after `fuse`

    def forward(self, x):
        g, u = self.gate_up(x) if self.gate_up is not None else (self.gate(x), self.up(x))  # (b, s, f) each
        return self.down(self.act(g) * u)  # (b, s, f) → (b, s, d)


class MLP(nn.Module):
    def __init__(self, up, down, activation: str):
        super().__init__()
        self.up, self.down, self.act = up, down, _ACTS[activation]

    def forward(self, x):
        return self.down(self.act(self.up(x)))


def _residual(y: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
    """y + x, into y (a fresh output of the sub-layer) when no autograd records it."""
    return y.add_(x) if not torch.is_grad_enabled() else y + x


class Block(nn.Module):
    def __init__(self, attn_norm, attn, ff_norm, ff, pre_norm: bool):
        super().__init__()
        self.attn_norm, self.attn, self.ff_norm, self.ff, self.pre_norm = attn_norm, attn, ff_norm, ff, pre_norm

    def forward(self, x, **kw):
        if self.pre_norm:
            x = _residual(self.attn(self.attn_norm(x), **kw), x)
            return _residual(self.ff(self.ff_norm(x)), x)
        # post-norm (BERT): normalise after each residual sum
        x = self.attn_norm(x + self.attn(x, **kw))
        return self.ff_norm(x + self.ff(x))


class Transformer(nn.Module):
    """A decoder (logits) or an encoder (last hidden states), per `shape.family`."""

    def __init__(self, shape: ModelShape, tokens, blocks, *, positions=None, types=None, embed_norm=None,
                 final_norm=None, lm_head=None):
        super().__init__()
        self.shape = shape
        # a tied table is also the output head: lay it out for one-row logits (embedding rows stay cheap to gather)
        self.tokens = nn.Parameter(gemv_layout(tokens) if lm_head is None and shape.is_decoder else tokens)  # (vocab, d)
        self.positions = nn.Parameter(positions) if positions is not None else None
        self.types = nn.Parameter(types) if types is not None else None
        self.embed_norm, self.final_norm = embed_norm, final_norm
        self.blocks = nn.ModuleList(blocks)
        self.lm_head = lm_head  # a Linear, or None when tied to `tokens`
        self.halved = False  # product weights in float16 (`halve`)
        self.native = None  # the compiled decode step (`native.attach`), used for one sequence's decode steps

    @property
    def kv_widths(self) -> list[tuple[int, int]]:
        """(w_qk, w_vo) per layer: the key and value widths of one key/value head as stored."""
        return [(blk.attn.w_qk, blk.attn.w_vo) for blk in self.blocks]

    @property
    def is_decoder(self) -> bool:
        return self.shape.is_decoder

    def hidden(self, ids, *, attention_mask=None, token_types=None, cache: KVCache | None = None, start: int = 0):
        """Final hidden states (b, s, d) for token ids (b, s)."""
        b, s = ids.shape
        x = F.embedding(ids, self.tokens).float()  # (b, s, d); a no-op unless `halve` made the table float16
        if self.positions is not None:
            x = x + self.positions[start:start + s]
        if self.types is not None:
            tt = token_types if token_types is not None else torch.zeros_like(ids)
            x = x + F.embedding(tt, self.types)
        if self.embed_norm is not None:
            x = self.embed_norm(x)
        mask = None
        if attention_mask is not None:
            mask = attention_mask.bool()[:, None, None, :]  # (b, 1, 1, t): padded keys are never attended
        for i, blk in enumerate(self.blocks):
            x = blk(x, mask=mask, cache=cache, layer=i, start=start)
        if self.final_norm is not None:
            x = self.final_norm(x)
        return x

    def logits(self, x):
        """(b, s, d) hidden → (b, s, vocab)."""
        return self.lm_head(x) if self.lm_head is not None else product(x, self.tokens)

    def forward(self, ids, **kw):
        if not self.is_decoder:
            return self.hidden(ids, **kw)
        cache = kw.get("cache")
        if (self.native is not None and cache is not None and ids.shape == (1, 1) and kw.get("attention_mask") is None
                and not torch.is_grad_enabled()):
            y = self.native.step(int(ids[0, 0]), kw.get("start", 0), cache)  # (1, 1, V)
            if torch.isfinite(y).all():
                return y
            # beyond float16's range: the step again through torch, which widens the weights (same positions)
        return self._guarded(lambda: self.logits(self.hidden(ids, **kw)))

    def last_logits(self, ids, **kw) -> torch.Tensor:
        """Logits of the last position only, (b, 1, vocab): a prompt's prefill, as generation needs it."""
        return self._guarded(lambda: self.logits(self.hidden(ids, **kw)[:, -1:]))

    def _guarded(self, logits_of):
        y = logits_of()
        if self.halved and not torch.isfinite(y).all():
            # an input beyond float16's range (65504) in a `halve`d product: the same pass again with every
            # weight widened (a cache rewrites the same positions)
            _WIDE["force"] = True
            try:
                y = logits_of()
            finally:
                _WIDE["force"] = False
        return y


def fuse(model: Transformer) -> Transformer:
    """Merge the projections that share an input, in place, for inference: per block one product for the
    query, key and value inputs and one for the gate and up inputs (`SharedInput`), and every product weight
    laid out column-major (`gemv_layout`). Same function, fewer products per token; the separate q, k, v,
    gate and up modules are removed (training needs them: tune works on an unfused model).
    """
    for blk in model.blocks:
        a = blk.attn
        if a.qkv is None:
            a.qkv = SharedInput([a.q, a.k, a.v])
            del a.q, a.k, a.v
        if isinstance(blk.ff, GatedMLP) and blk.ff.gate_up is None:
            blk.ff.gate_up = SharedInput([blk.ff.gate, blk.ff.up])
            del blk.ff.gate, blk.ff.up
    for _, mod, name, w in _product_weights(model):
        if w.dtype == torch.float32:
            w.data = gemv_layout(w.data)
    return model


def halve(model: Transformer) -> Transformer:
    """Store every product weight of a fused decoder in float16 (row-major, the layout torch's float16
    one-row kernel reads fast), in place, for decoding: see `product`. The weights are rounded once
    (relative error ≤ 2⁻¹¹); norms, biases and position tables stay float32. Inference only. The float16
    weights are placed in one block of memory in the order a decode step reads them (`_placed_together`).
    """
    if not model.is_decoder:
        return model
    weights = list({id(w): w for *_, w in sorted(_product_weights(model), key=_read_key)}.values())
    for w, h in zip(weights, _placed_together(weights, torch.float16)):
        w.data = h
        w.requires_grad_(False)
    model.halved = True
    return model


# A decode step reads its weights in this order within a block (then the next block, then the output head).
_READ_RANK = (".qkv.", ".attn.", ".gate_up.", ".ff.")


def _read_key(item) -> tuple:
    """Sort key of a `_product_weights` item: the order a decode step reads it (a factor pair's bᵀ before a)."""
    qual, _, name, _ = item
    parts = qual.split(".")
    block = int(parts[1]) if parts[0] == "blocks" and len(parts) > 1 and parts[1].isdigit() else 1 << 30
    rank = next((i for i, s in enumerate(_READ_RANK) if s in f".{qual}."), len(_READ_RANK))
    return block, rank, name != "bt"


HUGE_PAGE = 2 << 20


def large_pages(nbytes: int) -> torch.Tensor:
    """(nbytes,) uint8 of fresh memory, 2 MB aligned and backed by 2 MB pages where the system allows (Linux
    `madvise(MADV_HUGEPAGE)`), else ordinary memory 4 KB aligned."""
    try:
        import mmap
        block = mmap.mmap(-1, nbytes + HUGE_PAGE, flags=mmap.MAP_PRIVATE | mmap.MAP_ANONYMOUS)
        block.madvise(mmap.MADV_HUGEPAGE)
        raw = torch.frombuffer(block, dtype=torch.uint8)  # keeps the mapping alive while any view lives
        return raw[(-raw.data_ptr()) % HUGE_PAGE:][:nbytes]
    except (ImportError, AttributeError, OSError, ValueError):  # no anonymous mappings or madvise here
        raw = torch.empty(nbytes + 4096, dtype=torch.uint8)
        return raw[(-raw.data_ptr()) % 4096:][:nbytes]


def _placed_together(tensors: list[torch.Tensor], dtype: torch.dtype) -> list[torch.Tensor]:
    """Contiguous copies of `tensors` in `dtype`, in one block of `large_pages`, in the order given, each on a
    4 KB boundary right after the previous one.

    Why: a decode step streams every weight once; on 4 KB pages each page costs a TLB miss, and on this
    project's machine the compiled step was 14-22% slower on them (scratch runs, one process per layout,
    the three SmolLM2 models of benchmarks/speed.py interleaved).
    One block in read order is also one stream for the prefetchers.
    """
    align, item = 4096, torch.empty((), dtype=dtype).element_size()
    sizes = [-(-t.numel() * item // align) * align for t in tensors]
    raw, off, out = large_pages(max(sum(sizes), 1)), 0, []
    for t, size in zip(tensors, sizes):
        view = raw[off:off + t.numel() * item].view(dtype).view(t.shape)
        view.copy_(t.detach())
        out.append(view)
        off += size
    return out


def _product_weights(model: Transformer):
    """(qualified name, module, attribute, parameter) of every matrix a product reads, the tied token table
    (also the output head) included."""
    for qual, mod in model.named_modules():
        names = {Linear: ("weight",), LowRankLinear: ("a", "bt"), SharedInput: ("first",)}.get(type(mod), ())
        for n in names:
            yield f"{qual}.{n}" if qual else n, mod, n, getattr(mod, n)
    if model.is_decoder and model.lm_head is None:
        yield "tokens", model, "tokens", model.tokens


def _linear(w: dict, name: str) -> nn.Module:
    """A dense or low-rank projection from canonical tensors named `name`.{weight|a,b}[.bias]."""
    bias = w.get(name + ".bias")
    if name + ".a" in w:
        return LowRankLinear(w[name + ".a"], w[name + ".b"], bias)
    if ".ff." in name:  # attention projections stay row-major: per-head code views their rows and columns
        return Linear(gemv_layout(w[name + ".weight"]), bias)
    return Linear(w[name + ".weight"], bias)


def _norm(shape: ModelShape, w: dict, name: str):
    if shape.norm == "rms":
        return RMSNorm(w[name + ".weight"], shape.norm_eps)
    return LayerNorm(w[name + ".weight"], w[name + ".bias"], shape.norm_eps)


def build_block(shape: ModelShape, weights: dict[str, torch.Tensor], i: int) -> Block:
    """Block `i` of the runtime from canonical weights; only the `layers.{i}.*` tensors are read.

    Rotary layers use `layers.{i}.attn.pairs` (g, p) when present (a compressed model); otherwise every pair.
    """
    p = f"layers.{i}."
    pairs = None
    if shape.rotary:
        pairs = weights.get(p + "attn.pairs")
        if pairs is None:
            pairs = torch.arange(shape.n_pairs).expand(shape.n_kv_heads, -1)
    attn = Attention(_linear(weights, p + "attn.q"), _linear(weights, p + "attn.k"),
                     _linear(weights, p + "attn.v"), _linear(weights, p + "attn.o"),
                     n_heads=shape.n_heads, n_kv_heads=shape.n_kv_heads, head_dim=shape.head_dim,
                     causal=shape.causal, pairs=pairs, rope_theta=shape.rope_theta)
    if shape.gated:
        ff = GatedMLP(_linear(weights, p + "ff.gate"), _linear(weights, p + "ff.up"),
                      _linear(weights, p + "ff.down"), shape.activation)
    else:
        ff = MLP(_linear(weights, p + "ff.up"), _linear(weights, p + "ff.down"), shape.activation)
    return Block(_norm(shape, weights, p + "attn_norm"), attn, _norm(shape, weights, p + "ff_norm"), ff,
                 shape.pre_norm)


def build(shape: ModelShape, weights: dict[str, torch.Tensor], *, blocks: bool = True) -> Transformer:
    """Assemble the runtime from canonical weights (dense or factorised; see `arch` for names).

    `blocks=False` builds the embedding alone (no blocks; norms and head only if their weights are given), so
    `hidden` gives the first block's input: for running the blocks one at a time.
    """
    layers = [build_block(shape, weights, i) for i in range(shape.n_layers)] if blocks else []
    return Transformer(
        shape, weights["embed.tokens"], layers, positions=weights.get("embed.positions"),
        types=weights.get("embed.types"),
        embed_norm=_norm(shape, weights, "embed.norm") if "embed.norm.weight" in weights else None,
        final_norm=_norm(shape, weights, "final_norm") if "final_norm.weight" in weights else None,
        lm_head=Linear(gemv_layout(weights["lm_head.weight"])) if "lm_head.weight" in weights else None)
