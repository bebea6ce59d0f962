"""What each cut costs in loss: output sensitivities from one backward pass, and the price of every unit of rank.

Shape legend: b batch, s positions, d d_model, f d_ff, hd head_dim, p = hd/2 rotary pairs, h query heads,
g key/value groups, rep = h / g, n positions seen, m loss terms (scored tokens, or sentences).

The loss model (DESIGN.md, "Pricing a cut in one unit"). S is the summed calibration loss over m terms and
G_t = ∂S/∂y_t the gradient at the output y_t of one matrix, at position t. To second order, with the
diagonal Fisher in place of the Hessian (the model is near a minimum, so the first-order term averages
out), an output change δy raises the mean loss by about

    ½ Σ_t Σ_j G_tj² δy_tj² / m.

Feed-forward and value-output matrices: treating gradients and inputs as independent,
Σ_t G_tj² δy_tj² ≈ F_j Σ_t δy_tj² with F_j = Σ_t G_tj² / n, and Σ_t δy_tj² = ‖(δW L)_j‖² for the input Gram
Σ_t x_t x_tᵀ = L Lᵀ. So dropping singular component k of diag(√F) W L (σ̃_k) costs σ̃_k² / (2m), and the
truncation of that weighted matrix is the best one for this objective (Eckart–Young in weighted norms).
Rotary pairs: dropping pair i of group g zeroes rows of q and k, δy = −y on them, so its second-order
price is Σ_t (G_tj y_tj)² / (2m) summed over those rows (no independence assumption), times
`PAIR_PRICE_SCALE` (1: a larger one helped SmolLM2's cut alone and hurt it after the tune, see the
constant). A query-key rank of a
family without rotary embeddings is priced by the same loss as zeroing the whole query output, spread
over the form's whitened singular values in proportion to σ_k² (an approximation: the scores have no
gradient of their own here), times `FORM_PRICE_SCALE`: measured on the built-in MiniLM, that second-order
price of the query output makes query-key ranks about 16 times too cheap against the other kinds (see the
constant).

Decoders: S is the next-token cross-entropy with the text's own tokens (the empirical Fisher). Encoders:
S = Σ_sentences zᵀ ê with ê the normalised pooled embedding and z ~ N(0, I) drawn once per sentence, so
E[G G] is the Gauss–Newton diagonal of ½‖δê‖², and a price is the expected rise of 1 − cos(ê, ê').
"""
from __future__ import annotations

from dataclasses import dataclass, field

import torch
import torch.nn.functional as F

from .shape import ModelShape

KINDS = ("q", "k", "v", "o", "gate", "up", "down")
# How much more a query-key rank of a family without rotary embeddings costs than the second-order price of
# the query output says. Measured on the built-in MiniLM (benchmarks/scans/encoder_cut_scan.py, figures in
# benchmarks/results/scans.md): with the plain price the `loss` strategy cut each head's form to rank 4–10 of
# 32 and kept every value-output rank; scaling the query-key prices by 4 / 8 / 16 / 32 / 64 / ∞ (never cut)
# at keep 0.7 moved the training-free mean cosine on license paragraphs 0.855 → 0.872 / 0.878 / 0.880 /
# 0.874 / 0.872 / 0.868 (pydoc paragraphs 0.921 → 0.938 / 0.943 / 0.944 / 0.941 / 0.938 / 0.934); 16 also
# helps at keep 0.8 (0.886 → 0.923) and 0.5 (0.761 → 0.776). Why (a reading, not measured): zeroing the
# queries makes the attention uniform, far from where the quadratic model of the loss holds. Rotary pairs
# are priced exactly and are not scaled.
FORM_PRICE_SCALE = 16.0
# The same for a rotary pair (the second-order price of zeroing its query and key rows). Measured on the
# built-in SmolLM2 at keep 0.7, the README demo's calibration text (benchmarks/scans/demo_cut_scan.py, figures
# in benchmarks/results/scans.md), perplexity ratio of the cut alone on pydoc / license text: scale 1 →
# 3.299× / 5.667×, 4 → 3.153× / 5.234×, 16 → 3.188× / 5.277×. But after the demo's tune the scale-4 cut came
# out worse: 3.076× / 3.462× on 4096 tokens against 2.989× / 3.316× at scale 1 (the README's first command in a
# fresh clone, benchmarks/results/readme_demo_pair4.txt against readme_demo.txt): the pairs it keeps cost
# feed-forward ranks, which the tune wins back less well. So a decoder's pairs keep their second-order price.
PAIR_PRICE_SCALE = 1.0
_FLOOR = 1e-6  # relative floor of an output scale: a channel no gradient reached keeps a tiny weight


@dataclass
class LayerSensitivity:
    """One layer's output sensitivities (float64), summed over the calibration positions."""
    grad_sq: dict[str, torch.Tensor] = field(default_factory=dict)  # kind → (d_out,) Σ_t G_tj²
    drop_sq: dict[str, torch.Tensor] = field(default_factory=dict)  # "q", "k" → (rows,) Σ_t (G_tj y_tj)²
    positions: int = 0  # n
    terms: int = 0  # m, the loss terms of the whole calibration set (the same for every layer)

    def to_tensors(self) -> dict[str, torch.Tensor]:
        """Flat tensors for a safetensors scratch file."""
        out = {f"grad_sq.{k}": v for k, v in self.grad_sq.items()}
        out.update({f"drop_sq.{k}": v for k, v in self.drop_sq.items()})
        out["counts"] = torch.tensor([self.positions, self.terms])
        return out

    @classmethod
    def from_tensors(cls, t: dict[str, torch.Tensor]) -> "LayerSensitivity":
        n, m = (int(x) for x in t["counts"])
        return cls({k.split(".", 1)[1]: v for k, v in t.items() if k.startswith("grad_sq.")},
                   {k.split(".", 1)[1]: v for k, v in t.items() if k.startswith("drop_sq.")}, n, m)


def projections(blk) -> dict[str, torch.nn.Module]:
    """The block's matrices by kind (gate only when the feed-forward is gated)."""
    mods = {"q": blk.attn.q, "k": blk.attn.k, "v": blk.attn.v, "o": blk.attn.o, "up": blk.ff.up,
            "down": blk.ff.down}
    if hasattr(blk.ff, "gate"):
        mods["gate"] = blk.ff.gate
    return mods


def sensitivity_hooks(blk, sens: LayerSensitivity) -> list:
    """Hooks that add each projection's Σ G² (and for q, k Σ (G y)²) into `sens` during a backward pass."""
    def forward(kind):
        def hook(_m, _args, y):
            if not y.requires_grad:
                return
            yd = y.detach()

            def backward(grad):
                g2 = grad.detach().reshape(-1, grad.shape[-1]).double()  # (n, d_out)
                sens.grad_sq[kind] = sens.grad_sq.get(kind, 0) + g2.pow(2).sum(0)
                if kind in ("q", "k"):
                    gy = g2 * yd.reshape(-1, yd.shape[-1]).double()
                    sens.drop_sq[kind] = sens.drop_sq.get(kind, 0) + gy.pow(2).sum(0)
            y.register_hook(backward)
        return hook
    return [m.register_forward_hook(forward(kind)) for kind, m in projections(blk).items()]


def calibration_loss(top, hidden: torch.Tensor, ids: torch.Tensor, seed: int, start: int,
                     real: torch.Tensor | None = None) -> tuple[torch.Tensor, int]:
    """The summed loss S of one batch from the last block's output, and its number of terms.

    Args:
        top: the runtime's head (a `Transformer` built without blocks: final norm and output head).
        hidden: (b, s, d) last block output, requiring grad.
        ids: (b, s) the batch's token ids.
        seed, start: the encoder's random directions come from `seed` and the batch's first row `start`.
        real: (b, s) real tokens of padded sentences (encoders), or None.
    Returns:
        (S, m): decoders the summed next-token cross-entropy over b·(s − 1) targets; encoders Σ zᵀ ê over b
        sentences (mean pooling over the real tokens, as `embed` pools).
    """
    if top.is_decoder:
        x = top.final_norm(hidden) if top.final_norm is not None else hidden
        logits = top.logits(x)  # (b, s, V)
        s = F.cross_entropy(logits[:, :-1].reshape(-1, logits.shape[-1]).float(), ids[:, 1:].reshape(-1),
                            reduction="sum")
        return s, ids[:, 1:].numel()
    m = torch.ones(hidden.shape[:2]) if real is None else real.to(hidden.dtype)  # (b, s)
    pooled = (hidden * m[..., None]).sum(1) / m.sum(1, keepdim=True).clamp_min(1.0)  # (b, d) over real tokens
    e = F.normalize(pooled, dim=-1)  # (b, d) normalised mean-pooled embedding
    gen = torch.Generator().manual_seed(seed * 1_000_003 + start)
    z = torch.randn(e.shape, generator=gen, dtype=e.dtype)  # (b, d) one direction per sentence
    return (z * e).sum(), e.shape[0]


def output_scale(sens: LayerSensitivity, kind: str) -> torch.Tensor:
    """√F per output channel of one matrix, F_j = Σ_t G_tj² / n: the weights of its truncation (float64).

    Example: Σ G² = [4, 0, 16] over n = 4 positions → F = [1, 0, 4] → [1.0, 0.0013, 2.0]: the floor
    (1e-6 of the mean F) keeps a channel no gradient reached slightly weighted, so diag(√F) stays invertible.
    """
    f = sens.grad_sq[kind].double() / max(sens.positions, 1)
    f = f.clamp_min(_FLOOR * float(f.mean().clamp_min(1e-300)))
    return f.sqrt()


def pair_prices(shape: ModelShape, sens: LayerSensitivity) -> torch.Tensor:
    """Loss price of dropping each rotary pair of each key/value group: (g, p), `PAIR_PRICE_SCALE` times the
    second-order Σ (G y)² / (2m) of its rows.

    Rows i and i + p of each head hold pair i (`rotate_half` layout); a group's queries and its key lose the pair.
    Example: one group of one head, head_dim 4, Σ (G q)² = [1, 2, 3, 4], Σ (G k)² = 0, m = 1 → pairs
    [(1 + 3) / 2, (2 + 4) / 2] = [2, 3] (times PAIR_PRICE_SCALE).
    """
    h, g, p = shape.n_heads, shape.n_kv_heads, shape.head_dim // 2
    q = sens.drop_sq["q"].reshape(h, 2, p).sum(1).reshape(g, shape.q_per_kv, p).sum(1)  # (g, p)
    k = sens.drop_sq["k"].reshape(g, 2, p).sum(1)  # (g, p)
    return PAIR_PRICE_SCALE * (q + k) / (2 * max(sens.terms, 1))


def query_drop_price(sens: LayerSensitivity) -> float:
    """Second-order loss price of zeroing the whole query output of the layer: Σ_tj (G_tj q_tj)² / (2m)."""
    return float(sens.drop_sq["q"].sum()) / (2 * max(sens.terms, 1))


def form_price(sens: LayerSensitivity) -> float:
    """What a layer's query-key forms (without rotary embeddings) are priced at in all: `FORM_PRICE_SCALE` times
    `query_drop_price`. Example: Σ (G q)² = 4 over m = 2 terms → 1.0 → 16.0."""
    return FORM_PRICE_SCALE * query_drop_price(sens)


def price(sigma: torch.Tensor, sens: LayerSensitivity) -> torch.Tensor:
    """Prices σ̃² / (2m) of singular values of an output-weighted, whitened matrix. Example: σ̃ [2, 1], m 2 → [1, 0.25]."""
    return sigma.double().pow(2) / (2 * max(sens.terms, 1))
