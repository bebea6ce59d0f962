"""`generate` and model samples as calibration text, on the tiny models, against the reference library."""
import hashlib
import json

import pytest
import torch
from click.testing import CliRunner

from attncompress import api, generate as gen
from attncompress.cli import main
from attncompress.errors import CompressError
from attncompress.loading import load_model

PROMPTS = [[5, 17, 3], [40, 2, 9], [11], [7, 7, 7, 7, 30]]


def _reference(directory):
    import transformers as tf
    m = tf.AutoModelForCausalLM.from_pretrained(directory).eval()
    m.generation_config.eos_token_id = None  # run to max_new_tokens, as ours does
    return m


@pytest.mark.parametrize("family", ["llama", "qwen2", "gpt2"])
def test_greedy_equals_the_reference_generate(tiny_dirs, family):
    d, _ = tiny_dirs[family]
    ours = gen.generate_ids(load_model(d).model, PROMPTS, max_tokens=20, temperature=0, batch=2)
    ref = _reference(d)
    for p, got in zip(PROMPTS, ours):
        # transformers GenerationMixin.generate(do_sample=False): greedy search with its own KV cache
        want = ref.generate(torch.tensor([p]), max_new_tokens=20, do_sample=False, pad_token_id=0)[0, len(p):]
        assert got == want.tolist(), (family, p)


def test_greedy_on_a_compressed_model_equals_the_reference_on_its_expansion(tiny_dirs, tmp_path):
    d, _ = tiny_dirs["llama"]
    api.compress(str(d), str(tmp_path / "c"), keep=0.6, weights_only=True, quiet=True)
    api.expand(str(tmp_path / "c"), str(tmp_path / "x"))
    ours = gen.generate_ids(load_model(tmp_path / "c").model, PROMPTS, max_tokens=12)
    ref = _reference(tmp_path / "x")
    for p, got in zip(PROMPTS, ours):
        want = ref.generate(torch.tensor([p]), max_new_tokens=12, do_sample=False, pad_token_id=0)[0, len(p):]
        assert got == want.tolist()


def test_sampling_is_fixed_by_the_seed_and_a_tiny_top_p_is_greedy(tiny_dirs):
    model = load_model(tiny_dirs["llama"][0]).model
    prompts = [[3]] * 6
    a = gen.generate_ids(model, prompts, max_tokens=15, temperature=1.0, seed=4, batch=3)
    b = gen.generate_ids(model, prompts, max_tokens=15, temperature=1.0, seed=4, batch=3)
    c = gen.generate_ids(model, prompts, max_tokens=15, temperature=1.0, seed=5, batch=3)
    assert a == b and a != c
    assert len({tuple(x) for x in a}) > 1  # the rows of one prompt differ: they are samples, not one path
    # nucleus sampling keeps only the most likely token as top_p → 0 (Holtzman et al. 2020, definition)
    nucleus = gen.generate_ids(model, prompts[:2], max_tokens=15, temperature=1.0, top_p=1e-9, seed=4)
    assert nucleus == gen.generate_ids(model, prompts[:2], max_tokens=15, temperature=0)


def test_first_sampled_token_follows_the_reference_distribution(tiny_dirs):
    d, ref = tiny_dirs["llama"]
    model = load_model(d).model
    n = 4000
    got = gen.generate_ids(model, [[5, 17]] * n, max_tokens=1, temperature=1.0, seed=0, batch=n)
    freq = torch.bincount(torch.tensor([x[0] for x in got]), minlength=96).double() / n
    with torch.no_grad():
        p = torch.softmax(ref(torch.tensor([[5, 17]])).logits[0, -1].double(), -1)  # transformers' own logits
    # binomial standard error per token is √(p(1−p)/n) ≤ 0.008; allow five of them
    assert (freq - p).abs().max() < 0.04


def test_samples_are_cached_and_recorded_in_the_manifest(tiny_dirs, tmp_path, monkeypatch):
    d, _ = tiny_dirs["llama"]
    settings = gen.SampleSettings(tokens=600, length=40, batch=4)
    monkeypatch.setattr(gen, "parse_samples", lambda name: settings)
    r = api.compress(str(d), str(tmp_path / "c"), keep=0.8, texts=["corpus:samples"], quiet=True)
    files = list((tmp_path / "sample-cache").glob("samples-*.txt"))
    assert len(files) == 1 and files[0].read_text().count("\n\n") == 14  # 15 sequences of 40 tokens
    desc = json.loads((tmp_path / "c" / "attncompress.json").read_text())["calibration"]["files"][0]
    assert desc["name"] == files[0].name
    assert desc["sha256"] == hashlib.sha256(files[0].read_bytes()).hexdigest()  # hashlib, outside the project

    def refuse(*a, **k):
        raise AssertionError("sampled again although cached")
    monkeypatch.setattr(gen, "sample_text", refuse)
    api.compress(str(d), str(tmp_path / "c2"), keep=0.8, texts=["corpus:samples"], quiet=True)
    assert r["out"] and (tmp_path / "c2").is_dir()


def test_sample_text_is_deterministic_for_a_seed(tiny_dirs):
    ld = load_model(tiny_dirs["llama"][0])
    s = gen.SampleSettings(tokens=200, length=25, batch=4)
    assert gen.sample_text(ld.model, ld.tokenizer, s) == gen.sample_text(ld.model, ld.tokenizer, s)
    assert gen.sample_text(ld.model, ld.tokenizer, s) != gen.sample_text(
        ld.model, ld.tokenizer, gen.SampleSettings(tokens=200, length=25, batch=4, seed=1))


def test_cli_generate_and_its_errors(tiny_dirs, tmp_path):
    d, _ = tiny_dirs["llama"]
    out = tmp_path / "g.json"
    r = CliRunner().invoke(main, ["generate", str(d), "--prompt", "w1 w2 w3", "--prompt", "w9", "--max-tokens", "5",
                                  "--out", str(out)])
    assert r.exit_code == 0, r.output
    rep = json.loads(out.read_text())
    assert [len(x) for x in rep["ids"]] == [5, 5] and "tokens/s" in r.output
    assert r.output.splitlines()[-3].startswith("w1 w2 w3")
    r = CliRunner().invoke(main, ["generate", str(tiny_dirs["bert"][0]), "--prompt", "w1"])
    assert r.exit_code == 1 and "needs a decoder" in r.output
    r = CliRunner().invoke(main, ["generate", str(tiny_dirs["gpt2"][0]), "--prompt", "w1", "--max-tokens", "100"])
    assert r.exit_code == 1 and "exceeds the model's 64 positions" in r.output
    r = CliRunner().invoke(main, ["generate", str(d)])
    assert r.exit_code == 2
    with pytest.raises(CompressError, match="corpus:samples: text sampled"):
        from attncompress.texts import read_texts
        read_texts(["corpus:samples"])
