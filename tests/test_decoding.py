"""Cached decoding of compressed models (narrowed heads, kept rotary pairs, grouped heads) against their full forward."""
import pytest
import torch

from attncompress import api
from attncompress.model import KVCache
from conftest import load_model


@pytest.fixture(scope="module")
def narrowed(tiny_dirs, calib_file, tmp_path_factory):
    """family → a compressed copy of the tiny model at keep 0.4 (whitened), so heads are narrowed."""
    out = {}
    for fam in ("llama", "qwen2", "gpt2"):
        d = tmp_path_factory.mktemp(f"n-{fam}") / "m"
        # uniform ranks narrow every head (the loss allocation may keep a cheap attention whole)
        api.compress(str(tiny_dirs[fam][0]), str(d), keep=0.4, texts=[str(calib_file)], quiet=True, n_blocks=8,
                     context=32, strategy="uniform")
        out[fam] = d
    return out


@pytest.mark.parametrize("family", ["llama", "qwen2", "gpt2"])  # rotary with 2 groups of 2 heads (qwen2 biased), plain
def test_cached_decoding_of_a_compressed_model_equals_its_full_forward(narrowed, family):
    m = load_model(narrowed[family]).model
    widths = [(b.attn.w_qk, b.attn.w_vo) for b in m.blocks]
    assert all(w_qk < 8 and w_vo < 8 for w_qk, w_vo in widths), widths  # every head is narrower than head_dim 8
    ids = torch.randint(0, 96, (3, 14), generator=torch.Generator().manual_seed(2))
    with torch.no_grad():
        full = m(ids)
        cache = KVCache(m, batch=3, max_len=16)
        got = [m(ids[:, :5], cache=cache, start=0)]  # a prompt of 5, one step, a chunk of 3, then single steps
        got.append(m(ids[:, 5:6], cache=cache, start=5))
        got.append(m(ids[:, 6:9], cache=cache, start=6))
        got += [m(ids[:, i:i + 1], cache=cache, start=i) for i in range(9, 14)]
    # identity: a causal model's logits do not depend on whether earlier keys came from a cache
    torch.testing.assert_close(torch.cat(got, dim=1), full, atol=1e-5, rtol=0)
