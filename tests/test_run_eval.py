"""Perplexity of each evaluation text on its own, in `compare` and `run`, against the reference library."""
import math

import pytest
import torch

from attncompress import api, corpora
from attncompress.compare import compare
from conftest import WORDS


def _text_file(path, seed, n=400):
    g = torch.Generator().manual_seed(seed)
    ids = torch.randint(0, len(WORDS), (n,), generator=g).tolist()
    path.write_text(" ".join(WORDS[i] for i in ids) + "\n", encoding="utf-8")
    return path


def _reference_perplexity(directory, text_path, max_tokens):
    """exp(mean next-token cross-entropy) of the reference model on the first max_tokens tokens, in one window."""
    import transformers as tf
    from tokenizers import Tokenizer
    tok = Tokenizer.from_file(str(directory / "tokenizer.json"))
    ids = torch.tensor([tok.encode(text_path.read_text()).ids[:max_tokens]])
    m = tf.AutoModelForCausalLM.from_pretrained(directory).eval()
    with torch.no_grad():
        return math.exp(float(m(ids, labels=ids).loss))  # transformers shifts the labels itself


@pytest.fixture
def two_texts(tmp_path):
    return _text_file(tmp_path / "one.txt", 1), _text_file(tmp_path / "two.txt", 2, 900)


def test_compare_scores_each_text_on_its_own(tiny_dirs, tmp_path, two_texts):
    d, _ = tiny_dirs["llama"]
    api.compress(str(d), str(tmp_path / "c"), keep=0.6, weights_only=True, quiet=True)
    api.expand(str(tmp_path / "c"), str(tmp_path / "x"))
    q = compare(str(d), str(tmp_path / "c"), [str(t) for t in two_texts], max_tokens=300, speed_runs=0)["quality"]
    assert [t["name"] for t in q["per_text"]] == ["one.txt", "two.txt"] and all(t["tokens"] == 299 for t in q["per_text"])
    for entry, text in zip(q["per_text"], two_texts):
        assert entry["a"] == pytest.approx(_reference_perplexity(d, text, 300), rel=1e-4)
        assert entry["b"] == pytest.approx(_reference_perplexity(tmp_path / "x", text, 300), rel=1e-4)
    # over all texts: the mean nats per token over both texts' scored tokens
    nll = sum(math.log(t["b"]) * t["tokens"] for t in q["per_text"]) / q["tokens"]
    assert q["b"] == pytest.approx(math.exp(nll), rel=1e-9)


def test_run_reports_original_compressed_and_tuned_for_each_text(tiny_dirs, tmp_path, two_texts):
    d, _ = tiny_dirs["llama"]
    train = _text_file(tmp_path / "train.txt", 3, 3000)
    r = api.run(str(d), str(tmp_path / "job"), keep=0.6, texts=[str(train)], eval_texts=[str(t) for t in two_texts],
                blend="text", steps=3, context=16, max_eval_tokens=300, decode_weights="float32", quiet=True)
    per = r["compare"]["quality"]["per_text"]
    assert r["compare"]["speed"]["decode_weights"] == "float32"  # passed through to compare's speed section
    for name in ("compressed", "tuned"):
        api.expand(str(tmp_path / "job" / name), str(tmp_path / f"x-{name}"))
    for entry, text in zip(per, two_texts):
        assert entry["a"] == pytest.approx(_reference_perplexity(d, text, 300), rel=1e-4)
        assert entry["compressed"] == pytest.approx(_reference_perplexity(tmp_path / "x-compressed", text, 300), rel=1e-4)
        assert entry["b"] == pytest.approx(_reference_perplexity(tmp_path / "x-tuned", text, 300), rel=1e-4)
    assert (tmp_path / "job" / "report" / "quality.png").is_file()
    md = (tmp_path / "job" / "report" / "report.md").read_text()
    assert "perplexity one.txt" in md and "perplexity two.txt" in md and "compressed, before tuning" in md
    assert set(r["seconds"]) == {"sampling", "compress", "tune", "compare"}


def test_run_refuses_a_bad_decode_weights_choice_before_any_work(tiny_dirs, tmp_path):
    from attncompress.errors import CompressError
    d, _ = tiny_dirs["llama"]
    with pytest.raises(CompressError, match="--decode-weights"):
        api.run(str(d), str(tmp_path / "job"), keep=0.6, texts=["/nonexistent.txt"], decode_weights="int4",
                quiet=True)
    assert not (tmp_path / "job").exists()


@pytest.mark.parametrize("family,kind", [("llama", "decoder"), ("bert", "encoder")])
def test_run_tunes_for_the_steps_of_the_model_kind_by_default(tiny_dirs, tmp_path, monkeypatch, family, kind):
    """`run` without steps: RUN_STEPS of the model's kind reaches the tune (stopped there; nothing is left)."""
    seen = {}

    def stop(*args, **kw):
        seen["steps"] = kw["steps"]
        raise RuntimeError("stopped by the test")
    monkeypatch.setattr(api.tunelib, "tune", stop)
    d, _ = tiny_dirs[family]
    train = _text_file(tmp_path / "train.txt", 3, 3000)
    words = train.read_text().split()
    train.write_text("\n".join(" ".join(words[i:i + 10]) for i in range(0, len(words), 10)), encoding="utf-8")
    with pytest.raises(RuntimeError, match="stopped by the test"):
        api.run(str(d), str(tmp_path / "job"), keep=0.6, texts=[str(train)], blend="text", quiet=True)
    assert seen["steps"] == api.RUN_STEPS[kind] and not (tmp_path / "job").exists()


def test_corpora_of_one_source_are_named_so():
    # Source: attncompress.corpora's own definition of the parts (two halves of pydoc_data.topics.topics).
    assert corpora.same_source("corpus:pydoc-heldout", "corpus:pydoc-calibration") == "the Python language reference"
    assert corpora.same_source("corpus:licenses", "corpus:pydoc-calibration") is None
    assert corpora.same_source("corpus:pydoc-heldout", "notes/pydoc-calibration.txt") is None
    assert corpora.same_source("corpus:samples", "corpus:samples") is None  # not a bundled corpus
