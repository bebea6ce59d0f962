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
