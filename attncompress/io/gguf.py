"""GGUF files, presented in the Hugging Face llama directory layout.

The GGUF llama writer permutes query and key rows so that rotary pairs are
interleaved (dimensions 2i, 2i+1); the directory layout pairs dimension i with
i + head_dim/2. `get` undoes the permutation so one runtime serves both.
"""
from __future__ import annotations

import mmap
from pathlib import Path

import numpy as np
import torch

from ..errors import CompressError
from .source import TensorSource

# GGUF tensor names → directory names, for the llama architecture.
_GLOBAL = {
    "token_embd.weight": "model.embed_tokens.weight",
    "output_norm.weight": "model.norm.weight",
    "output.weight": "lm_head.weight",
}
_LAYER = {
    "attn_norm.weight": "input_layernorm.weight",
    "attn_q.weight": "self_attn.q_proj.weight",
    "attn_k.weight": "self_attn.k_proj.weight",
    "attn_v.weight": "self_attn.v_proj.weight",
    "attn_output.weight": "self_attn.o_proj.weight",
    "attn_q.bias": "self_attn.q_proj.bias",
    "attn_k.bias": "self_attn.k_proj.bias",
    "attn_v.bias": "self_attn.v_proj.bias",
    "ffn_norm.weight": "post_attention_layernorm.weight",
    "ffn_gate.weight": "mlp.gate_proj.weight",
    "ffn_up.weight": "mlp.up_proj.weight",
    "ffn_down.weight": "mlp.down_proj.weight",
}
SUPPORTED_ARCHS = ("llama",)


def _dir_name(gguf_name: str) -> str | None:
    if gguf_name in _GLOBAL:
        return _GLOBAL[gguf_name]
    parts = gguf_name.split(".", 2)
    if len(parts) == 3 and parts[0] == "blk" and parts[1].isdigit() and parts[2] in _LAYER:
        return f"model.layers.{parts[1]}.{_LAYER[parts[2]]}"
    return None


def unpermute_rows(w: torch.Tensor, n_heads: int) -> torch.Tensor:
    """Undo GGUF's interleaved rotary row order for a (n_heads*head_dim, ...) weight or bias.

    Example: head_dim 4, rows [a0 b0 a1 b1] (pairs interleaved) → [a0 a1 b0 b1] (pair i is rows i, i+2).
    """
    out = w.shape[0]
    hd = out // n_heads
    return w.reshape(n_heads, hd // 2, 2, *w.shape[1:]).transpose(1, 2).reshape(w.shape)


class GGUFSource(TensorSource):
    format = "gguf"

    def __init__(self, path: Path):
        import gguf
        from .gguf_meta import read_metadata
        try:
            self._reader = gguf.GGUFReader(str(path))
        except Exception as e:  # the gguf package raises ValueError, struct.error, IndexError…
            raise CompressError(f"{path}: not a readable GGUF file ({e.__class__.__name__}: {str(e)[:100]})") from None
        self.meta = read_metadata(self._reader)
        arch = self.meta.get("general.architecture")
        if arch not in SUPPORTED_ARCHS:
            raise CompressError(f"{path}: GGUF architecture {arch!r} is not supported; expected one of {', '.join(SUPPORTED_ARCHS)}")
        super().__init__(path, self._config(path, arch))
        self._tensors = {}
        self.unused_gguf: list[str] = []
        for t in self._reader.tensors:
            name = _dir_name(t.name)
            if name is None:
                self.unused_gguf.append(t.name)
                name = t.name  # kept under its own name so the walker reports it
            if t.tensor_type.name not in _dequantisable():
                raise CompressError(f"{path}: tensor {t.name} has quantisation type {t.tensor_type.name}, which the "
                                    "installed gguf package cannot dequantise; expected a float type or a block "
                                    "quantisation it reads (e.g. Q4_0, Q4_K, Q6_K, Q8_0)")
            shape = tuple(int(d) for d in reversed(t.shape.tolist()))  # GGUF lists the fastest dimension first
            self._index[name] = (shape, t.tensor_type.name, path)
            self._tensors[name] = t

    def _config(self, path: Path, arch: str) -> dict:
        m = self.meta

        def need(key):
            if f"{arch}.{key}" not in m:
                raise CompressError(f"{path}: GGUF metadata lacks {arch}.{key}; expected it for a {arch} model")
            return m[f"{arch}.{key}"]
        n_heads = int(need("attention.head_count"))
        d = int(need("embedding_length"))
        names = {t.name for t in self._reader.tensors}
        vocab = m.get(f"{arch}.vocab_size") or len(m.get("tokenizer.ggml.tokens", [])) or None
        if vocab is None:
            raise CompressError(f"{path}: GGUF metadata gives no vocabulary size")
        return {
            "model_type": "llama",
            "architectures": ["LlamaForCausalLM"],
            "hidden_size": d,
            "num_hidden_layers": int(need("block_count")),
            "num_attention_heads": n_heads,
            "num_key_value_heads": int(m.get(f"{arch}.attention.head_count_kv", n_heads)),
            "head_dim": int(m.get(f"{arch}.rope.dimension_count", d // n_heads)),
            "intermediate_size": int(need("feed_forward_length")),
            "vocab_size": int(vocab),
            "rope_theta": float(m.get(f"{arch}.rope.freq_base", 10000.0)),
            "rms_norm_eps": float(m.get(f"{arch}.attention.layer_norm_rms_epsilon", 1e-5)),
            "max_position_embeddings": int(m.get(f"{arch}.context_length", 2048)),
            "tie_word_embeddings": "output.weight" not in names,
            "hidden_act": "silu",
            "attention_bias": "blk.0.attn_q.bias" in names,
            "bos_token_id": m.get("tokenizer.ggml.bos_token_id"),
            "eos_token_id": m.get("tokenizer.ggml.eos_token_id"),
        }

    def get(self, name: str) -> torch.Tensor:
        from gguf.quants import dequantize
        t = self._tensors[name]
        arr = np.asarray(dequantize(t.data, t.tensor_type), dtype=np.float32)
        w = torch.from_numpy(arr.reshape(self._index[name][0]).copy())
        del arr
        self._release(t)
        if name.endswith(("q_proj.weight", "q_proj.bias")):
            w = unpermute_rows(w, self.config["num_attention_heads"])
        elif name.endswith(("k_proj.weight", "k_proj.bias")):
            w = unpermute_rows(w, self.config["num_key_value_heads"])  # keys: the key/value head count
        return w

    def _release(self, t) -> None:
        """Drop the mapped pages of a tensor already copied out, so reading a whole file does not keep it resident."""
        mm = getattr(self._reader.data, "_mmap", None)  # the reader maps the whole file once
        if mm is None or not hasattr(mm, "madvise"):
            return
        page = mmap.PAGESIZE
        start = t.data_offset - t.data_offset % page  # madvise needs a page-aligned start
        try:
            mm.madvise(mmap.MADV_DONTNEED, start, min(t.data_offset + t.n_bytes, len(mm)) - start)
        except (OSError, ValueError):
            pass  # only a memory saving; reading goes on either way

    def tokenizer(self):
        from .gguf_meta import tokenizer_from_gguf
        return tokenizer_from_gguf(self.meta, str(self.path))


def _dequantisable() -> set[str]:
    """Quantisation types the installed gguf package can turn back into floats."""
    import gguf
    from gguf import quants
    ok = {"F32", "F16", "BF16", "F64"}
    for qt in gguf.GGMLQuantizationType:
        if qt in getattr(quants, "_type_traits", {}):
            ok.add(qt.name)
    return ok
