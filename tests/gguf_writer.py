"""Test helper: write a small llama checkpoint (HF tensor names) as a GGUF file.

Not a test file. The layout follows what transformers' GGUF loader reads back:
GGUF tensor names, `llama.*` metadata keys, a "gpt2" (byte-level BPE)
tokenizer, and q/k rows in GGUF's interleaved rotary order.
"""
from __future__ import annotations

import re

import gguf
import numpy as np
import torch

_QTYPES = {
    "F32": (gguf.GGMLQuantizationType.F32, gguf.LlamaFileType.ALL_F32),
    "F16": (gguf.GGMLQuantizationType.F16, gguf.LlamaFileType.MOSTLY_F16),
    "Q8_0": (gguf.GGMLQuantizationType.Q8_0, gguf.LlamaFileType.MOSTLY_Q8_0),
    "Q4_1": (gguf.GGMLQuantizationType.Q4_1, gguf.LlamaFileType.MOSTLY_Q4_1),
}

# HF llama name -> GGUF name ({} is the layer index); ".weight"/".bias" is kept as is.
_LAYER_NAMES = {
    "input_layernorm": "attn_norm",
    "self_attn.q_proj": "attn_q",
    "self_attn.k_proj": "attn_k",
    "self_attn.v_proj": "attn_v",
    "self_attn.o_proj": "attn_output",
    "post_attention_layernorm": "ffn_norm",
    "mlp.gate_proj": "ffn_gate",
    "mlp.up_proj": "ffn_up",
    "mlp.down_proj": "ffn_down",
}
_GLOBAL_NAMES = {"model.embed_tokens": "token_embd", "model.norm": "output_norm", "lm_head": "output"}


def write_llama_gguf(path, tensors: dict[str, torch.Tensor], config: dict, *, tokens: list[str],
                     merges: list[str], token_types: list[int] | None = None, qtype: str = "F32") -> None:
    """Write a llama model given by HF-named tensors to a GGUF file.

    Args:
        path: the file to write.
        tensors: HF llama names -> tensors, e.g. `model.layers.0.self_attn.q_proj.weight`:
            (heads * head_dim, hidden); `lm_head.weight` optional (absent = tied embeddings).
        config: LlamaConfig-style dict (hidden_size, num_attention_heads, num_key_value_heads,
            num_hidden_layers, intermediate_size, rms_norm_eps, rope_theta, vocab_size,
            max_position_embeddings; optional head_dim, bos_token_id, eos_token_id, add_bos_token).
        tokens: byte-level BPE vocabulary, index = token id.
        merges: merge rules "left right", highest priority first.
        token_types: gguf.TokenType per token (3 = control); default all 1 (normal).
        qtype: "F32", "F16", "Q8_0" or "Q4_1" for 2-D weights; 1-D tensors stay F32.

    Raises:
        ValueError: unknown qtype or tensor name, or a row length that is not a
            multiple of the quantisation block size.
    """
    if qtype not in _QTYPES:
        raise ValueError(f"qtype {qtype!r}; expected one of {sorted(_QTYPES)}")
    ggml_type, file_type = _QTYPES[qtype]
    n_head = config["num_attention_heads"]
    n_kv = config.get("num_key_value_heads", n_head)
    head_dim = config.get("head_dim") or config["hidden_size"] // n_head

    w = gguf.GGUFWriter(str(path), "llama")
    w.add_context_length(config["max_position_embeddings"])
    w.add_embedding_length(config["hidden_size"])
    w.add_block_count(config["num_hidden_layers"])
    w.add_feed_forward_length(config["intermediate_size"])
    w.add_head_count(n_head)
    w.add_head_count_kv(n_kv)
    w.add_rope_dimension_count(head_dim)
    w.add_rope_freq_base(config["rope_theta"])
    w.add_layer_norm_rms_eps(config["rms_norm_eps"])
    w.add_vocab_size(config["vocab_size"])
    w.add_file_type(file_type)

    w.add_tokenizer_model("gpt2")
    w.add_tokenizer_pre("gpt2")
    w.add_token_list(tokens)
    w.add_token_types(token_types if token_types is not None else [gguf.TokenType.NORMAL] * len(tokens))
    w.add_token_merges(merges)
    if config.get("bos_token_id") is not None:
        w.add_bos_token_id(config["bos_token_id"])
    if config.get("eos_token_id") is not None:
        w.add_eos_token_id(config["eos_token_id"])
    w.add_add_bos_token(bool(config.get("add_bos_token", False)))

    for hf_name, t in tensors.items():
        name = _gguf_name(hf_name)
        arr = t.detach().to("cpu", torch.float32).numpy()
        # GGUF stores q/k with the two rotary halves of each head interleaved.
        if ".attn_q." in name:
            arr = _permute_rotary(arr, n_head)
        elif ".attn_k." in name:
            arr = _permute_rotary(arr, n_kv)
        data, raw_dtype = _encode(arr, ggml_type, name)
        w.add_tensor(name, data, raw_dtype=raw_dtype)

    w.write_header_to_file()
    w.write_kv_data_to_file()
    w.write_tensors_to_file()
    w.close()


def _gguf_name(hf_name: str) -> str:
    """Map one HF llama tensor name to its GGUF name."""
    base, _, suffix = hf_name.rpartition(".")
    m = re.fullmatch(r"model\.layers\.(\d+)\.(.+)", base)
    if m and m.group(2) in _LAYER_NAMES:
        return f"blk.{m.group(1)}.{_LAYER_NAMES[m.group(2)]}.{suffix}"
    if base in _GLOBAL_NAMES:
        return f"{_GLOBAL_NAMES[base]}.{suffix}"
    raise ValueError(f"tensor {hf_name!r} is not a llama tensor name this writer knows")


def _permute_rotary(arr: np.ndarray, n: int) -> np.ndarray:
    """HF half-split rotary rows -> GGUF interleaved rows (inverse of the loader's undo)."""
    hd = arr.shape[0] // n
    return arr.reshape(n, 2, hd // 2, *arr.shape[1:]).swapaxes(1, 2).reshape(arr.shape)


def _encode(arr: np.ndarray, ggml_type: gguf.GGMLQuantizationType, name: str) -> tuple:
    """Return (data, raw_dtype) for GGUFWriter.add_tensor; 1-D tensors stay F32."""
    if arr.ndim < 2 or ggml_type == gguf.GGMLQuantizationType.F32:
        return arr, None
    if ggml_type == gguf.GGMLQuantizationType.F16:
        return arr.astype(np.float16), None
    block = gguf.GGML_QUANT_SIZES[ggml_type][0]
    if arr.shape[-1] % block:
        raise ValueError(f"tensor {name!r}: row length {arr.shape[-1]} is not a multiple of "
                         f"{ggml_type.name} block size {block}")
    return gguf.quants.quantize(arr, ggml_type), ggml_type
