"""The number format a model directory stores its weights in, and the way back to float32 at load.

The runtime computes in float32 whatever is stored: on this project's CPU a one-row product reads a
float32 matrix at near the memory bandwidth, but runs 1.6x slower from bfloat16 and 2.3x slower through
torch's int8 weight-only kernel (issue 14's measurement), so narrower storage is widened once when loading.

Formats (`--dtype`):
- float32, bfloat16, float16: every floating tensor cast (round to nearest even).
- int8: symmetric per-output-channel weight-only quantisation of every matrix (2-D floating tensor: factors,
  dense projections, embedding tables). Matrix NAME is stored as `NAME.q` (int8, its shape) and
  `NAME.scale` (float32, 1 along the input axis), with NAME ≈ NAME.q · NAME.scale and
  NAME.scale = max |row| / 127 for each output channel. The output channel is the row of a (d_out, d_in)
  matrix or of an `a` factor (d_out, r), and the column of a `b` factor (d_in, r) (x b gives r outputs).
  Vectors (norm weights, biases) stay float32.
"""
from __future__ import annotations

import torch

from ..errors import CompressError

DTYPES = {"float32": torch.float32, "bfloat16": torch.bfloat16, "float16": torch.float16, "int8": torch.int8}
QUANT, SCALE = ".q", ".scale"  # suffixes of an int8 matrix's two tensors
_WIDTHS = {"F64": "float32", "F32": "float32", "BF16": "bfloat16", "F16": "float16"}  # stored dtype → float kept


def check_dtype(name: str, option: str = "--dtype") -> str:
    """`name` if it is a storage format, else CompressError naming the choices."""
    if name not in DTYPES:
        raise CompressError(f"{option} {name!r}: unknown; expected one of {', '.join(DTYPES)}")
    return name


def source_width(dtypes_of_matrices: list[str]) -> str:
    """The default format for a source whose matrices (2-D tensors) are stored in these dtypes.

    The widest plain float among them; a source quantised below 16 bits (GGUF Q4_1 and the like) gets float16.
    Example: ["BF16", "BF16"] → "bfloat16"; ["F32", "F16"] → "float32"; ["Q4_1", "Q6_K"] → "float16".
    """
    kept = {_WIDTHS[d] for d in dtypes_of_matrices if d in _WIDTHS}
    for name in ("float32", "bfloat16", "float16"):
        if name in kept:
            return name
    return "float16"


def default_dtype(source, manifest: dict | None = None) -> str:
    """The format to write when none is asked for: a compressed directory's own, else `source_width` of the
    source's matrices (a TensorSource)."""
    if manifest is not None:
        return manifest.get("dtype", "float32")
    return source_width([source.dtype(n) for n in source.names() if len(source.shape(n)) == 2])


def _channel_axis(name: str) -> int:
    """The input axis, along which one output channel's weights lie: 0 for a `b` factor (d_in, r), else 1."""
    return 0 if name.endswith(".b") else 1


def quantise(w: torch.Tensor, name: str) -> tuple[torch.Tensor, torch.Tensor]:
    """Symmetric int8 per output channel: (q int8 of w's shape, scale float32 with 1 along the input axis).

    scale = max |w| over the channel / 127 (1 for an all-zero channel); q = round(w / scale), so |q| ≤ 127
    and |q · scale − w| ≤ scale / 2. Example: a row [0.5, −1.0, 0.25] → scale 1/127, q [64, −127, 32].
    """
    w64 = w.detach().double()
    amax = w64.abs().amax(dim=_channel_axis(name), keepdim=True)  # (d_out, 1) or (1, r)
    scale = torch.where(amax > 0, amax / 127.0, torch.ones_like(amax))
    q = torch.round(w64 / scale).clamp_(-127, 127).to(torch.int8)
    return q, scale.float()


def encode(name: str, t: torch.Tensor, dtype: str) -> list[tuple[str, torch.Tensor]]:
    """The tensors one canonical tensor is stored as in format `dtype` (see the module docstring).

    Raises:
        CompressError: a weight beyond float16's range (±65504) when writing float16.
    """
    if not t.is_floating_point():
        return [(name, t)]
    if dtype == "int8":
        if t.dim() == 2:
            q, scale = quantise(t, name)
            return [(name + QUANT, q), (name + SCALE, scale)]
        return [(name, t.float())]
    out = t.to(DTYPES[dtype])
    if dtype == "float16" and not torch.isfinite(out).all():
        raise CompressError(f"tensor {name}: values up to {float(t.abs().max()):.4g} do not fit float16 (±65504); "
                            "write --dtype bfloat16 or float32")
    return [(name, out)]


def encode_all(weights: dict[str, torch.Tensor], dtype: str) -> dict[str, torch.Tensor]:
    """`encode` over a dict of canonical tensors."""
    return {n: x for name, t in weights.items() for n, x in encode(name, t, dtype)}


def decode(names: list[str], get) -> dict[str, torch.Tensor]:
    """Canonical float32 tensors from stored ones: `get(name)` gives a stored tensor; int8 pairs multiply back."""
    out = {}
    have = set(names)
    for n in names:
        if n.endswith(QUANT) and n[:-len(QUANT)] + SCALE in have:
            base = n[:-len(QUANT)]
            out[base] = get(n).float() * get(base + SCALE).float()  # (d_out, d_in) · (d_out, 1) or (d_in, r) · (1, r)
        elif n.endswith(SCALE) and n[:-len(SCALE)] + QUANT in have:
            continue
        else:
            t = get(n)
            out[n] = t.to(torch.float32) if t.is_floating_point() else t
    return out
