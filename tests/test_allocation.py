"""Where to cut: loss sensitivities, loss-priced allocation, sequential calibration and the least-squares refit."""
import json

import numpy as np
import pytest
import torch
from click.testing import CliRunner

from attncompress import calibrate, factorize as fz
from attncompress.cli import main
from attncompress.compress import compress
from attncompress.loading import load_model, load_weights
from attncompress.model import build
from attncompress.sensitivity import LayerSensitivity, calibration_loss, sensitivity_hooks


def _runtime(d):
    loaded = load_model(d)
    m = loaded.model.requires_grad_(False)
    return m, loaded.shape


@pytest.mark.parametrize("family", ["llama", "bert"])
def test_streamed_backward_equals_one_backward_through_the_model(tiny_dirs, family):
    d, ref = tiny_dirs[family]
    m, sh = _runtime(d)
    ids = torch.randint(1, 96, (4, 16), generator=torch.Generator().manual_seed(3))
    # the whole model at once, torch autograd through every layer (the reference)
    whole = [LayerSensitivity(positions=ids.numel()) for _ in m.blocks]
    hooks = [h for blk, s in zip(m.blocks, whole) for h in sensitivity_hooks(blk, s)]
    with torch.enable_grad():
        emb = build(sh, _canonical(d, "embed."), blocks=False)
        x = emb.hidden(ids).requires_grad_(True)
        for i, blk in enumerate(m.blocks):
            x = blk(x, mask=None, cache=None, layer=i, start=0)
        top = build(sh, _canonical(d, ("embed.", "final_norm.", "lm_head.")), blocks=False)
        s, terms = calibration_loss(top, x, ids, 0, 0)
        s.backward()
    for h in hooks:
        h.remove()
    if family == "llama":
        # source: transformers' own causal-LM loss (mean next-token cross-entropy) on the same ids
        want = ref(ids, labels=ids).loss * ids[:, 1:].numel()
        torch.testing.assert_close(s.detach(), want.detach(), rtol=1e-5, atol=1e-4)
    # the same, one layer at a time from saved inputs (`calibrate`)
    xs = calibrate.embed(emb, ids)
    inputs = []
    for i in range(sh.n_layers):
        inputs.append(xs.clone())
        calibrate.forward_layer(sh, _canonical(d, f"layers.{i}."), i, xs)
    grad, terms2 = calibrate.loss_gradient(top, xs, ids)
    assert terms2 == terms
    for i in reversed(range(sh.n_layers)):
        got = calibrate.backward_layer(sh, _canonical(d, f"layers.{i}."), i, inputs[i], grad, terms)
        for kind in whole[i].grad_sq:
            torch.testing.assert_close(got.grad_sq[kind], whole[i].grad_sq[kind], rtol=1e-5, atol=1e-12)
        for kind in ("q", "k"):
            torch.testing.assert_close(got.drop_sq[kind], whole[i].drop_sq[kind], rtol=1e-5, atol=1e-12)


def _canonical(d, prefix):
    _, w, *_ = load_weights(d)
    return {n: t for n, t in w.items() if n.startswith(prefix)}


def test_the_loss_allocation_cuts_the_low_rank_layer_and_spares_the_other(tmp_path, calib_file):
    import transformers as tf
    from conftest import tiny_tokenizer
    torch.manual_seed(0)
    cfg = tf.LlamaConfig(hidden_size=32, intermediate_size=64, num_attention_heads=4, num_key_value_heads=2,
                         num_hidden_layers=2, vocab_size=96, max_position_embeddings=128)
    ref = tf.LlamaForCausalLM(cfg).eval()
    with torch.no_grad():
        for name in ("gate_proj", "up_proj", "down_proj"):  # layer 0's feed-forward exactly rank 3, scaled up
            lin = getattr(ref.model.layers[0].mlp, name)
            u, v = torch.randn(lin.weight.shape[0], 3), torch.randn(3, lin.weight.shape[1])
            lin.weight.copy_(u @ v / 3)
            getattr(ref.model.layers[1].mlp, name).weight.mul_(30)  # layer 1's full rank and large
    ref.save_pretrained(tmp_path / "m")
    tiny_tokenizer().save(str(tmp_path / "m" / "tokenizer.json"))
    plans = {}
    for strategy in ("loss", "uniform"):
        out = tmp_path / strategy
        compress(tmp_path / "m", out, keep=0.7, strategy=strategy, texts=[str(calib_file)], quiet=True,
                 n_blocks=16, context=32)
        plans[strategy] = json.loads((out / "attncompress.json").read_text())["plan"]["layers"]
    loss, uniform = plans["loss"], plans["uniform"]
    for kind in ("gate", "up", "down"):
        # rank 3 holds all of layer 0's energy: units past it cost nothing to drop (start: 1/8 of 32 = 4; a few
        # more may be bought with budget left over, at round-off prices)
        assert loss[0]["ff"][kind] <= 8, loss
        assert loss[1]["ff"][kind] is None or loss[1]["ff"][kind] >= 16, loss
        assert uniform[0]["ff"][kind] == uniform[1]["ff"][kind]  # the check can tell: uniform does not see it


def _synthetic(seed=0, n=60, d_in=6, d_out=5, r=2):
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(n, d_in, generator=g, dtype=torch.float64)
    xc = x + 0.3 * torch.randn(n, d_in, generator=g, dtype=torch.float64)  # the cut prefix's inputs
    w = torch.randn(d_out, d_in, generator=g, dtype=torch.float64)
    a = torch.randn(d_out, r, generator=g, dtype=torch.float64)
    dw = torch.rand(d_out, generator=g, dtype=torch.float64) + 0.5
    return x, xc, w, a, dw


def test_refit_matches_lstsq_and_never_increases_the_output_error():
    x, xc, w, a, dw = _synthetic()
    b = fz.refit_factor(w, a, xc.T @ xc, xc.T @ x, dw, damping=0.0)
    # source: numpy.linalg.lstsq on the vectorised problem: vec(D (X' B Aᵀ)ᵀ) = (D A ⊗ X') vec(B)
    da = (dw[:, None] * a).numpy()
    target = (x @ w.T * dw).numpy()  # (n, d_out) X Wᵀ D
    k = np.kron(da, xc.numpy())  # (d_out·n, r·d_in), columns ordered (r, d_in) like vec of B in Fortran order
    sol = np.linalg.lstsq(k, target.T.reshape(-1), rcond=None)[0]
    np.testing.assert_allclose(b.numpy(), sol.reshape(a.shape[1], -1).T, rtol=1e-8, atol=1e-10)

    def err(bb):
        return float(torch.linalg.norm((xc @ bb @ a.T - x @ w.T) * dw))
    _, b0 = fz.bilinear_factors(w, a.shape[1])  # any starting factor: the refit is the minimiser over b
    assert err(b) <= err(b0) + 1e-12
    # source: numpy.linalg.lstsq for the dense refit, min ‖X' W'ᵀ − X Wᵀ‖
    wd = fz.refit_dense(w, xc.T @ xc, xc.T @ x, damping=0.0)
    np.testing.assert_allclose(wd.T.numpy(), np.linalg.lstsq(xc.numpy(), (x @ w.T).numpy(), rcond=None)[0],
                               rtol=1e-8, atol=1e-10)


def test_refit_damping_pulls_towards_the_uncut_solution_not_zero():
    x, xc, w, a, dw = _synthetic(seed=1)
    wd = fz.refit_dense(w, xc.T @ xc, xc.T @ x, damping=1e6)
    torch.testing.assert_close(wd, w, rtol=1e-4, atol=1e-4)  # (G' + λI)⁻¹ (C + λI) → I as λ grows


def test_a_budget_below_the_smallest_plan_is_refused_in_one_line(tiny_dirs, calib_file):
    r = CliRunner().invoke(main, ["plan", str(tiny_dirs["llama"][0]), "--keep", "0.01", "--text", str(calib_file)])
    assert r.exit_code == 1
    last = r.output.strip().splitlines()[-1]
    assert last.startswith("Error: --keep 0.01: the budget is ") and "raise --keep to at least" in last, r.output


def test_loss_strategy_needs_calibration_text(tiny_dirs, tmp_path):
    r = CliRunner().invoke(main, ["compress", str(tiny_dirs["llama"][0]), "--keep", "0.5", "--weights-only",
                                  "--strategy", "loss", "--out", str(tmp_path / "c")])
    assert r.exit_code == 1
    assert r.output.strip().splitlines()[-1] == (
        "Error: --strategy loss prices cuts by the calibration loss; give calibration text with --text, or choose "
        "another --strategy")
    assert not (tmp_path / "c").exists()


def test_plan_prints_the_predicted_rise_per_kind(tiny_dirs, calib_file):
    r = CliRunner().invoke(main, ["plan", str(tiny_dirs["llama"][0]), "--keep", "0.6", "--text", str(calib_file),
                                  "--json"])
    assert r.exit_code == 0, r.output
    s = json.loads(r.output[r.output.index("{"):])
    assert s["strategy"] == "loss"
    assert set(s["predicted_rise"]) == {"qk", "vo", "gate", "up", "down"}
    assert all(v >= 0 for v in s["predicted_rise"].values()) and sum(s["predicted_rise"].values()) > 0
    assert sum(s["kept_by_kind"].values()) == s["block_params_kept"]


def test_a_query_key_form_without_rotary_is_priced_at_the_scaled_query_drop_price(tiny_dirs):
    """The gains of each rank are Σ_h σ_k² of the whitened forms Lᵀ W_qʰᵀ W_kʰ L (singular values from numpy,
    an outside check), scaled to FORM_PRICE_SCALE · Σ (G q)² / (2m) in all."""
    from attncompress import analysis
    from attncompress.sensitivity import FORM_PRICE_SCALE
    m, shape = _runtime(tiny_dirs["bert"][0])
    assert not shape.rotary
    h, hd, d = shape.n_heads, shape.head_dim, shape.d_model
    g = torch.Generator().manual_seed(7)
    wq, wk = torch.randn(h * hd, d, generator=g), torch.randn(h * hd, d, generator=g)
    x = torch.randn(64, d, generator=g)
    root = fz.gram_root((x.T @ x).double(), 0.01)
    roots = fz.Roots(attn=root, attn_aug=None, ff=None, down=None)
    drop = torch.rand(h * hd, generator=g, dtype=torch.float64)
    sens = LayerSensitivity(drop_sq={"q": drop, "k": torch.zeros(h * hd, dtype=torch.float64)}, terms=5)
    got = analysis._qk_spectrum(shape, wq.double(), wk.double(), None, roots, sens)
    L = root[0].numpy()
    sv = np.stack([np.linalg.svd(L.T @ wq[i * hd:(i + 1) * hd].double().numpy().T
                                 @ wk[i * hd:(i + 1) * hd].double().numpy() @ L, compute_uv=False)[:hd]
                   for i in range(h)])  # (h, hd)
    np.testing.assert_allclose(got["values"].numpy(), sv, rtol=1e-8)
    energy = (sv ** 2).sum(0)
    total = FORM_PRICE_SCALE * float(drop.sum()) / (2 * 5)
    np.testing.assert_allclose(got["gains"].numpy(), energy * total / energy.sum(), rtol=1e-8)


def test_a_rotary_pair_is_priced_at_the_scaled_drop_price_of_its_query_and_key_rows(tiny_dirs):
    """pair_prices against a loop over heads: pair i of group g is dims i and i + hd/2 of the group's query heads
    and of its key head (the rotate_half layout), Σ (G y)² over them / (2m), times PAIR_PRICE_SCALE."""
    from attncompress.sensitivity import PAIR_PRICE_SCALE, pair_prices
    _, shape = _runtime(tiny_dirs["llama"][0])
    h, g, hd = shape.n_heads, shape.n_kv_heads, shape.head_dim
    assert shape.rotary and h > g
    gen = torch.Generator().manual_seed(3)
    dq, dk = torch.rand(h * hd, generator=gen, dtype=torch.float64), torch.rand(g * hd, generator=gen, dtype=torch.float64)
    got = pair_prices(shape, LayerSensitivity(drop_sq={"q": dq, "k": dk}, terms=7))
    want = torch.zeros(g, hd // 2, dtype=torch.float64)
    for grp in range(g):
        for i in range(hd // 2):
            rows = [i, i + hd // 2]
            want[grp, i] = sum(dk[grp * hd + r] for r in rows) + sum(
                dq[head * hd + r] for head in range(grp * (h // g), (grp + 1) * (h // g)) for r in rows)
    torch.testing.assert_close(got, PAIR_PRICE_SCALE * want / 14)
