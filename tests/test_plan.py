"""Rank plans: JSON, validation, counting, and the three strategies."""
import dataclasses
import math

import numpy as np
import pytest

from attncompress.errors import CompressError
from attncompress.plan import (
    LayerRanks, MatrixSpectrum, RankPlan, break_even_rank, count_params, ff_dims, ff_kinds, ff_max_rank, full_plan,
    kv_cache_bytes, matrix_layout,
)
from attncompress.strategies import STRATEGIES, make_plan, plan_global, plan_uniform
from attncompress.shape import TINY, ModelShape

# SmolLM2-135M-like shape (field values from memory of its config; only the sizes matter here).
SMOL = ModelShape(family="llama", n_layers=30, d_model=576, n_heads=9, n_kv_heads=3, head_dim=64, d_ff=1536,
                  vocab_size=49152, rope_theta=100000.0)
# A shape whose feed-forward break-even rank is a whole number: 96 * 48 / (96 + 48) = 32.
EVEN = ModelShape(family="llama", n_layers=2, d_model=48, n_heads=4, n_kv_heads=2, head_dim=12, d_ff=96,
                  vocab_size=50, rope_theta=10000.0, tied_embeddings=False)


def decaying_spectra(shape, seed=0):
    """Synthetic spectra: exp(-i / tau) with a different scale and tau per matrix."""
    rng = np.random.default_rng(seed)
    out = []
    for c in matrix_layout(shape):
        tau = c.max_units * rng.uniform(0.05, 0.5)
        out.append(c.with_gains(rng.uniform(0.5, 2.0) * np.exp(-np.arange(c.max_units) / tau)))
    return out


def flat_spectra(shape, only=None):
    """Flat gains; with ``only=(layer, kind)`` every other matrix has zero energy."""
    return [c.with_gains(np.ones(c.max_units) if only in (None, (c.layer, c.kind)) else np.zeros(c.max_units))
            for c in matrix_layout(shape)]


def dense_block_params(shape):
    """Block-matrix weights straight from the shape fields: q, k, v, o and the feed-forward weights."""
    d, h, kv, hd = shape.d_model, shape.n_heads, shape.n_kv_heads, shape.head_dim
    attn = d * h * hd + 2 * d * kv * hd + h * hd * d
    ff = (3 if shape.gated else 2) * d * shape.d_ff
    return shape.n_layers * (attn + ff)


def edit_layer(plan, layer, **changes):
    """A copy of ``plan`` with some fields of one layer replaced (no validation)."""
    layers = tuple(dataclasses.replace(lr, **changes) if lr.layer == layer else lr for lr in plan.layers)
    return dataclasses.replace(plan, layers=layers)


def ranks_of(plan, shape):
    """{(layer, kind): rank or None} of a plan."""
    out = {}
    for lr in plan.layers:
        out[(lr.layer, "qk")], out[(lr.layer, "vo")] = lr.qk, lr.vo
        out.update({(lr.layer, k): lr.ff[k] for k in ff_kinds(shape)})
    return out


def energy_kept(spectra, plan, shape):
    """Cumulative energy fraction per matrix under the plan (dense = 1), computed with numpy."""
    ranks = ranks_of(plan, shape)
    out = []
    for s in spectra:
        r = ranks[(s.layer, s.kind)]
        g = np.asarray(s.gains)
        out.append(1.0 if r is None else g[:r].sum() / g.sum())
    return np.array(out)


# ------------------------------------------------------------------------------------------- JSON, counts

@pytest.mark.parametrize("shape", [TINY["llama"], TINY["gpt2"], SMOL], ids=["llama", "gpt2", "smol"])
@pytest.mark.parametrize("strategy", sorted(STRATEGIES))
def test_json_round_trip_is_exact(shape, strategy):
    plan = make_plan(decaying_spectra(shape), shape, 0.37, strategy)
    back = RankPlan.from_json(plan.to_json())
    assert back == plan
    assert back.to_json() == plan.to_json()
    assert '"version": 1' in plan.to_json()


def test_json_round_trip_keeps_pairs(tmp_path):
    shape = TINY["llama"]  # 2 kv groups, 4 pairs per head
    plan = make_plan(decaying_spectra(shape), shape, 0.5, "uniform")
    pairs = {lr.layer: [list(range(lr.qk)), list(range(4 - lr.qk, 4))] for lr in plan.layers}
    plan = plan.with_qk_pairs(pairs)
    plan.check(shape)
    path = tmp_path / "plan.json"
    path.write_text(plan.to_json())
    back = RankPlan.from_json(path.read_text(), source=str(path))
    assert back == plan and back.layers[0].qk_pairs == tuple(tuple(g) for g in pairs[0])


def test_from_json_rejects_other_version():
    text = full_plan(TINY["llama"]).to_json().replace('"version": 1', '"version": 7')
    with pytest.raises(CompressError) as e:
        RankPlan.from_json(text, source="old.json")
    assert str(e.value) == "plan old.json: plan version 7, this attncompress reads version 1; make the plan again"


@pytest.mark.parametrize("shape", [*TINY.values(), SMOL, EVEN], ids=[*TINY, "smol", "even"])
def test_full_plan_is_the_dense_model(shape):
    plan = full_plan(shape)
    counts = count_params(shape, plan)
    # Independent count from the shape fields (the q/k/v/o/FF weight shapes of a transformer block).
    assert counts.block_kept == counts.block_dense == dense_block_params(shape)
    assert plan.block_params_kept == plan.block_params_dense == dense_block_params(shape)
    # Full-width KV cache: keys and values, head_dim numbers per kv head per layer (common practice, no source).
    assert plan.kv_bytes_per_token == 2 * shape.n_layers * shape.n_kv_heads * shape.head_dim * 4


@pytest.mark.slow
def test_dense_counts_match_transformers_models():
    """Parameter counts of tiny transformers models built with the TINY shapes' sizes."""
    import torch
    import transformers as T
    torch.manual_seed(0)
    sl, sg, sb = TINY["llama"], TINY["gpt2"], TINY["bert"]
    llama = T.LlamaForCausalLM(T.LlamaConfig(
        hidden_size=sl.d_model, num_hidden_layers=sl.n_layers, num_attention_heads=sl.n_heads,
        num_key_value_heads=sl.n_kv_heads, head_dim=sl.head_dim, intermediate_size=sl.d_ff,
        vocab_size=sl.vocab_size, tie_word_embeddings=sl.tied_embeddings))
    gpt2 = T.GPT2LMHeadModel(T.GPT2Config(n_embd=sg.d_model, n_layer=sg.n_layers, n_head=sg.n_heads,
                                          n_inner=sg.d_ff, n_positions=sg.max_positions, vocab_size=sg.vocab_size))
    bert = T.BertModel(T.BertConfig(hidden_size=sb.d_model, num_hidden_layers=sb.n_layers,
                                    num_attention_heads=sb.n_heads, intermediate_size=sb.d_ff,
                                    vocab_size=sb.vocab_size, max_position_embeddings=sb.max_positions,
                                    type_vocab_size=sb.type_vocab_size), add_pooling_layer=False)

    def split(model):
        """(block weights, block biases, embeddings, norms) by transformers parameter names."""
        block = bias = emb = norm = 0
        seen = set()
        for name, p in model.named_parameters(remove_duplicate=True):
            if p.data_ptr() in seen:
                continue
            seen.add(p.data_ptr())
            if "norm" in name.lower() or ".ln_" in name:
                norm += p.numel()
            elif "emb" in name or name.endswith(("wte.weight", "wpe.weight")) or name.startswith("lm_head"):
                emb += p.numel()
            elif name.endswith(".bias"):
                bias += p.numel()
            else:
                block += p.numel()
        return block, bias, emb, norm

    for shape, model, with_emb in ((sl, llama, True), (sg, gpt2, True), (sb, bert, False)):
        c = count_params(shape, full_plan(shape))
        block, bias, emb, norm = split(model)
        assert (c.block_dense, c.bias_dense, c.norms) == (block, bias, norm), shape.family
        if with_emb:  # a BERT output head is outside this model class
            assert c.embeddings == emb, shape.family


def test_bias_counts_by_hand():
    # gpt2 tiny, qk rank 3, vo rank 5: query bias 3 per head (key bias dropped), output bias d absorbs the
    # value bias, FF biases d_ff + d unchanged; per layer 3*4 + 32 + (128 + 32) = 204.
    shape = TINY["gpt2"]
    plan = full_plan(shape)
    for i in range(shape.n_layers):
        plan = edit_layer(plan, i, qk=3, vo=5)
    c = count_params(shape, plan)
    assert c.bias_kept == 2 * 204
    # Rotary with biases: 2p rows of every query and key head.
    rot = dataclasses.replace(TINY["llama"], qkv_bias=True)
    plan = edit_layer(full_plan(rot), 0, qk=3)
    assert count_params(rot, plan).bias_kept == 2 * 3 * (4 + 2) + 2 * 4 * (4 + 2) + 2 * 32


def test_kv_bytes_hand_worked():
    shape = TINY["llama"]  # 2 layers, 2 kv heads, rotary
    layers = [LayerRanks(0, 3, 5, {"gate": None, "up": None, "down": None}),
              LayerRanks(1, 1, 8, {"gate": None, "up": None, "down": None})]
    # n_kv * (2p + r_vo) * bytes: layer 0: 2 * (6 + 5) * 4 = 88; layer 1: 2 * (2 + 8) * 4 = 80.
    assert kv_cache_bytes(shape, layers) == 88 + 80
    assert kv_cache_bytes(shape, layers, bytes_per_element=2) == 44 + 40
    # Non-rotary: width is the rank itself; gpt2 tiny has 4 kv heads: 4 * (3 + 5) * 4 = 128 per layer.
    g = TINY["gpt2"]
    assert kv_cache_bytes(g, [LayerRanks(i, 3, 5, {"up": None, "down": None}) for i in range(2)]) == 256
    plan = full_plan(shape)
    plan = edit_layer(edit_layer(plan, 0, qk=3, vo=5), 1, qk=1)
    plan.check(shape)
    assert kv_cache_bytes(shape, plan.layers) == 88 + 2 * (2 + 8) * 4


# ------------------------------------------------------------------------------------------- break-even

def test_break_even_identity():
    # r = mn / (m + n) is exactly where r (m + n) = m n (algebra); 96 x 48 gives the whole number 32.
    m, n = ff_dims(EVEN, "up")
    assert (m, n) == (96, 48)
    assert break_even_rank(m, n) == 32.0 and 32 * (m + n) == m * n
    assert ff_max_rank(m, n) == 31
    # 1536 x 576: mn / (m + n) = 418.9...; 418 * 2112 = 882816 < 884736 <= 419 * 2112 = 884928.
    assert ff_max_rank(1536, 576) == 418


def test_check_rejects_break_even_rank_and_counts_below_it():
    shape = EVEN
    plan = edit_layer(full_plan(shape), 0, ff={"gate": None, "up": 32, "down": None})
    with pytest.raises(CompressError) as e:
        plan.check(shape, source="p.json")
    assert str(e.value) == ("plan p.json: layer 0 up: rank 32 stores 4608 parameters, not fewer than dense "
                            "96x48 = 4608; write null (dense) or a rank of at most 31")
    plan = edit_layer(full_plan(shape), 0, ff={"gate": None, "up": 31, "down": None})
    dense = dense_block_params(shape)
    assert count_params(shape, plan).block_kept == dense - 96 * 48 + 31 * (96 + 48)


@pytest.mark.parametrize("shape", [EVEN, SMOL, TINY["gpt2"]], ids=["even", "smol", "gpt2"])
@pytest.mark.parametrize("strategy", sorted(STRATEGIES))
def test_strategies_never_store_a_factored_ff_at_or_above_break_even(shape, strategy):
    spectra = flat_spectra(shape) if shape is EVEN else decaying_spectra(shape, seed=3)
    for keep in (0.3, 0.6, 0.75, 0.9, 0.99):
        plan = make_plan(spectra, shape, keep, strategy)
        for lr in plan.layers:
            for kind, r in lr.ff.items():
                m, n = ff_dims(shape, kind)
                assert r is None or r * (m + n) < m * n


def test_global_switches_ff_to_dense_when_the_budget_allows():
    shape = EVEN
    spectra = flat_spectra(shape, only=(0, "up"))  # all energy in layer 0 up, 96 x 48
    start = sum(min(c.unit_params * max(1, math.ceil(c.max_units / 8)), c.dense_params)
                for c in matrix_layout(shape))  # everything at 1/8 of its maximum
    up_start = 6 * (96 + 48)  # ceil(48 / 8) = 6 units
    dense = dense_block_params(shape)
    exact = start - up_start + 96 * 48  # just enough for dense
    plan = plan_global(spectra, shape, (exact + 0.5) / dense)
    assert plan.ranks(0).ff["up"] is None and plan.block_params_kept == exact
    # One parameter short: the switch (144 parameters from rank 31) no longer fits, rank 31 does.
    plan = plan_global(spectra, shape, (exact - 1 + 0.5) / dense)
    assert plan.ranks(0).ff["up"] == 31


def test_global_prefers_a_jump_to_dense_over_better_single_units():
    # Layer 0 up (96 x 48) is flat: one unit wins 1/48 of its energy for 144 parameters (1.45e-4 per parameter),
    # but the jump from its start (6 units) to dense wins 42/48 for 4608 - 864 = 3744 (2.34e-4 per parameter).
    # Layer 0 down wins 1/32 per 144-parameter unit (2.17e-4), between the two. With a budget of exactly that
    # jump, the best use is the jump (energy 0.875), not 26 units of down (26/32 = 0.81).
    shape = EVEN
    spectra = []
    for c in matrix_layout(shape):
        if (c.layer, c.kind) == (0, "up"):
            g = np.ones(c.max_units)
        elif (c.layer, c.kind) == (0, "down"):
            g = np.r_[np.ones(32), np.zeros(c.max_units - 32)]
        else:
            g = np.zeros(c.max_units)
        spectra.append(c.with_gains(g))
    start = sum(min(c.unit_params * max(1, math.ceil(c.max_units / 8)), c.dense_params)
                for c in matrix_layout(shape))
    plan = plan_global(spectra, shape, (start + 3744 + 0.5) / dense_block_params(shape))
    assert plan.ranks(0).ff["up"] is None and plan.ranks(0).ff["down"] == 6


# ------------------------------------------------------------------------------------------- budgets

@pytest.fixture(scope="module")
def smol_spectra():
    return decaying_spectra(SMOL, seed=1)


@pytest.mark.parametrize("keep", [0.2, 0.3, 0.5, 0.8, 0.95])
@pytest.mark.parametrize("strategy", sorted(STRATEGIES))
def test_strategies_meet_the_budget(smol_spectra, strategy, keep):
    plan = make_plan(smol_spectra, SMOL, keep, strategy)
    dense = dense_block_params(SMOL)
    kept = count_params(SMOL, plan).block_kept
    assert plan.block_params_dense == dense and plan.block_params_kept == kept
    assert kept <= keep * dense
    gap = keep * dense - kept
    if strategy == "global":
        # Whatever is left is smaller than the next step of every unfinished matrix, at most one unit.
        assert gap < max(s.unit_params for s in smol_spectra)
    else:
        # Just past the bisected threshold every matrix grows by at most one unit (or one switch to dense).
        assert gap < sum(s.unit_params for s in smol_spectra)


def test_keep_one_gives_the_full_plan(smol_spectra):
    full = full_plan(SMOL)
    for strategy in STRATEGIES:
        plan = make_plan(smol_spectra, SMOL, 1.0, strategy)
        assert plan.layers == full.layers, strategy


def test_uniform_uses_one_factor(smol_spectra):
    plan = plan_uniform(smol_spectra, SMOL, 0.4)
    ranks = ranks_of(plan, SMOL)
    lo, hi = 0.0, 1.0
    for s in smol_spectra:
        r = ranks[(s.layer, s.kind)]
        if r is not None and r > 1:
            # round(f * M) = r  <=>  (r - 0.5) / M <= f < (r + 0.5) / M
            lo, hi = max(lo, (r - 0.5) / s.max_units), min(hi, (r + 0.5) / s.max_units)
    assert lo < hi


def test_energy_uses_one_threshold(smol_spectra):
    plan = make_plan(smol_spectra, SMOL, 0.4, "energy")
    ranks = ranks_of(plan, SMOL)
    below, reached = [], []
    for s in smol_spectra:
        r = ranks[(s.layer, s.kind)]
        c = np.cumsum(s.gains) / np.sum(s.gains)
        reached.append(1.0 if r is None else c[r - 1])
        if r is not None and r > 1:
            below.append(c[r - 2])
    # Smallest k reaching e for one e  <=>  every k-1 falls short of every k's energy.
    assert max(below) < min(reached)


def test_global_keeps_more_energy_than_the_others(smol_spectra):
    # Greedy by slope on concave curves solves the relaxed problem (Lagrangian argument, Everett 1963, from
    # memory), so at the same budget it should not lose to either fixed rule.
    for keep in (0.2, 0.5):
        e = {k: energy_kept(smol_spectra, make_plan(smol_spectra, SMOL, keep, k, min_fraction=1 / 64)
                            if k == "global" else make_plan(smol_spectra, SMOL, keep, k), SMOL).sum()
             for k in STRATEGIES}
        assert e["global"] >= max(e["uniform"], e["energy"]), e


def test_global_respects_its_starting_ranks(smol_spectra):
    plan = plan_global(smol_spectra, SMOL, 0.2)
    ranks = ranks_of(plan, SMOL)
    for s in smol_spectra:
        r = ranks[(s.layer, s.kind)]
        assert r is None or r >= math.ceil(s.max_units / 8)


def test_global_gives_all_ranks_to_the_only_energetic_matrix():
    shape = TINY["llama"]
    layout = matrix_layout(shape)
    target = (1, "up")
    spectra = [c.with_gains(np.exp(-np.arange(c.max_units) / 4.0) if (c.layer, c.kind) == target
                            else np.zeros(c.max_units)) for c in layout]
    start = {(c.layer, c.kind): max(1, math.ceil(c.max_units / 8)) for c in layout}  # qk 1, vo 1, FF 4
    plan = plan_global(spectra, shape, 1.0)
    ranks = ranks_of(plan, shape)
    assert ranks.pop(target) is None
    assert ranks == {k: v for k, v in start.items() if k != target}


def test_global_without_normalising_follows_raw_energy():
    shape = TINY["llama"]
    layout = matrix_layout(shape)
    target = (1, "up")
    spectra = [c.with_gains(np.exp(-np.arange(c.max_units) / 4.0) * (1.0 if (c.layer, c.kind) == target else 1e-6))
               for c in layout]
    start = {(c.layer, c.kind): max(1, math.ceil(c.max_units / 8)) for c in layout}
    dense = dense_block_params(shape)
    need = sum(min(start[(c.layer, c.kind)] * c.unit_params, c.dense_params) for c in layout)
    budget = need - 4 * (64 + 32) + 64 * 32  # room for exactly the target going dense
    raw = plan_global(spectra, shape, (budget + 0.5) / dense, normalise=False)
    ranks = ranks_of(raw, shape)
    assert ranks.pop(target) is None and raw.block_params_kept == budget
    assert ranks == {k: v for k, v in start.items() if k != target}
    # Normalised, the weak matrices' relative gains equal the target's, so it no longer takes everything.
    rel = plan_global(spectra, shape, (budget + 0.5) / dense)
    assert ranks_of(rel, shape)[target] is not None


# ------------------------------------------------------------------------------------------- errors

def test_make_plan_rejects_bad_keep():
    spectra = decaying_spectra(TINY["llama"])
    for bad in (0, 0.0, -0.1, 1.5, float("nan"), True, "0.5"):
        with pytest.raises(CompressError) as e:
            make_plan(spectra, TINY["llama"], bad, "uniform")
        assert str(e.value) == ("--keep: expected the fraction of block-matrix parameters to keep, in (0, 1], "
                                f"got {bad!r}; e.g. --keep 0.5")


def test_make_plan_rejects_an_unreachable_budget():
    shape = TINY["llama"]
    # Every matrix at 1 unit: qk 2*32*(4+2) = 384, vo 32*(2+4) = 192, three FF at 64+32 = 96 -> 864 per layer.
    need, dense = 2 * (384 + 192 + 3 * 96), dense_block_params(shape)
    assert dense == 18432
    with pytest.raises(CompressError) as e:
        make_plan(decaying_spectra(shape), shape, 0.05, "uniform")
    # floor(0.05 * 18432) = 921; 1728 / 18432 = 0.09375, rounded up to 4 places.
    assert need == 1728
    assert str(e.value) == ("--keep 0.05: the budget is 921 of 18432 block-matrix parameters but the smallest "
                            "plan (every matrix at 1 unit(s)) needs 1728; raise --keep to at least 0.0938")
    with pytest.raises(CompressError, match=r"^--keep 0.05: .*\(every matrix at 0.125 of its maximum units\) "
                                            r"needs \d+; raise --keep to at least [\d.]+ or lower min_fraction$"):
        make_plan(decaying_spectra(shape), shape, 0.05, "global")


def test_make_plan_rejects_unknown_strategy_and_option():
    spectra = decaying_spectra(TINY["llama"])
    with pytest.raises(CompressError) as e:
        make_plan(spectra, TINY["llama"], 0.5, "random")
    assert str(e.value) == "--strategy: unknown strategy 'random'; expected one of energy, global, loss, uniform"
    with pytest.raises(CompressError) as e:
        make_plan(spectra, TINY["llama"], 0.5, "uniform", normalise=False)
    assert str(e.value) == ("strategy 'uniform' has no option 'normalise'; its options are min_units, "
                            "bytes_per_element")


def test_spectra_must_match_the_model():
    shape = TINY["llama"]
    spectra = decaying_spectra(shape)
    with pytest.raises(CompressError) as e:
        make_plan(spectra[:-1], shape, 0.5)
    assert str(e.value) == "spectra: no spectrum for layer 1 'down'"
    wrong = MatrixSpectrum(0, "qk", "pair", 4, 100, 400, (4.0, 3.0, 2.0, 1.0))
    with pytest.raises(CompressError) as e:
        make_plan([wrong] + spectra[1:], shape, 0.5)
    assert str(e.value) == ("spectra: layer 0 'qk' has unit_params 100, this model needs 384; "
                            "build spectra from matrix_layout(shape)")
    with pytest.raises(CompressError) as e:
        MatrixSpectrum(0, "qk", "pair", 4, 384, 1536, (1.0, 2.0, 0.5, 0.1))
    assert str(e.value) == ("spectrum of layer 0 'qk': gains must be non-increasing "
                            "(sort the singular values / pair scores)")


P = "plan p.json"
FF = {"gate": None, "up": None, "down": None}


@pytest.mark.parametrize("change, message", [
    (dict(qk=5), f"{P}: layer 1 qk: rotary pairs 5 is above the maximum 4 (head_dim 8 has 4 pairs); lower it"),
    (dict(vo=9), f"{P}: layer 1 vo: rank 9 is above the maximum 8 (head_dim 8); lower it"),
    (dict(ff={**FF, "down": 40}), f"{P}: layer 1 down: rank 40 is above the maximum 32 (32x64); lower it"),
    (dict(ff={**FF, "gate": 22}), f"{P}: layer 1 gate: rank 22 stores 2112 parameters, not fewer than dense "
                                  "64x32 = 2048; write null (dense) or a rank of at most 21"),
    (dict(qk=0), f"{P}: layer 1 qk: rotary pairs 0; every matrix keeps at least 1"),
    (dict(vo=-2), f"{P}: layer 1 vo: rank -2; every matrix keeps at least 1"),
    (dict(ff={**FF, "up": 0}), f"{P}: layer 1 up: rank 0; every matrix keeps at least 1"),
    (dict(qk=2.0), f"{P}: layer 1 qk: expected a whole number (rotary pairs), got 2.0"),
    (dict(ff={**FF, "proj": 3}), f"{P}: layer 1: unknown kind 'proj'; this model's feed-forward has gate, up, down"),
    (dict(ff={"up": None, "down": None}), f"{P}: layer 1 gate: no rank given; write a rank or null (dense)"),
    (dict(qk=2, qk_pairs=((0, 1),)), f"{P}: layer 1 qk_pairs: 1 groups listed, the model has 2 key/value groups"),
    (dict(qk=2, qk_pairs=((0, 1), (2,))), f"{P}: layer 1 qk_pairs group 1: 1 pairs listed, qk keeps 2"),
    (dict(qk=2, qk_pairs=((0, 1), (3, 1))),
     f"{P}: layer 1 qk_pairs group 1: expected sorted distinct pair indices in 0..3, got [3, 1]"),
    (dict(qk=2, qk_pairs=((0, 1), (1, 4))),
     f"{P}: layer 1 qk_pairs group 1: expected sorted distinct pair indices in 0..3, got [1, 4]"),
])
def test_check_rejects_bad_layer(change, message):
    shape = TINY["llama"]
    plan = edit_layer(full_plan(shape), 1, **change)
    with pytest.raises(CompressError) as e:
        plan.check(shape, source="p.json")
    assert str(e.value) == message


def test_check_rejects_bad_layer_lists():
    shape = TINY["llama"]
    full = full_plan(shape)
    cases = [
        (full.layers[:1], f"{P}: layer 1 missing (the plan lists 1 of the model's 2 layers); make the plan again"),
        (full.layers + (dataclasses.replace(full.layers[0], layer=5),),
         f"{P}: layer 5 does not exist (the model has layers 0..1)"),
        ((full.layers[0], full.layers[0], full.layers[1]), f"{P}: layer 0 is listed twice"),
    ]
    for layers, message in cases:
        with pytest.raises(CompressError) as e:
            dataclasses.replace(full, layers=layers).check(shape, source="p.json")
        assert str(e.value) == message


def test_check_rejects_a_plan_of_another_model():
    plan = full_plan(TINY["llama"])
    with pytest.raises(CompressError) as e:
        plan.check(TINY["gpt2"], source="p.json")
    assert str(e.value) == ("plan p.json: made for another model (family 'llama' in the plan, 'gpt2' in the "
                            "model; n_kv_heads 2 in the plan, 4 in the model; d_ff 64 in the plan, 128 in the "
                            "model); make a new plan for this model")


def test_check_names_the_file_for_an_edited_plan(tmp_path):
    shape = TINY["gpt2"]
    path = tmp_path / "edited.json"
    path.write_text(full_plan(shape).to_json().replace('"qk": 8', '"qk": 9', 1))
    plan = RankPlan.from_json(path.read_text(), source=str(path))
    with pytest.raises(CompressError) as e:
        plan.check(shape, source=str(path))
    assert str(e.value) == f"plan {path}: layer 0 qk: rank 9 is above the maximum 8 (head_dim 8); lower it"
    path.write_text(full_plan(shape).to_json().replace('"vo": 8', '"vo": 8, "extra": 1', 1))
    with pytest.raises(CompressError) as e:
        RankPlan.from_json(path.read_text(), source=str(path))
    assert str(e.value) == f"plan {path} layers[0]: unknown field 'extra'"
