"""The GGUF test-fixture writer, checked against transformers' own GGUF loading."""
import json

import gguf
import numpy as np
import pytest
import torch
from tokenizers import Tokenizer, models, pre_tokenizers, trainers
from transformers import AutoModelForCausalLM, AutoTokenizer, LlamaConfig, LlamaForCausalLM
from transformers.modeling_gguf_pytorch_utils import LlamaTensorProcessor

from attncompress.io.gguf_meta import read_metadata, tokenizer_from_gguf
from gguf_writer import write_llama_gguf

_SPECIALS = ["<|endoftext|>", "<|im_start|>", "<|im_end|>"]
_TEXT = [
    "The quick brown fox jumps over the lazy dog. 0123456789",
    "def f(x):\n    return x ** 2  # square\n\n\tindented\ttabs",
    "Ünïcödé: naïve café, 日本語, emoji 🤖, symbols ½ ∑ → ©.",
    "   leading spaces, trailing spaces   \n\n\nmany newlines and  double  spaces",
]


def _tiny_bpe():
    """A ~300-token byte-level BPE vocabulary trained on a few sentences."""
    tok = Tokenizer(models.BPE())
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    trainer = trainers.BpeTrainer(vocab_size=300, special_tokens=_SPECIALS, show_progress=False,
                                  initial_alphabet=pre_tokenizers.ByteLevel.alphabet())
    tok.train_from_iterator(_TEXT * 4, trainer)
    model = json.loads(tok.to_str())["model"]
    tokens = [t for t, _ in sorted(model["vocab"].items(), key=lambda kv: kv[1])]
    merges = [m if isinstance(m, str) else " ".join(m) for m in model["merges"]]
    types = [3 if t in _SPECIALS else 1 for t in tokens]
    return tokens, merges, types


def _tiny_llama(vocab_size, lm_head):
    """Seeded random HF-named llama tensors: 2 layers, hidden 32, 4 heads, 2 kv heads."""
    config = dict(hidden_size=32, num_attention_heads=4, num_key_value_heads=2, num_hidden_layers=2,
                  intermediate_size=64, rms_norm_eps=1e-5, rope_theta=10000.0, vocab_size=vocab_size,
                  max_position_embeddings=128, bos_token_id=1, eos_token_id=2)
    g = torch.Generator().manual_seed(0)
    shapes = {"model.embed_tokens.weight": (vocab_size, 32), "model.norm.weight": (32,)}
    for i in range(2):
        p = f"model.layers.{i}."
        shapes.update({p + "input_layernorm.weight": (32,), p + "post_attention_layernorm.weight": (32,),
                       p + "self_attn.q_proj.weight": (32, 32), p + "self_attn.k_proj.weight": (16, 32),
                       p + "self_attn.v_proj.weight": (16, 32), p + "self_attn.o_proj.weight": (32, 32),
                       p + "mlp.gate_proj.weight": (64, 32), p + "mlp.up_proj.weight": (64, 32),
                       p + "mlp.down_proj.weight": (32, 64)})
    if lm_head:
        shapes["lm_head.weight"] = (vocab_size, 32)
    tensors = {}
    for name, shape in shapes.items():
        t = torch.randn(shape, generator=g) * 0.2
        tensors[name] = 1.0 + 0.1 * t if name.endswith("norm.weight") else t
    return tensors, config


@pytest.fixture(scope="module")
def vocab():
    return _tiny_bpe()


def test_f32_weights_and_logits_match_transformers(tmp_path, vocab):
    tokens, merges, types = vocab
    tensors, config = _tiny_llama(len(tokens), lm_head=True)
    write_llama_gguf(tmp_path / "tiny.gguf", tensors, config, tokens=tokens, merges=merges, token_types=types)

    # Source: transformers' GGUF loader (config mapping, tensor names, q/k un-permutation).
    loaded = AutoModelForCausalLM.from_pretrained(str(tmp_path), gguf_file="tiny.gguf").eval()
    assert loaded.config.tie_word_embeddings is False
    state = loaded.state_dict()
    for name, t in tensors.items():
        # F32 round trip plus permute/undo must be exact.
        assert torch.equal(state[name], t), name

    ref = LlamaForCausalLM(LlamaConfig(**config, tie_word_embeddings=False)).eval()
    ref.load_state_dict(tensors, strict=True)
    ids = torch.randint(0, len(tokens), (2, 12), generator=torch.Generator().manual_seed(1))
    with torch.no_grad():
        # Source: LlamaForCausalLM forward on the same tensors; eps/theta pass through float32 in GGUF.
        torch.testing.assert_close(loaded(ids).logits, ref(ids).logits, rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("qtype", ["F16", "Q8_0", "Q4_1"])
def test_quantised_weights_within_block_error(tmp_path, vocab, qtype):
    tokens, merges, types = vocab
    tensors, config = _tiny_llama(len(tokens), lm_head=False)
    write_llama_gguf(tmp_path / "q.gguf", tensors, config, tokens=tokens, merges=merges,
                     token_types=types, qtype=qtype)

    reader = gguf.GGUFReader(str(tmp_path / "q.gguf"))
    kinds = {t.name: t.tensor_type.name for t in reader.tensors}
    assert kinds["blk.0.attn_q.weight"] == qtype and kinds["blk.0.attn_norm.weight"] == "F32"
    assert "output.weight" not in kinds

    loaded = AutoModelForCausalLM.from_pretrained(str(tmp_path), gguf_file="q.gguf")
    assert loaded.config.tie_word_embeddings is True  # no output.weight -> tied (transformers' rule)
    state = loaded.state_dict()
    for name, t in tensors.items():
        got = state[name]
        if t.ndim == 1:
            assert torch.equal(got, t), name
        elif qtype == "F16":
            assert torch.equal(got, t.half().float()), name  # source: torch's float16 rounding
        else:
            _assert_block_error(got, t, qtype, name)


def _assert_block_error(got, want, qtype, name):
    """Per 32-wide block, |error| <= 0.6 quantisation steps (0.5 from rounding, margin for the f16 scale)."""
    # Block formats from memory of ggml: Q8_0 step = max|x| / 127; Q4_1 step = (max - min) / 15, offset min.
    w, g = want.reshape(-1, 32).double(), got.reshape(-1, 32).double()
    if qtype == "Q8_0":
        step = w.abs().amax(1, keepdim=True) / 127
        slack = 0.0
    else:
        step = (w.amax(1, keepdim=True) - w.amin(1, keepdim=True)) / 15
        slack = w.amin(1, keepdim=True).abs() * 2.0 ** -10  # the block minimum is stored as float16
    assert ((g - w).abs() <= 0.6 * step + slack + 1e-7).all(), name


def test_qk_bias_is_permuted_like_weights(tmp_path, vocab):
    tokens, merges, types = vocab
    tensors, config = _tiny_llama(len(tokens), lm_head=False)
    g = torch.Generator().manual_seed(2)
    tensors["model.layers.0.self_attn.q_proj.bias"] = torch.randn(32, generator=g)
    tensors["model.layers.0.self_attn.k_proj.bias"] = torch.randn(16, generator=g)
    write_llama_gguf(tmp_path / "b.gguf", tensors, config, tokens=tokens, merges=merges, token_types=types)

    reader = gguf.GGUFReader(str(tmp_path / "b.gguf"))
    # Source: transformers' LlamaTensorProcessor, the loader's undo of the rotary permutation.
    undo = LlamaTensorProcessor(config={"num_attention_heads": 4, "num_key_value_heads": 2})
    stored = {t.name: np.array(t.data) for t in reader.tensors}
    for gguf_name, hf_name in [("blk.0.attn_q.bias", "model.layers.0.self_attn.q_proj.bias"),
                               ("blk.0.attn_k.bias", "model.layers.0.self_attn.k_proj.bias"),
                               ("blk.1.attn_k.weight", "model.layers.1.self_attn.k_proj.weight")]:
        back = undo.process(stored[gguf_name], gguf_name).weights
        np.testing.assert_array_equal(back, tensors[hf_name].numpy())
    assert not np.array_equal(stored["blk.0.attn_q.bias"], tensors["model.layers.0.self_attn.q_proj.bias"].numpy())


def test_writer_rejects_row_not_multiple_of_block(tmp_path, vocab):
    tokens, merges, types = vocab
    tensors, config = _tiny_llama(len(tokens), lm_head=False)
    tensors["model.layers.0.mlp.down_proj.weight"] = torch.zeros(32, 48)
    with pytest.raises(ValueError, match="not a multiple"):
        write_llama_gguf(tmp_path / "x.gguf", tensors, config, tokens=tokens, merges=merges, qtype="Q8_0")


def test_tokenizer_from_written_file_matches_transformers(tmp_path, vocab):
    tokens, merges, types = vocab
    tensors, config = _tiny_llama(len(tokens), lm_head=False)
    write_llama_gguf(tmp_path / "t.gguf", tensors, config, tokens=tokens, merges=merges, token_types=types)

    meta = read_metadata(gguf.GGUFReader(str(tmp_path / "t.gguf")))
    assert meta["tokenizer.ggml.tokens"] == tokens and meta["tokenizer.ggml.merges"] == merges
    ours = tokenizer_from_gguf(meta, str(tmp_path / "t.gguf"))
    # Source: transformers' GGUF tokenizer conversion of the same file.
    hf = AutoTokenizer.from_pretrained(str(tmp_path), gguf_file="t.gguf")
    texts = _TEXT + ["unseen words: zebra quixotic 42  7\n", "<|im_start|>user\nhi<|im_end|>"]
    for text in texts:
        enc = ours.encode(text)
        assert enc.ids == hf(text, add_special_tokens=False)["input_ids"], text
        assert ours.decode(enc.ids, skip_special_tokens=False) == text
