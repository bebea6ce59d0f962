"""The frozen description of a model's shape, shared by every stage."""
from __future__ import annotations

import dataclasses
import json
from dataclasses import dataclass

from .errors import CompressError

FAMILIES = ("llama", "gpt2", "bert")


@dataclass(frozen=True)
class ModelShape:
    family: str  # runtime family: "llama" (rotary decoder), "gpt2" or "bert"
    n_layers: int
    d_model: int
    n_heads: int  # query heads
    n_kv_heads: int  # key/value heads; n_heads for families without grouped-query attention
    head_dim: int  # width of one original head; fixes the softmax scale 1/sqrt(head_dim) forever
    d_ff: int
    vocab_size: int
    rope_theta: float | None = None  # None: no rotary embeddings
    norm_eps: float = 1e-5
    tied_embeddings: bool = True  # no separate output matrix (reuses the token embedding; BERT has none)
    max_positions: int = 0  # rows of a learned position table (0: none)
    type_vocab_size: int = 0  # BERT token types (0: none)
    qkv_bias: bool = False  # query/key/value projections carry biases
    o_bias: bool = False  # the attention output projection carries a bias in the source
    mlp_bias: bool = False
    gated: bool = True  # gated feed-forward (gate, up, down) or plain (up, down)
    activation: str = "silu"  # "silu", "gelu" (erf) or "gelu_tanh"
    norm: str = "rms"  # "rms" or "layer"
    pre_norm: bool = True  # False: BERT's post-norm residual blocks
    causal: bool = True

    def __post_init__(self):
        if self.family not in FAMILIES:
            raise CompressError(f"model shape: unknown family {self.family!r}; expected one of {', '.join(FAMILIES)}")
        for name in ("n_layers", "d_model", "n_heads", "n_kv_heads", "head_dim", "d_ff", "vocab_size"):
            if getattr(self, name) <= 0:
                raise CompressError(f"model shape: {name} must be positive, got {getattr(self, name)}")
        if self.n_heads % self.n_kv_heads:
            raise CompressError(
                f"model shape: {self.n_heads} query heads cannot share {self.n_kv_heads} key/value heads evenly")
        if self.rope_theta is not None and self.head_dim % 2:
            raise CompressError(f"model shape: rotary embeddings need an even head width, got {self.head_dim}")

    @property
    def q_per_kv(self) -> int:
        return self.n_heads // self.n_kv_heads

    @property
    def rotary(self) -> bool:
        return self.rope_theta is not None

    @property
    def is_decoder(self) -> bool:
        """A causal language model with an output head (llama, gpt2); False for an encoder (bert)."""
        return self.causal

    @property
    def final_norm(self) -> bool:
        """A norm after the last block: a pre-norm residual stream is never normalised otherwise."""
        return self.pre_norm

    @property
    def embed_norm(self) -> bool:
        """A norm on the embeddings: post-norm blocks (BERT) do not normalise their first input themselves."""
        return not self.pre_norm

    @property
    def ff_kinds(self) -> tuple[str, ...]:
        """The feed-forward matrices: ("gate", "up", "down") when gated, else ("up", "down")."""
        return ("gate", "up", "down") if self.gated else ("up", "down")

    @property
    def n_pairs(self) -> int:
        """Rotary frequency pairs per head (0 without rotary)."""
        return self.head_dim // 2 if self.rotary else 0

    def kv_bytes(self, widths, bytes_per_element: int = 4) -> int:
        """Key and value bytes one token adds to the cache: Σ_layers n_kv_heads·(w_qk + w_vo)·bytes.

        The one place the cache size is computed; `widths` gives (w_qk, w_vo) per layer, the key and value
        widths of one key/value head as stored. Example: 2 kv heads, widths [(8, 8), (4, 6)], 4 bytes → 208.
        """
        return sum(self.n_kv_heads * (w_qk + w_vo) for w_qk, w_vo in widths) * bytes_per_element

    def to_json(self) -> str:
        return json.dumps(dataclasses.asdict(self), indent=2, sort_keys=True)

    @classmethod
    def from_json(cls, text: str | dict) -> "ModelShape":
        data = json.loads(text) if isinstance(text, str) else dict(text)
        known = {f.name for f in dataclasses.fields(cls)}
        extra = sorted(set(data) - known)
        if extra:
            raise CompressError(f"model shape: unknown fields {', '.join(extra)}")
        return cls(**data)


# Tiny named shapes for tests and examples: 2 layers, width 32, 4 query heads on 2 kv heads.
TINY = {
    "llama": ModelShape(family="llama", n_layers=2, d_model=32, n_heads=4, n_kv_heads=2, head_dim=8, d_ff=64,
                        vocab_size=96, rope_theta=10000.0, norm_eps=1e-5, tied_embeddings=False),
    "gpt2": ModelShape(family="gpt2", n_layers=2, d_model=32, n_heads=4, n_kv_heads=4, head_dim=8, d_ff=128,
                       vocab_size=96, norm_eps=1e-5, max_positions=64, qkv_bias=True, o_bias=True, mlp_bias=True,
                       gated=False, activation="gelu_tanh", norm="layer"),
    "bert": ModelShape(family="bert", n_layers=2, d_model=32, n_heads=4, n_kv_heads=4, head_dim=8, d_ff=64,
                       vocab_size=96, norm_eps=1e-12, max_positions=64, type_vocab_size=2, qkv_bias=True,
                       o_bias=True, mlp_bias=True, gated=False, activation="gelu", norm="layer", pre_norm=False,
                       causal=False, tied_embeddings=True),
}
