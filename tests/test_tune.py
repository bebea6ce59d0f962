"""The calibration fine-tune on a tiny compressed llama with a word-level tokenizer, through the API and the CLI."""
import json
import os
import random
import socket
import subprocess
import sys
from pathlib import Path

import pytest
import torch
import torch.nn.functional as F
from click.testing import CliRunner
from safetensors.torch import load_file

from attncompress import tune as tunelib
from attncompress.cli import main
from attncompress.compress import compress
from attncompress.errors import CompressError
from attncompress.factorize import product_sq_norm
from attncompress.loading import load_model
from conftest import make_reference, require

WORDS = ["<unk>"] + [f"w{i}" for i in range(1, 96)]  # 96 ids, the tiny models' vocabulary


@pytest.fixture(autouse=True)
def one_thread():
    """Tiny matmuls on a busy 2-core machine are far faster on one thread (and the torchrun ranks use one)."""
    old = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(old)


def _text(n_lines: int, seed: int = 0) -> str:
    """Lines of 8 words in arithmetic steps of 3: predictable, so a short tune can learn them."""
    r = random.Random(seed)
    lines = []
    for _ in range(n_lines):
        a = r.randrange(40)
        lines.append(" ".join(WORDS[(a + 3 * j) % 95 + 1] for j in range(8)))
    return "\n".join(lines) + "\n"


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    """(source dir, compressed dir, training text, held-out text) for a tiny llama with a tokenizer."""
    from tokenizers import Tokenizer, models, pre_tokenizers
    root = tmp_path_factory.mktemp("tune")
    src, cmp = root / "src", root / "cmp"
    make_reference("llama").save_pretrained(src)
    tok = Tokenizer(models.WordLevel({w: i for i, w in enumerate(WORDS)}, unk_token="<unk>"))
    tok.pre_tokenizer = pre_tokenizers.WhitespaceSplit()
    tok.save(str(src / "tokenizer.json"))
    compress(str(src), str(cmp), keep=0.6, weights_only=True, quiet=True)
    train, held = root / "train.txt", root / "held.txt"
    train.write_text(_text(200, 0), encoding="utf-8")
    held.write_text(_text(60, 1), encoding="utf-8")
    return src, cmp, train, held


FAST = dict(steps=6, batch=4, context=16, lr=3e-3, seed=0, quiet=True, save_every=0)


# ---------------------------------------------------------------------------------- the penalty's maths

def _explicit_penalty(model) -> torch.Tensor:
    """Σ ‖A Bᵀ‖_F² with every product formed, the norm from torch.linalg.matrix_norm."""
    total = torch.zeros((), dtype=torch.float64)
    for blk in model.blocks:
        at = blk.attn
        h, g, wqk, wvo = at.n_heads, at.n_kv_heads, at.w_qk, at.w_vo
        q, k, v, o = (m.weight.double() for m in (at.q, at.k, at.v, at.o))
        for j in range(h):
            gi = j // (h // g)
            qk = q[j * wqk:(j + 1) * wqk].T @ k[gi * wqk:(gi + 1) * wqk]  # (d, d) query-key form
            vo = o[:, j * wvo:(j + 1) * wvo] @ v[gi * wvo:(gi + 1) * wvo]  # (d, d) value-output map
            total = total + torch.linalg.matrix_norm(qk) ** 2 + torch.linalg.matrix_norm(vo) ** 2
        for kind in ("gate", "up", "down"):
            lin = getattr(blk.ff, kind)
            total = total + torch.linalg.matrix_norm(lin.a.double() @ lin.bt.double()) ** 2
    return total


def test_penalty_equals_explicit_products_and_closed_form_gradients(tiny):
    _, cmp, _, _ = tiny
    model = load_model(cmp).model
    for _, p, _ in tunelib.factor_params(model):
        p.requires_grad_(True)
    pen = tunelib.frobenius_penalty(model)
    # Source: the definition ‖M‖_F² of every explicit product, via torch.linalg.matrix_norm.
    torch.testing.assert_close(pen.double(), _explicit_penalty(model).detach(), rtol=1e-5, atol=0)
    pen.backward()
    blk = model.blocks[0]
    a, bt = blk.ff.up.a.detach(), blk.ff.up.bt.detach()
    # Source: matrix calculus, d‖A Bᵀ‖²/dA = 2A(BᵀB), d/dB = 2B(AᵀA) (b = btᵀ, so its gradient is transposed).
    torch.testing.assert_close(blk.ff.up.a.grad, 2 * a @ (bt @ bt.T), rtol=1e-4, atol=1e-6)
    torch.testing.assert_close(blk.ff.up.bt.grad, (2 * bt.T @ (a.T @ a)).T, rtol=1e-4, atol=1e-6)
    # Source: the same calculus for ‖W_qᵀ W_k‖²: d/dW_q = 2 (W_k W_kᵀ) W_q, for query head 0 of group 0.
    at = blk.attn
    w = at.w_qk
    q0, k0 = at.q.weight.detach()[:w], at.k.weight.detach()[:w]
    torch.testing.assert_close(at.q.weight.grad[:w], 2 * (k0 @ k0.T) @ q0, rtol=1e-4, atol=1e-6)


def test_pair_sq_norm_matches_product_sq_norm():
    gen = torch.Generator().manual_seed(3)
    a = torch.randn(40, 6, generator=gen, requires_grad=True)
    b = torch.randn(25, 6, generator=gen, requires_grad=True)
    a2, b2 = a.detach().clone().requires_grad_(True), b.detach().clone().requires_grad_(True)
    v1, v2 = tunelib.pair_sq_norm(a, b), product_sq_norm(a2, b2)
    v1.backward(), v2.backward()
    # Source: factorize.product_sq_norm (itself checked against torch.linalg in test_factorize) with autograd.
    torch.testing.assert_close(v1, v2)
    torch.testing.assert_close(a.grad, a2.grad, rtol=1e-5, atol=1e-5)
    torch.testing.assert_close(b.grad, b2.grad, rtol=1e-5, atol=1e-5)


def test_distill_kl_is_the_full_kl_at_full_k_and_a_lower_bound_below():
    gen = torch.Generator().manual_seed(0)
    t, s, T = torch.randn(10, 30, generator=gen) * 3, torch.randn(10, 30, generator=gen) * 3, 2.0
    lp_t, lq = F.log_softmax(t / T, -1), F.log_softmax(s / T, -1)
    # Source: torch.nn.functional.kl_div(input=log q, target=log p, log_target=True) = Σ p (log p − log q).
    full = F.kl_div(lq, lp_t, reduction="none", log_target=True).sum(-1).mean() * T ** 2
    logp, ids = tunelib.teacher_targets(t, 30, T)
    torch.testing.assert_close(tunelib.distill_kl(s, logp, ids, T), full, rtol=1e-5, atol=1e-6)
    # Source: the data-processing inequality: a KL of coarsened distributions never exceeds the full KL.
    for k in (1, 5, 20):
        logp, ids = tunelib.teacher_targets(t, k, T)
        assert float(tunelib.distill_kl(s, logp, ids, T)) <= float(full) + 1e-6


def test_block_order_visits_every_block_once_per_epoch():
    n = 7
    stream = tunelib.block_order(n, 5, 0, 3 * n)
    for e in range(3):
        assert sorted(stream[e * n:(e + 1) * n].tolist()) == list(range(n))  # a permutation per epoch
    # any window of the stream is the same slice of it, whatever step asks (the data position is the step)
    assert torch.equal(tunelib.block_order(n, 5, 9, 6), stream[9:15])
    assert not torch.equal(tunelib.block_order(n, 6, 0, n), stream[:n])


def test_lr_schedule_warms_up_then_decays():
    m = [tunelib.lr_multiplier(s, 10, 2) for s in range(10)]
    assert m[:3] == [0.5, 1.0, 1.0]
    assert all(x > y for x, y in zip(m[2:], m[3:])) and m[-1] > tunelib.LR_FLOOR


# ------------------------------------------------------------------------------------------ training

def _weights(d: Path) -> dict:
    return load_file(str(d / "model.safetensors"))


def test_short_tune_reduces_the_loss_on_its_own_data_through_the_cli(tiny, tmp_path):
    _, cmp, train, _ = tiny
    out = tmp_path / "tuned"
    r = CliRunner().invoke(main, ["tune", str(cmp), "--text", str(train), "--out", str(out), "--steps", "40",
                                  "--context", "16", "--lr", "1e-2", "--teacher", "none", "--eval-text", str(train),
                                  "--quiet", "--json"])
    assert r.exit_code == 0, r.output
    rep = json.loads(r.output)
    before = rep["eval"]["before"]["train.txt"]["perplexity"]
    after = rep["eval"]["after"]["train.txt"]["perplexity"]
    assert after < 0.9 * before  # the perplexity of the text it trained on falls (96 → 77 when written)
    losses = [c["loss"] for c in rep["curve"]]
    assert sum(losses[-5:]) < sum(losses[:5])
    m = json.loads((out / "attncompress.json").read_text())
    assert m["tune"]["settings"]["steps"] == 40 and len(m["tune"]["curve"]) == 40
    assert m["tune"]["data"]["files"][0]["name"] == "train.txt" and m["plan"] == json.loads(
        (cmp / "attncompress.json").read_text())["plan"]
    w0, w1 = _weights(cmp), _weights(out)
    assert set(w0) == set(w1)
    assert torch.equal(w0["embed.tokens"], w1["embed.tokens"])  # embeddings are frozen
    assert torch.equal(w0["layers.0.attn_norm.weight"], w1["layers.0.attn_norm.weight"])  # norms too, by default
    assert not torch.equal(w0["layers.0.ff.up.a"], w1["layers.0.ff.up.a"])
    # the tuned directory is a model our runtime opens, whose perplexity is the one the report gives
    from attncompress.evaluate import perplexity
    from attncompress.loading import tokens
    tuned = load_model(out)
    ids = tokens(tuned, train.read_text())
    assert perplexity(tuned.model, ids, context=16)["perplexity"] == pytest.approx(after, rel=1e-6)


def test_distillation_uses_the_teacher_found_beside_the_model(tiny, tmp_path):
    src, cmp, train, _ = tiny
    r = tunelib.tune(cmp, [train], tmp_path / "d", mix=0.5, **FAST)  # teacher: the manifest's source, found beside
    assert r["teacher"]["matches_source"] and r["teacher"]["path"] == "src"
    assert all(c["kl"] is not None and c["kl"] >= 0 for c in r["curve"])
    assert r["teacher_cache"] == "top-64"
    # the loss is mix·CE + (1 − mix)·KL, step by step
    assert all(c["loss"] == pytest.approx(0.5 * c["ce"] + 0.5 * c["kl"], rel=1e-6) for c in r["curve"])


def test_decay_wiring(tiny, tmp_path):
    _, cmp, train, _ = tiny
    runs = {}
    for name, decay, coef in (("none", "none", 0.01), ("frob0", "frobenius", 0.0), ("frob", "frobenius", 1e-3),
                              ("factor", "factor", 0.5)):
        runs[name] = tunelib.tune(cmp, [train], tmp_path / name, decay=decay, decay_coef=coef, teacher="none",
                                  penalty_every=2, **FAST)
    w = {n: _weights(tmp_path / n) for n in runs}
    # λ = 0 is exactly no penalty: same bits
    assert all(torch.equal(w["none"][k], w["frob0"][k]) for k in w["none"])
    assert not torch.equal(w["none"]["layers.0.ff.up.a"], w["frob"]["layers.0.ff.up.a"])
    assert not torch.equal(w["none"]["layers.0.ff.up.a"], w["factor"]["layers.0.ff.up.a"])
    # the penalty the first step reports is λ·Σ‖A Bᵀ‖² of the untrained model (explicit products, torch.linalg)
    start = _explicit_penalty(load_model(cmp).model)
    assert runs["frob"]["curve"][0]["penalty"] == pytest.approx(1e-3 * float(start.detach()), rel=1e-5)
    # evaluated every 2 steps: steps 2, 4, 6 repeat the value of steps 1, 3, 5
    c = runs["frob"]["curve"]
    assert c[1]["penalty"] == c[0]["penalty"] and c[2]["penalty"] != c[1]["penalty"]
    assert runs["none"]["curve"][0]["penalty"] is None and runs["factor"]["curve"][0]["penalty"] is None
    # a λ whose penalty dwarfs the loss is run as asked, with a warning naming a λ of the right scale
    assert runs["frob"]["warnings"] == []
    big = tunelib.tune(cmp, [train], tmp_path / "big", decay="frobenius", decay_coef=10.0, teacher="none",
                       **dict(FAST, steps=1))
    assert len(big["warnings"]) == 1 and big["warnings"][0].startswith("warning: the Frobenius penalty")


def test_resume_after_interrupt_gives_the_uninterrupted_weights(tiny, tmp_path, monkeypatch):
    _, cmp, train, _ = tiny
    opts = dict(FAST, steps=8, decay="frobenius", decay_coef=1e-3, penalty_every=3, mix=0.5)
    whole = tunelib.tune(cmp, [train], tmp_path / "whole", **opts)
    real = tunelib.lr_multiplier

    def ctrl_c_at_step_6(step, *a, **kw):
        if step == 5:
            raise KeyboardInterrupt
        return real(step, *a, **kw)
    monkeypatch.setattr(tunelib, "lr_multiplier", ctrl_c_at_step_6)
    out = tmp_path / "parts"
    r = CliRunner().invoke(main, ["tune", str(cmp), "--text", str(train), "--out", str(out), "--steps", "8",
                                  "--context", "16", "--lr", "3e-3", "--decay", "frobenius", "--decay-coef", "1e-3",
                                  "--penalty-every", "3", "--save-every", "4", "--quiet"])
    assert r.exit_code == 130
    ckpt = tunelib.checkpoint_path(out)
    assert r.output.strip() == f"interrupted at step 6 of 8; the checkpoint {ckpt} holds step 4; continue with --resume"
    assert ckpt.is_file() and not out.exists()
    monkeypatch.setattr(tunelib, "lr_multiplier", real)
    resumed = tunelib.tune(cmp, [train], out, resume=True, **opts)
    assert resumed["start_step"] == 4 and not ckpt.exists()
    assert [c["loss"] for c in resumed["curve"]] == [c["loss"] for c in whole["curve"]]
    w0, w1 = _weights(tmp_path / "whole"), _weights(out)
    assert all(torch.equal(w0[k], w1[k]) for k in w0)  # bit for bit
    # the manifests agree too (deterministic: no timings in them)
    assert (tmp_path / "whole" / "attncompress.json").read_bytes() == (out / "attncompress.json").read_bytes()


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.mark.slow
def test_two_process_torchrun_matches_one_process(tiny, tmp_path):
    _, cmp, train, _ = tiny
    script = Path(sys.executable).with_name("attncompress")
    require(script, "the attncompress console script beside this python", "pip install -e .")
    out = tmp_path / "ddp"
    cmd = [sys.executable, "-m", "torch.distributed.run", "--nproc-per-node", "2", "--master-addr", "127.0.0.1",
           "--master-port", str(_free_port()), str(script), "tune", str(cmp), "--text", str(train), "--out", str(out),
           "--steps", "6", "--batch", "4", "--context", "16", "--lr", "3e-3", "--mix", "0.5", "--decay", "frobenius",
           "--decay-coef", "1e-3",
           "--penalty-every", "2", "--save-every", "0", "--compute", "float32", "--quiet"]
    env = dict(os.environ, OMP_NUM_THREADS="1")
    p = subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=600)
    assert p.returncode == 0, p.stderr[-2000:]
    one = tunelib.tune(cmp, [train], tmp_path / "one", mix=0.5, decay="frobenius", decay_coef=1e-3, penalty_every=2,
                       compute="float32", **FAST)
    two = json.loads((out / "attncompress.json").read_text())["tune"]
    assert two["processes"] == 2
    # same global batch: the same losses up to float rounding (all-reduce order, per-rank batch shapes);
    # tolerance 1e-5 relative: a choice; the differences seen when written were below 3e-7, a step changes the loss ~1e-2
    for a, b in zip(one["curve"], two["curve"]):
        assert b["loss"] == pytest.approx(a["loss"], rel=1e-5)
        assert b["penalty"] == pytest.approx(a["penalty"], rel=1e-5)
    w1, w2 = _weights(tmp_path / "one"), _weights(out)
    assert all(torch.allclose(w1[k].float(), w2[k].float(), rtol=1e-3, atol=1e-5) for k in w1)


# ------------------------------------------------------------------------------------------ bad inputs

def _fails(args) -> str:
    r = CliRunner().invoke(main, ["tune", *map(str, args)])
    assert r.exit_code == 1, r.output
    lines = r.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("Error: "), r.output
    return lines[0].removeprefix("Error: ")


def test_bad_inputs_end_in_one_line(tiny, tmp_path):
    src, cmp, train, _ = tiny
    out = tmp_path / "o"
    base = ["--out", out, "--teacher", "none", "--steps", "2", "--context", "16", "--quiet"]
    assert _fails([cmp, "--text", tmp_path / "missing.txt", *base]) == f"{tmp_path / 'missing.txt'}: no such text file"
    short = tmp_path / "short.txt"
    short.write_text("w1 w2 w3 w4 w5\n", encoding="utf-8")
    assert _fails([cmp, "--text", short, *base]) == (
        f"{short}: 5 tokens is shorter than one block of 16; give more text or a smaller --context")
    assert _fails([src, "--text", train, *base]) == (
        f"{src}: not a compressed model (no attncompress.json); compress the model first with "
        "`attncompress compress`, then tune its output")
    assert _fails([tmp_path / "nowhere", "--text", train, *base]).startswith(f"{tmp_path / 'nowhere'}: no such directory")
    assert _fails([cmp, "--text", train, *base, "--mix", "2"]).startswith("--mix: must be between 0 and 1")
    assert _fails([cmp, "--text", train, *base, "--steps", "0"]).startswith("--steps: must be a positive whole number")
    assert _fails([cmp, "--text", train, *base, "--decay-coef", "-1"]).startswith("--decay-coef: must be a number ≥ 0")
    assert _fails([cmp, "--text", train, *base, "--resume"]) == (
        f"{tunelib.checkpoint_path(out)}: no checkpoint to resume from; run without --resume to start")
    assert _fails([cmp, "--text", train, "--out", out, "--steps", "2", "--teacher", tmp_path / "nope"]).startswith(
        f"--teacher {tmp_path / 'nope'}: no such file or directory")


def test_teacher_with_other_checksums_is_not_taken_for_the_source(tiny, tmp_path):
    src, cmp, train, _ = tiny
    import shutil
    moved = tmp_path / "cmp"
    shutil.copytree(cmp, moved)  # the manifest names "src", and there is none beside this copy
    with pytest.raises(CompressError, match="cannot find the source model src its manifest names"):
        tunelib.tune(moved, [train], tmp_path / "x", **FAST)
    fake = tmp_path / "src"
    make_reference("llama", seed=1).save_pretrained(fake)  # same name, other weights
    with pytest.raises(CompressError, match="pass --teacher PATH, or --teacher none"):
        tunelib.tune(moved, [train], tmp_path / "x", **FAST)
    # named explicitly it is used, and the manifest records that it is not the source
    r = tunelib.tune(moved, [train], tmp_path / "x", teacher=str(fake), **FAST)
    assert r["teacher"]["matches_source"] is False


# ------------------------------------------------------------------------------- held-out slice, best step

def test_heldout_indices_are_evenly_spaced_and_never_all():
    assert tunelib.heldout_indices(10, 0.2).tolist() == [2, 7]
    assert tunelib.heldout_indices(10, 0).tolist() == [] and tunelib.heldout_indices(1, 0.5).tolist() == []
    assert len(tunelib.heldout_indices(3, 0.9)) == 2  # at most n − 1: something is left to train on
    # repeats: every block visited steps·batch/n times when that is whole (block_order is one permutation per epoch)
    owner = torch.tensor([0] * 4 + [1] * 4)
    assert tunelib.repeats(owner, 2, seed=0, steps=2, batch=8) == [2.0, 2.0]


def _noise(path) -> Path:
    """60 lines of 8 random words: nothing to learn but the lines themselves, so a tune memorises them."""
    r = random.Random(5)
    path.write_text("\n".join(" ".join(r.choice(WORDS[1:]) for _ in range(8)) for _ in range(60)) + "\n",
                    encoding="utf-8")
    return path


def test_the_written_weights_are_those_of_the_best_heldout_step(tiny, tmp_path, monkeypatch):
    _, cmp, train, _ = tiny
    # a learning rate far too high and held constant (no decay to rescue it): the held-out loss falls, then
    # rises as the run overshoots
    monkeypatch.setattr(tunelib, "lr_multiplier", lambda step, *a, **kw: 1.0)
    opts = dict(FAST, steps=16, lr=10.0, teacher="none", heldout=0.2, eval_every=1, patience=100)
    whole = tunelib.tune(cmp, [train], tmp_path / "whole", **opts)
    h = whole["heldout"]
    losses = [c["loss"] for c in h["curve"]]
    best = h["best_step"]
    assert h["curve"][0]["step"] == 0 and len(losses) == 17 and losses[best] == min(losses)
    assert 0 < best < 16 and losses[-1] > losses[best], str([round(x, 4) for x in losses])  # it did rise after the best step
    # the independent run: the same tune interrupted right after the best step keeps that step's tensors
    real = tunelib.lr_multiplier

    def ctrl_c_after_best(step, *a, **kw):
        if step == best:
            raise KeyboardInterrupt
        return real(step, *a, **kw)
    monkeypatch.setattr(tunelib, "lr_multiplier", ctrl_c_after_best)
    with pytest.raises(tunelib.TuneInterrupted):
        tunelib.tune(cmp, [train], tmp_path / "part", **dict(opts, save_every=best))
    state = torch.load(tunelib.checkpoint_path(tmp_path / "part"), weights_only=True)
    assert state["step"] == best
    written = _weights(tmp_path / "whole")
    for name, t in state["params"].items():
        t = t.T if name.endswith(".b") else t  # stored transposed while training
        assert torch.equal(written[name], t.contiguous()), name


def test_a_rising_heldout_loss_stops_the_run_early(tiny, tmp_path):
    _, cmp, _, _ = tiny
    train = _noise(tmp_path / "noise.txt")
    r = tunelib.tune(cmp, [train], tmp_path / "t", **dict(FAST, steps=40, lr=0.01, teacher="none", heldout=0.2,
                                                             eval_every=2, patience=2))
    h = r["heldout"]
    assert h["stopped_early_at"] is not None and r["steps_run"] == h["stopped_early_at"] < 40
    last = [c["loss"] for c in h["curve"][-3:]]
    assert last[0] < last[1] < last[2]  # it stopped after two rises in a row
    assert h["best_loss"] == min(c["loss"] for c in h["curve"])


def test_repeats_and_the_warning_when_the_run_reads_more_than_the_text(tiny, tmp_path):
    _, cmp, train, held = tiny
    r = tunelib.tune(cmp, [train, held], tmp_path / "t", **dict(FAST, steps=30, teacher="none"))
    files = r["data"]["files"]
    n_train = sum(f["blocks"] for f in files)
    assert n_train == r["data"]["blocks"] and r["data"]["heldout_blocks"] >= 2
    # 30 steps × 4 blocks over the training blocks: the mean visits over all blocks is exactly that ratio
    mean = sum(f["repeats"] * f["blocks"] for f in files) / n_train
    assert mean == pytest.approx(30 * 4 / n_train, rel=1e-3)
    assert any("repeated" in w and "train.txt" in w for w in r["warnings"])
    r = tunelib.tune(cmp, [train], tmp_path / "u", **dict(FAST, steps=2, teacher="none"))
    assert not r["warnings"]


@pytest.mark.parametrize("temperature", [1.0, 2.0])
@pytest.mark.parametrize("weights", [{"ce": 0.3, "kl": 0.7}, {"ce": 1.0}, {"kl": 1.0}])
@pytest.mark.parametrize("k", [5, 40])  # 40 = V: the tail bin is empty
def test_token_losses_equal_the_plain_terms_and_their_autograd(temperature, weights, k):
    gen = torch.Generator().manual_seed(4)
    z0 = torch.randn(2, 9, 40, generator=gen, dtype=torch.float64) * 3
    x = torch.randint(0, 40, (2, 9), generator=gen)
    logp, ids = tunelib.teacher_targets(torch.randn(18, 40, generator=gen) * 3, k, temperature)
    z1, z2 = z0.clone().requires_grad_(True), z0.clone().requires_grad_(True)
    fused, terms = tunelib.step_loss(z1, x, (logp, ids), weights, temperature)
    # Source: torch's own cross-entropy for CE; distill_kl (checked above against torch's kl_div) for KL; and
    # torch.autograd through both for the gradient.
    plain = {"ce": F.cross_entropy(z2[:, :-1].reshape(-1, 40), x[:, 1:].reshape(-1)),
             "kl": tunelib.distill_kl(z2.reshape(-1, 40), logp, ids, temperature)}
    want = sum(w * plain[n] for n, w in weights.items())
    fused.backward()
    want.backward()
    for n in weights:
        torch.testing.assert_close(terms[n].double(), plain[n].double(), rtol=1e-5, atol=1e-6)
    torch.testing.assert_close(z1.grad, z2.grad, rtol=1e-5, atol=1e-7)


def test_native_bfloat16_reads_the_cpu_flags():
    # Source: the Linux kernel's /proc/cpuinfo flag names (arch/x86/include/asm/cpufeatures.h): avx512_bf16,
    # amx_bf16 (from memory).
    assert tunelib.native_bfloat16("processor\t: 0\nflags\t\t: fpu sse2 avx2 avx512f avx512_bf16\n")
    assert tunelib.native_bfloat16("flags\t\t: fpu amx_tile amx_bf16\n")
    assert not tunelib.native_bfloat16("flags\t\t: fpu sse2 avx2 avx512f avx512_vnni\n")
    assert tunelib.resolve_compute("float32") == "float32"
    with pytest.raises(CompressError, match="--compute"):
        tunelib.resolve_compute("int8")


def test_a_bfloat16_tune_follows_the_float32_one_and_is_recorded(tiny, tmp_path):
    _, cmp, train, _ = tiny
    a = tunelib.tune(cmp, [train], tmp_path / "f32", mix=0.5, compute="float32", **FAST)
    b = tunelib.tune(cmp, [train], tmp_path / "bf16", mix=0.5, compute="bfloat16", **FAST)
    # bfloat16 keeps 8 bits of mantissa (a relative rounding of 2^-9 per product): the losses of the same steps
    # agree to a few per cent, not bit for bit (the tolerance is a choice; seen when written: below 1%)
    for x, y in zip(a["curve"], b["curve"]):
        assert y["loss"] == pytest.approx(x["loss"], rel=0.03)
    assert any(x["loss"] != y["loss"] for x, y in zip(a["curve"], b["curve"]))  # it did compute in bfloat16
    manifest = json.loads((tmp_path / "bf16" / "attncompress.json").read_text())
    assert manifest["tune"]["settings"]["compute"] == "bfloat16"
    w = _weights(tmp_path / "bf16")
    assert all(t.dtype != torch.bfloat16 for t in w.values())  # the weights are not written in bfloat16
