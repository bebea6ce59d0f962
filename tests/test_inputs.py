"""Every input form we read, from the committed fixtures/, against the reference library's own loading."""
from pathlib import Path

import pytest
import torch
import transformers as tf

from attncompress import api
from conftest import load_model, load_weights

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
HF_LAYER = {"attn_norm.weight": "input_layernorm.weight", "ff_norm.weight": "post_attention_layernorm.weight",
            **{f"attn.{m}.weight": f"self_attn.{m}_proj.weight" for m in "qkvo"},
            **{f"ff.{m}.weight": f"mlp.{m}_proj.weight" for m in ("gate", "up", "down")}}
HF_GLOBAL = {"embed.tokens": "model.embed_tokens.weight", "final_norm.weight": "model.norm.weight",
             "lm_head.weight": "lm_head.weight"}


def _hf_name(canonical: str) -> str:
    """Our canonical llama name → transformers' (written from transformers' LlamaForCausalLM parameter names)."""
    if canonical in HF_GLOBAL:
        return HF_GLOBAL[canonical]
    _, layer, rest = canonical.split(".", 2)
    return f"model.layers.{layer}.{HF_LAYER[rest]}"


def _assert_same_weights(path, ref, **heads):
    _, ours, *_ = load_weights(path, **heads)
    theirs = ref.state_dict()
    assert {_hf_name(n) for n in ours} == {n for n in theirs if n != "lm_head.weight" or not ref.config.tie_word_embeddings}
    for name, t in ours.items():
        # source: the tensors transformers loads from the same file (same dequantisation, same row order)
        assert torch.equal(t, theirs[_hf_name(name)]), name


def _assert_same_logits(path, ref, vocab, **heads):
    ids = torch.randint(0, vocab, (2, 24), generator=torch.Generator().manual_seed(9))
    with torch.no_grad():
        # source: transformers' LlamaForCausalLM forward on its own loading of the file
        torch.testing.assert_close(load_model(path, **heads).model(ids), ref(ids).logits, atol=1e-5, rtol=0)


@pytest.mark.parametrize("form", ["llama-dir", "llama-sharded", "llama-bin"])
def test_model_directories_match_transformers(form):
    ref = tf.AutoModelForCausalLM.from_pretrained(FIXTURES / form).eval()
    _assert_same_weights(FIXTURES / form, ref)
    _assert_same_logits(FIXTURES / form, ref, 96)


def test_bare_safetensors_file_matches_the_directory():
    ref = tf.AutoModelForCausalLM.from_pretrained(FIXTURES / "llama-dir").eval()
    _assert_same_weights(FIXTURES / "llama.safetensors", ref, heads=4, kv_heads=2)
    _assert_same_logits(FIXTURES / "llama.safetensors", ref, 96, heads=4, kv_heads=2)
    r = api.inspect(str(FIXTURES / "llama.safetensors"), heads=4, kv_heads=2)
    assert (r["format"], r["shape"]["n_heads"], r["shape"]["n_kv_heads"]) == ("safetensors", 4, 2)


@pytest.mark.parametrize("name,tied", [("llama-f16.gguf", True), ("llama-q8_0.gguf", False)])
def test_gguf_files_match_transformers_gguf_loading(name, tied):
    ref = tf.AutoModelForCausalLM.from_pretrained(FIXTURES, gguf_file=name, dtype=torch.float32).eval()
    assert ref.config.tie_word_embeddings is tied  # transformers' rule: no output.weight → tied
    _assert_same_weights(FIXTURES / name, ref)
    _assert_same_logits(FIXTURES / name, ref, ref.config.vocab_size)
    ours = load_model(FIXTURES / name).tokenizer
    theirs = tf.AutoTokenizer.from_pretrained(FIXTURES, gguf_file=name)
    text = "The quick brown fox: naïve café 42"
    # source: transformers' GGUF tokenizer conversion of the same file
    assert ours.encode(text).ids == theirs(text, add_special_tokens=False)["input_ids"]
