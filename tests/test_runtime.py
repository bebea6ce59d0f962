"""Our forward pass against transformers' on the same tiny weights (the reference implementation)."""
import pytest
import torch

from attncompress.loading import load_model
from attncompress.model import KVCache, SharedInput, apply_rotary, fuse, rotary_tables
from conftest import FAMILIES


@pytest.mark.parametrize("fused", [False, True])
@pytest.mark.parametrize("family", FAMILIES)
def test_forward_matches_transformers(tiny_dirs, family, fused):
    d, ref = tiny_dirs[family]
    ours = load_model(d)
    if fused:  # one product for q, k, v (and for gate, up): the inference path
        fuse(ours.model)
        assert all(isinstance(blk.attn.qkv, SharedInput) for blk in ours.model.blocks)
    torch.manual_seed(1)
    ids = torch.randint(0, 96, (3, 12))
    with torch.no_grad():
        if family == "bert":
            mask = torch.ones(3, 12, dtype=torch.long)
            mask[1, 7:] = 0  # a padded batch
            mask[2, 3:] = 0
            want = ref(ids, attention_mask=mask).last_hidden_state
            got = ours.model(ids, attention_mask=mask)
            keep = mask.bool()
            # source: transformers BertModel forward; padded positions are not compared (nobody reads them)
            torch.testing.assert_close(got[keep], want[keep], atol=1e-4, rtol=0)
        else:
            want = ref(ids).logits
            got = ours.model(ids)
            # source: transformers LlamaForCausalLM / Qwen2ForCausalLM / GPT2LMHeadModel forward
            torch.testing.assert_close(got, want, atol=1e-4, rtol=0)


@pytest.mark.parametrize("fused", [False, True])
@pytest.mark.parametrize("family", ["llama", "qwen2", "gpt2"])
def test_cached_decoding_equals_full_forward(tiny_dirs, family, fused):
    d, _ = tiny_dirs[family]
    m = load_model(d).model
    if fused:
        fuse(m)
    ids = torch.randint(0, 96, (2, 10))
    with torch.no_grad():
        full = m(ids)
        cache = KVCache(m, batch=2, max_len=16)
        first = m(ids[:, :6], cache=cache, start=0)  # a prompt of 6, then 4 single steps
        steps = [m(ids[:, i:i + 1], cache=cache, start=i) for i in range(6, 10)]
    got = torch.cat([first] + steps, dim=1)
    # identity: a causal model's logits do not depend on whether earlier keys came from a cache
    torch.testing.assert_close(got, full, atol=1e-5, rtol=0)


def test_rotary_score_depends_only_on_offset():
    # identity: q·R(m)ᵀR(n)k = q·R(n-m)k for rotations; the score is a function of the offset alone
    torch.manual_seed(0)
    inv = 10000.0 ** (-torch.arange(4).double() / 4).float()[None]  # (g=1, p=4)
    q, k = torch.randn(1, 1, 1, 8), torch.randn(1, 1, 1, 8)

    def score(m, n):
        cq, sq = rotary_tables(inv, m, 1)
        ck, sk = rotary_tables(inv, n, 1)
        return (apply_rotary(q, cq, sq) * apply_rotary(k, ck, sk)).sum()
    torch.testing.assert_close(score(3, 7), score(10, 14), atol=1e-5, rtol=0)
    torch.testing.assert_close(score(0, 5), score(20, 25), atol=1e-5, rtol=0)


def test_rmsnorm_identity():
    # identity (common practice, no source): RMSNorm output with unit weight has mean square 1 (up to eps)
    from attncompress.model import RMSNorm
    x = torch.randn(4, 16) * 3
    y = RMSNorm(torch.ones(16), 1e-12)(x)
    torch.testing.assert_close(y.pow(2).mean(-1), torch.ones(4), atol=1e-5, rtol=0)


@pytest.mark.parametrize("family", ["llama", "qwen2", "gpt2"])
def test_fused_decode_path_equals_the_plain_one(tiny_dirs, tmp_path, family):
    from attncompress.compress import compress
    out = tmp_path / "c"
    compress(str(tiny_dirs[family][0]), str(out), keep=0.5, weights_only=True, quiet=True)  # low-rank ff factors
    plain, fast = load_model(out).model, fuse(load_model(out).model)
    assert sum(p.numel() for p in plain.parameters()) == sum(p.numel() for p in fast.parameters())
    ids = torch.randint(0, 96, (2, 10), generator=torch.Generator().manual_seed(2))
    with torch.inference_mode():
        got = []
        for m in (plain, fast):
            cache = KVCache(m, batch=2, max_len=16)
            got.append(torch.cat([m(ids[:, :6], cache=cache, start=0)]
                                 + [m(ids[:, i:i + 1], cache=cache, start=i) for i in range(6, 10)], dim=1))
            assert [k.shape for k in cache.k] == [k.shape for k in KVCache(plain, 2, 16).k]  # reduced widths kept
    # identity: stacking the matrices of one input changes which product computes an output, not its value
    torch.testing.assert_close(got[1], got[0], atol=1e-5, rtol=1e-5)


# ------------------------------------------------------------------------- float16 product weights (`halve`)

def _rounded_by_numpy(m):
    """A float32 copy of a fused model whose product weights numpy rounded to float16 and back."""
    import copy

    import numpy as np
    from attncompress.model import _product_weights
    ref = copy.deepcopy(m)
    for _, _, _, w in _product_weights(ref):
        w.data = torch.from_numpy(w.data.numpy().astype(np.float16).astype(np.float32))  # numpy's rounding
    return ref


def _decode(m, ids, prompt: int):
    cache = KVCache(m, batch=ids.shape[0], max_len=ids.shape[1])
    out = [m(ids[:, :prompt], cache=cache, start=0)]
    out += [m(ids[:, i:i + 1], cache=cache, start=i) for i in range(prompt, ids.shape[1])]
    return torch.cat(out, dim=1)


@pytest.mark.parametrize("family", ["llama", "qwen2", "gpt2"])
def test_halved_weights_are_numpys_float16_rounding(tiny_dirs, tmp_path, family):
    from attncompress.compress import compress
    from attncompress.model import STEP_ROWS, _product_weights, halve
    out = tmp_path / "c"
    compress(str(tiny_dirs[family][0]), str(out), keep=0.5, weights_only=True, quiet=True)  # factor pairs too
    m = fuse(load_model(out).model)
    ref = _rounded_by_numpy(m)
    halve(m)
    assert {w.dtype for *_, w in _product_weights(m)} == {torch.float16}
    ids = torch.randint(0, 96, (STEP_ROWS + 1, 12), generator=torch.Generator().manual_seed(3))
    with torch.inference_mode():
        # more rows than STEP_ROWS: every product widens the float16 weights, so the result is float32
        # arithmetic on numpy's rounding of the weights (source: numpy astype(float16), round to nearest even)
        torch.testing.assert_close(m(ids), ref(ids), atol=1e-5, rtol=0)
        # single steps of 2 rows: the float16 kernel, its inputs rounded to float16 too (relative error
        # ≤ 2⁻¹¹ per product input, IEEE 754 half precision); the cache path must still equal the full pass
        got, want = _decode(m, ids[:2], 6), ref(ids[:2])
    scale = want.abs().max()
    assert (got - want).abs().max() <= 5e-3 * scale, float((got - want).abs().max() / scale)
    assert (got.argmax(-1) == want.argmax(-1)).float().mean() >= 0.9


@pytest.mark.parametrize("family", ["llama", "qwen2"])
def test_halved_weights_lie_in_one_block_in_the_order_a_step_reads_them(tiny_dirs, tmp_path, family):
    from attncompress.compress import compress
    from attncompress.model import _product_weights, halve
    out = tmp_path / "c"
    compress(str(tiny_dirs[family][0]), str(out), keep=0.5, weights_only=True, quiet=True)  # factor pairs too
    m = halve(fuse(load_model(out).model))
    placed = sorted((w.data_ptr(), name, w.numel() * w.element_size()) for name, *_, w in _product_weights(m))
    names = [n for _, n, _ in placed]
    # a step reads block 0's q/k/v first (their shared first matrix, then second ones), then o, gate/up, down,
    # the next block, and the output head last; a factor pair's bᵀ before its a (model.LowRankLinear)
    assert names[0] == "blocks.0.attn.qkv.first" and names[-1] in ("tokens", "lm_head.weight")
    blocks = [int(n.split(".")[1]) for n in names[:-1]]
    assert blocks == sorted(blocks)
    kinds = [next(i for i, k in enumerate((".qkv", ".attn.", ".gate_up", ".ff.")) if k in n) for n in names[:-1]]
    assert all((b, k) <= (b2, k2) for b, k, b2, k2 in zip(blocks, kinds, blocks[1:], kinds[1:]))
    for n in names:
        if n.endswith(".bt"):
            assert names.index(n) + 1 == names.index(n[:-3] + ".a")
    # one block: each tensor starts on a 4 KB boundary right after the previous one
    assert all(p % 4096 == 0 for p, *_ in placed)
    assert all(p2 == p + -(-nb // 4096) * 4096 for (p, _, nb), (p2, _, _) in zip(placed, placed[1:]))


def test_a_product_input_beyond_float16_range_is_redone_in_float32(tiny_dirs):
    from attncompress.model import halve
    m = fuse(load_model(tiny_dirs["llama"][0]).model)
    with torch.no_grad():
        m.blocks[0].ff.gate_up.first.mul_(3e3)  # gate and up ~3000× larger: their product (down's input) ≫ 65504
    ref = _rounded_by_numpy(m)
    halve(m)
    ids = torch.randint(0, 96, (1, 8), generator=torch.Generator().manual_seed(4))
    with torch.inference_mode():
        got, want = _decode(m, ids, 4), ref(ids)
        short = m.last_logits(ids[:, :3], cache=KVCache(m, 1, 8), start=0)  # a prefill of 3 rows: float16 too
    assert torch.isfinite(got).all() and torch.isfinite(short).all()
    torch.testing.assert_close(short[:, 0], want[:, 2], atol=1e-3 * float(want.abs().max()), rtol=0)
    # the steps that overflowed in float16 were recomputed with the widened weights: float32 arithmetic
    torch.testing.assert_close(got[:, 4:], want[:, 4:], atol=1e-3 * float(want.abs().max()), rtol=0)


def test_fuse_lays_every_product_weight_out_column_major(tiny_dirs, tmp_path):
    from attncompress.compress import compress
    from attncompress.model import _product_weights
    out = tmp_path / "c"
    compress(str(tiny_dirs["llama"][0]), str(out), keep=0.5, weights_only=True, quiet=True)
    m = fuse(load_model(out).model)
    # benchmarks/bandwidth.py: one-row products read W fastest when Wᵀ is contiguous (strides (1, d_out))
    assert all(w.T.is_contiguous() for *_, w in _product_weights(m))


def test_halved_steps_run_the_float16_kernel_and_prompts_the_float32_one(tiny_dirs, monkeypatch):
    import torch.nn.functional as F
    from attncompress.model import STEP_ROWS, halve
    m = halve(fuse(load_model(tiny_dirs["qwen2"][0]).model))
    seen, real = [], F.linear
    monkeypatch.setattr(F, "linear", lambda x, w, b=None: seen.append((x.shape[0] * x.shape[1], x.dtype)) or real(x, w, b))
    ids = torch.randint(0, 96, (1, 9), generator=torch.Generator().manual_seed(5))
    with torch.inference_mode():
        _decode(m, ids, STEP_ROWS + 1)
    assert {dt for rows, dt in seen if rows > STEP_ROWS} == {torch.float32}  # the prompt: widened weights
    assert {dt for rows, dt in seen if rows <= STEP_ROWS} == {torch.float16}  # the steps: 16-bit products
