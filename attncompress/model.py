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
        # normalise in float32 whatever the activation dtype, as the reference does
        xf = x.float()
        return (xf * torch.rsqrt(xf.pow(2).mean(-1, keepdim=True) + self.eps)).type_as(x) * self.weight


class LayerNorm(nn.Module):
    def __init__(self, weight: torch.Tensor, bias: torch.Tensor, eps: float):
        super().__init__()
        self.weight, self.bias, self.eps = nn.Parameter(weight), nn.Parameter(bias), eps

    def forward(self, x):
        return F.layer_norm(x, self.weight.shape, self.weight, self.bias, self.eps)


class Linear(nn.Module):
    """y = x Wᵀ + b with a dense weight (d_out, d_in)."""

    def __init__(self, weight: torch.Tensor, bias: torch.Tensor | None = None):
        super().__init__()
        self.weight = nn.Parameter(weight)
        self.bias = nn.Parameter(bias) if bias is not None else None

    @property
    def params(self) -> int:
        return self.weight.numel()

    def forward(self, x):
        return F.linear(x, self.weight, self.bias)


class LowRankLinear(nn.Module):
    """y = (x B) Aᵀ + b: two thin matmuls, never the (d_out, d_in) product.

    a: (d_out, r), b: (d_in, r). `b` is kept transposed, (r, d_in), so both
    matmuls read their weights row-contiguously.
    """

    def __init__(self, a: torch.Tensor, b: torch.Tensor, bias: torch.Tensor | None = None):
        super().__init__()
        self.a = nn.Parameter(a.contiguous())  # (d_out, r)
        self.bt = nn.Parameter(b.T.contiguous())  # (r, d_in)
        self.bias = nn.Parameter(bias) if bias is not None else None

    @property
    def b(self) -> torch.Tensor:
        return self.bt.T

    @property
    def params(self) -> int:
        return self.a.numel() + self.bt.numel()

    def forward(self, x):
        return F.linear(F.linear(x, self.bt), self.a, self.bias)  # (.., d_in) @ (d_in, r) @ (r, d_out)


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

    @property
    def bytes_per_token(self) -> int:
        per = sum(k.shape[1] * k.shape[3] * k.element_size() + v.shape[1] * v.shape[3] * v.element_size()
                  for k, v in zip(self.k, self.v))
        return per * self.k[0].shape[0] if self.k else 0


class Attention(nn.Module):
    """Multi-head attention with grouped keys/values and injected projections.

    q, k, v, o are Linear or LowRankLinear. q: d → h*w_qk, k: d → g*w_qk, v: d → g*w_vo, o: h*w_vo → d.
    pairs: (g, p) long tensor of the rotary pairs each group keeps, or None without rotary.
    """

    def __init__(self, q, k, v, o, *, n_heads: int, n_kv_heads: int, head_dim: int, causal: bool,
                 pairs: torch.Tensor | None = None, rope_theta: float | None = None):
        super().__init__()
        self.q, self.k, self.v, self.o = q, k, v, o
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

    def forward(self, x, *, mask=None, cache: KVCache | None = None, layer: int = 0, start: int = 0):
        b, s, _ = x.shape
        h, g, wqk, wvo = self.n_heads, self.n_kv_heads, self.w_qk, self.w_vo
        q = self.q(x).view(b, s, h, wqk).transpose(1, 2)  # (b, h, s, w_qk)
        k = self.k(x).view(b, s, g, wqk).transpose(1, 2)  # (b, g, s, w_qk)
        v = self.v(x).view(b, s, g, wvo).transpose(1, 2)  # (b, g, s, w_vo)
        if self.pairs is not None:
            cos, sin = rotary_tables(self.inv_freq, start, s)  # (g, s, w_qk)
            k = apply_rotary(k, cos, sin)
            rep = h // g
            q = apply_rotary(q, cos.repeat_interleave(rep, 0), sin.repeat_interleave(rep, 0))  # query head j uses group j // rep
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
        y = F.scaled_dot_product_attention(q, k, v, attn_mask=mask, is_causal=is_causal, scale=self.scale,
                                           enable_gqa=g != h)  # (b, h, s, w_vo)
        return self.o(y.transpose(1, 2).reshape(b, s, h * wvo))  # (b, s, d)


_ACTS = {"silu": F.silu, "gelu": F.gelu, "gelu_tanh": lambda x: F.gelu(x, approximate="tanh")}


class GatedMLP(nn.Module):
    def __init__(self, gate, up, down, activation: str):
        super().__init__()
        self.gate, self.up, self.down, self.act = gate, up, down, _ACTS[activation]

    def forward(self, x):
        return self.down(self.act(self.gate(x)) * self.up(x))  # (b, s, f) → (b, s, d)


class MLP(nn.Module):
    def __init__(self, up, down, activation: str):
        super().__init__()
        self.up, self.down, self.act = up, down, _ACTS[activation]

    def forward(self, x):
        return self.down(self.act(self.up(x)))


class Block(nn.Module):
    def __init__(self, attn_norm, attn, ff_norm, ff, pre_norm: bool):
        super().__init__()
        self.attn_norm, self.attn, self.ff_norm, self.ff, self.pre_norm = attn_norm, attn, ff_norm, ff, pre_norm

    def forward(self, x, **kw):
        if self.pre_norm:
            x = x + self.attn(self.attn_norm(x), **kw)
            return x + self.ff(self.ff_norm(x))
        # post-norm (BERT): normalise after each residual sum
        x = self.attn_norm(x + self.attn(x, **kw))
        return self.ff_norm(x + self.ff(x))


class Transformer(nn.Module):
    """A decoder (logits) or an encoder (last hidden states), per `shape.family`."""

    def __init__(self, shape: ModelShape, tokens, blocks, *, positions=None, types=None, embed_norm=None,
                 final_norm=None, lm_head=None):
        super().__init__()
        self.shape = shape
        self.tokens = nn.Parameter(tokens)  # (vocab, d)
        self.positions = nn.Parameter(positions) if positions is not None else None
        self.types = nn.Parameter(types) if types is not None else None
        self.embed_norm, self.final_norm = embed_norm, final_norm
        self.blocks = nn.ModuleList(blocks)
        self.lm_head = lm_head  # a Linear, or None when tied to `tokens`

    @property
    def is_decoder(self) -> bool:
        return self.shape.family != "bert"

    def hidden(self, ids, *, attention_mask=None, token_types=None, cache: KVCache | None = None, start: int = 0):
        """Final hidden states (b, s, d) for token ids (b, s)."""
        b, s = ids.shape
        x = F.embedding(ids, self.tokens)  # (b, s, d)
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
        return self.lm_head(x) if self.lm_head is not None else F.linear(x, self.tokens)

    def forward(self, ids, **kw):
        x = self.hidden(ids, **kw)
        return self.logits(x) if self.is_decoder else x


def _linear(w: dict, name: str) -> nn.Module:
    """A dense or low-rank projection from canonical tensors named `name`.{weight|a,b}[.bias]."""
    bias = w.get(name + ".bias")
    if name + ".a" in w:
        return LowRankLinear(w[name + ".a"], w[name + ".b"], bias)
    return Linear(w[name + ".weight"], bias)


def _norm(shape: ModelShape, w: dict, name: str):
    if shape.norm == "rms":
        return RMSNorm(w[name + ".weight"], shape.norm_eps)
    return LayerNorm(w[name + ".weight"], w[name + ".bias"], shape.norm_eps)


def build(shape: ModelShape, weights: dict[str, torch.Tensor]) -> Transformer:
    """Assemble the runtime from canonical weights (dense or factorised; see `arch` for names).

    Rotary layers use `layers.{i}.attn.pairs` (g, p) when present (a compressed model); otherwise every pair.
    """
    blocks = []
    for i in range(shape.n_layers):
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
        blocks.append(Block(_norm(shape, weights, p + "attn_norm"), attn, _norm(shape, weights, p + "ff_norm"), ff,
                            shape.pre_norm))
    return Transformer(
        shape, weights["embed.tokens"], blocks, positions=weights.get("embed.positions"),
        types=weights.get("embed.types"),
        embed_norm=_norm(shape, weights, "embed.norm") if "embed.norm.weight" in weights else None,
        final_norm=_norm(shape, weights, "final_norm") if "final_norm.weight" in weights else None,
        lm_head=Linear(weights["lm_head.weight"]) if "lm_head.weight" in weights else None)
