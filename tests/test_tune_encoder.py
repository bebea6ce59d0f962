"""The encoder tune: distilling the pooled sentence embedding into a compressed tiny BERT."""
import random

import pytest
import torch
import torch.nn.functional as F
from click.testing import CliRunner

from attncompress import evaluate, tune as tunelib
from attncompress.cli import main
from attncompress.compress import compress
from attncompress.loading import load_model
from conftest import WORDS, make_reference, tiny_tokenizer
from test_tune import one_thread  # noqa: F401  (the autouse one-thread fixture of the decoder tune's tests)


@pytest.fixture(scope="module")
def sentences(tmp_path_factory):
    """A tiny BERT directory and a file of 120 sentences of 3 to 14 words of its vocabulary."""
    d = tmp_path_factory.mktemp("enc")
    make_reference("bert").save_pretrained(d / "src")
    tiny_tokenizer().save(str(d / "src" / "tokenizer.json"))
    r = random.Random(4)
    (d / "s.txt").write_text("\n".join(" ".join(r.choice(WORDS) for _ in range(r.randint(3, 14)))
                                       for _ in range(120)), encoding="utf-8")
    return d


def _targets(seed=0, b=5, s=7, d=6):
    g = torch.Generator().manual_seed(seed)
    mask = torch.zeros(b, s, dtype=torch.long)
    for i in range(b):
        mask[i, :2 + (i * 3) % (s - 1)] = 1
    hidden = torch.randn(b, s, d, generator=g, dtype=torch.float64)
    t_hidden = torch.randn(b, s, d, generator=g) * mask[..., None]
    unit = F.normalize(torch.randn(b, d, generator=g), dim=-1)
    return hidden.requires_grad_(True), tunelib.SentenceTargets(mask, unit, t_hidden)


def _pooled_by_loop(hidden, mask):
    """Mean of each sentence's real rows, one sentence at a time."""
    return torch.stack([hidden[i, :int(mask[i].sum())].mean(0) for i in range(hidden.shape[0])])


def test_embedding_losses_and_gradients_match_torch():
    hidden, tg = _targets()
    pooled = _pooled_by_loop(hidden.float(), tg.mask)
    ones = torch.ones(hidden.shape[0])
    cases = [
        # source: torch's own F.cosine_embedding_loss with target 1 is the mean of 1 − cos
        (tunelib.embedding_cosine_loss, lambda: F.cosine_embedding_loss(_pooled_by_loop(hidden.float(), tg.mask),
                                                                         tg.unit, ones)),
        # source: torch's F.mse_loss on the unit embeddings (normalised by torch's F.normalize)
        (tunelib.embedding_mse_loss, lambda: F.mse_loss(F.normalize(_pooled_by_loop(hidden.float(), tg.mask), dim=-1),
                                                         tg.unit)),
    ]
    assert pooled.shape == tg.unit.shape
    for ours, ref in cases:
        got = ours(hidden, None, tg, 1.0)
        (g_got,) = torch.autograd.grad(got, hidden)
        want = ref()
        (g_want,) = torch.autograd.grad(want, hidden)
        torch.testing.assert_close(got, want, rtol=1e-6, atol=1e-7)
        torch.testing.assert_close(g_got, g_want, rtol=1e-5, atol=1e-7)
        assert g_got[~tg.mask.bool()].abs().max() == 0  # padding never reaches the loss


def test_hidden_state_loss_is_the_relative_error_of_the_real_tokens():
    hidden, tg = _targets(1)
    got = tunelib.hidden_state_loss(hidden, None, tg, 1.0)
    num = sum(F.mse_loss(hidden[i, :n].float(), tg.hidden[i, :n], reduction="sum")
              for i, n in enumerate(tg.mask.sum(1).tolist()))
    den = sum(tg.hidden[i, :n].pow(2).sum() for i, n in enumerate(tg.mask.sum(1).tolist()))
    # source: torch's F.mse_loss (summed) sentence by sentence over the real tokens, over the teacher's squared norm
    torch.testing.assert_close(got, num / den, rtol=1e-6, atol=1e-7)


def test_full_rank_encoder_tune_leaves_the_model_unchanged(sentences, tmp_path):
    d = sentences
    # the cut this test was written against (dense-path whitening); after the default cut the 3 Adam steps moved the
    # embeddings by up to 1.5e-4 (measured), as Adam's steps are lr-sized whatever the gradient
    compress(str(d / "src"), str(tmp_path / "c"), keep=1.0, texts=[str(d / "s.txt")], quiet=True, priced=False,
             sequential=False)
    r = tunelib.tune(tmp_path / "c", [str(d / "s.txt")], tmp_path / "t", steps=3, batch=8, context=32, lr=1e-6,
                     teacher=str(d / "src"), decay="none", hidden_weight=1.0, eval_texts=[str(d / "s.txt")],
                     quiet=True)
    for entry in r["curve"]:
        assert entry["cos"] < 1e-6 and entry["hidden"] < 1e-6 and entry["loss"] < 1e-5
    ids, mask = evaluate.encode_batch(tiny_tokenizer(), (d / "s.txt").read_text().splitlines(), 32)
    src, tuned = load_model(d / "src").model, load_model(tmp_path / "t").model
    # source: the reference library's own BERT agrees with our runtime (test_runtime); here the source model
    # and the tuned one give the same embeddings
    torch.testing.assert_close(evaluate.pooled_embeddings(tuned, ids, mask), evaluate.pooled_embeddings(src, ids, mask),
                               rtol=1e-4, atol=1e-4)
    after = r["eval"]["after"]["s.txt"]
    assert after["cosine"]["min"] > 1 - 1e-5 and after["spearman"] > 0.9999


def test_encoder_tune_wins_back_the_embedding_through_the_cli(sentences, tmp_path):
    d = sentences
    # a plain cut (uniform ranks, no sequential refit on these very sentences), so there is something to win back
    compress(str(d / "src"), str(tmp_path / "c"), keep=0.3, texts=[str(d / "s.txt")], quiet=True, strategy="uniform",
             priced=False, sequential=False)
    res = CliRunner().invoke(main, ["tune", str(tmp_path / "c"), "--text", str(d / "s.txt"), "--out",
                                    str(tmp_path / "t"), "--steps", "30", "--lr", "3e-3", "--context", "32",
                                    "--teacher", str(d / "src"), "--eval-text", str(d / "s.txt"), "--quiet",
                                    "--json"])
    assert res.exit_code == 0, res.output
    import json
    r = json.loads(res.output)
    c = r["curve"]
    assert r["settings"]["batch"] == tunelib.DEFAULT_SENTENCE_BATCH and r["settings"]["embed_loss"] == "cos"
    assert sum(e["cos"] for e in c[-5:]) < sum(e["cos"] for e in c[:5])
    before, after = r["eval"]["before"]["s.txt"], r["eval"]["after"]["s.txt"]
    assert after["cosine"]["mean"] > before["cosine"]["mean"]


def test_encoder_tune_refuses_no_teacher(sentences, tmp_path):
    d = sentences
    compress(str(d / "src"), str(tmp_path / "c"), keep=0.5, texts=[str(d / "s.txt")], quiet=True)
    res = CliRunner().invoke(main, ["tune", str(tmp_path / "c"), "--text", str(d / "s.txt"), "--out",
                                    str(tmp_path / "t"), "--context", "32", "--teacher", "none"])
    assert res.exit_code == 1 and "encoder is tuned towards its teacher" in res.output
    assert not (tmp_path / "t").exists()


def test_the_tune_does_not_depend_on_how_each_product_is_split(sentences, tmp_path):
    """The same compressed model written with skewed factors (a·100, b/100; value rows /100, output columns ·100)
    tunes to the same model: the tune balances the factors first (factorize.balance_layer)."""
    import shutil
    from safetensors.torch import load_file, save_file
    d = sentences
    compress(str(d / "src"), str(tmp_path / "c"), keep=0.5, texts=[str(d / "s.txt")], quiet=True)
    shutil.copytree(tmp_path / "c", tmp_path / "skew")
    w = load_file(tmp_path / "c" / "model.safetensors")
    for n in list(w):
        if n.endswith(".a") or n.endswith("attn.o.weight"):
            w[n] = w[n] * 100
        elif n.endswith(".b") or n.endswith("attn.v.weight") or n.endswith("attn.v.bias"):
            w[n] = w[n] / 100
    save_file(w, tmp_path / "skew" / "model.safetensors")
    ids, mask = evaluate.encode_batch(tiny_tokenizer(), (d / "s.txt").read_text().splitlines(), 32)
    emb = {}
    for name in ("c", "skew"):
        tunelib.tune(tmp_path / name, [str(d / "s.txt")], tmp_path / f"t-{name}", steps=4, batch=8, context=32,
                     lr=1e-3, teacher=str(d / "src"), decay="none", heldout=0, quiet=True)
        emb[name] = evaluate.pooled_embeddings(load_model(tmp_path / f"t-{name}").model, ids, mask)
    before = evaluate.pooled_embeddings(load_model(tmp_path / "c").model, ids, mask)
    assert (emb["c"] - before).abs().max() > 1e-3  # the tune did move the model
    # identity: a·c⁻¹, b·c is the same product, so the same model must come out of the same steps
    torch.testing.assert_close(emb["skew"], emb["c"], rtol=1e-4, atol=1e-4)


def test_encoder_tune_holds_out_sentences_and_writes_its_best_step(sentences, tmp_path):
    d = sentences
    compress(str(d / "src"), str(tmp_path / "c"), keep=0.5, texts=[str(d / "s.txt")], quiet=True)
    # an lr far too high: the held-out loss rises, so the step written must be the best held-out one
    r = tunelib.tune(tmp_path / "c", [str(d / "s.txt")], tmp_path / "t", steps=20, batch=8, context=32, lr=0.3,
                     teacher=str(d / "src"), decay="none", eval_every=5, quiet=True)
    h = r["heldout"]
    n = len((d / "s.txt").read_text().splitlines())
    assert r["data"]["heldout_sentences"] == round(0.1 * n) and r["data"]["sentences"] == n - round(0.1 * n)
    losses = {e["step"]: e["loss"] for e in h["curve"]}
    assert h["best_step"] == min(losses, key=losses.get) and h["best_loss"] == min(losses.values())
    # the written model's held-out loss, recomputed by hand (1 − cosine of the pooled embeddings), is the best one
    ids, mask = evaluate.encode_batch(tiny_tokenizer(), (d / "s.txt").read_text().splitlines(), 32)
    held = tunelib.heldout_indices(n, 0.1)
    want = evaluate.pooled_embeddings(load_model(d / "src").model, ids[held], mask[held])
    got = evaluate.pooled_embeddings(load_model(tmp_path / "t").model, ids[held], mask[held])
    # source: torch's F.cosine_similarity
    loss = float((1 - F.cosine_similarity(got, want, dim=-1)).mean())
    assert abs(loss - h["best_loss"]) < 1e-4


@pytest.mark.parametrize("embed_loss", ["cos", "mse"])
def test_a_batch_run_in_chunks_of_similar_length_has_the_whole_batch_loss_and_gradient(sentences, tmp_path,
                                                                                          embed_loss):
    """`_Run._sentence_loss` (sorted chunks, each cut to its longest) against the batch padded to its longest as
    one, through the same loss functions (themselves checked against torch above): the same loss, terms and
    gradients, since padded keys are masked (identity up to float rounding)."""
    from types import SimpleNamespace
    d = sentences
    compress(str(d / "src"), str(tmp_path / "c"), keep=0.3, weights_only=True, quiet=True)  # a loss well above 0
    student, teacher = load_model(tmp_path / "c").model, load_model(d / "src").model
    ids, mask = evaluate.encode_batch(tiny_tokenizer(), (d / "s.txt").read_text().splitlines(), 32)
    cache = tunelib.SentenceTeacher(teacher, ids, mask, True)
    weights = tunelib.sentence_loss_weights(embed_loss, 0.7)
    idx = torch.arange(3, 3 + 13)  # 13 sentences: chunks of 4, 4, 4, 1 with lengths that differ
    assert len(set(mask[idx].sum(1).tolist())) > 3
    run = SimpleNamespace(world=1, weights=weights, settings=SimpleNamespace(temperature=1.0, compute="float32"))
    params = [p for p in student.parameters() if p.is_floating_point()]
    for p in params:
        p.requires_grad_(True)
    loss, terms = tunelib._Run._sentence_loss(run, student, ids[idx], idx, cache, mask)
    grads = torch.autograd.grad(loss, params, allow_unused=True)
    n = int(mask[idx].sum(1).max())
    tg = cache.batch(idx, n)
    ref, ref_terms = tunelib.step_loss(student(ids[idx, :n], attention_mask=tg.mask), ids[idx, :n], tg, weights, 1.0)
    ref_grads = torch.autograd.grad(ref, params, allow_unused=True)
    assert set(terms) == set(ref_terms) == {embed_loss, "hidden"} and float(ref.detach()) > 1e-4
    torch.testing.assert_close(loss, ref, rtol=1e-5, atol=1e-7)
    for name in terms:
        torch.testing.assert_close(terms[name], ref_terms[name], rtol=1e-5, atol=1e-7)
    for g, r in zip(grads, ref_grads):
        if r is not None:
            torch.testing.assert_close(g, r, rtol=1e-4, atol=1e-6)
