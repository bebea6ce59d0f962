"""Rotary pair choice on a model whose right pairs are known by construction."""
import json

import pytest
import torch

from attncompress import api
from conftest import load_model, make_reference, tiny_tokenizer

HD, KEEP = 8, {0: [[1, 3], [0, 2]], 1: [[0, 3], [1, 2]]}  # layer → per key/value group, the pairs that matter


def _pairs_model(tmp_path):
    """The tiny llama with, per group, two pairs whose query rows are zero and whose key rows are tripled.

    A dropped pair's query rows being zero, its score term q_pᵀ R k_p is zero at every offset: keeping the
    other two pairs is exact. Its keys being large, a choice by key size (or by a sum of query and key
    sizes) picks the wrong pairs; one by the first pairs in order is wrong in three of the four groups.
    """
    ref = make_reference("llama", seed=3)
    with torch.no_grad():
        for i, groups in KEEP.items():
            att = ref.model.layers[i].self_attn
            for g, kept in enumerate(groups):
                for pair in set(range(HD // 2)) - set(kept):
                    for dim in (pair, pair + HD // 2):  # rotate_half layout: pair i is dims i and i + hd/2
                        att.k_proj.weight[g * HD + dim] *= 3
                        for h in (2 * g, 2 * g + 1):  # the group's two query heads
                            att.q_proj.weight[h * HD + dim] = 0
    d = tmp_path / "pairs"
    ref.save_pretrained(d)
    tiny_tokenizer().save(str(d / "tokenizer.json"))
    return d, ref.eval()


@pytest.mark.parametrize("whitened", [False, True])
def test_pair_choice_keeps_the_pairs_that_carry_the_scores(tmp_path, calib_file, whitened):
    d, ref = _pairs_model(tmp_path)
    api.plan(str(d), str(tmp_path / "full.json"), keep=1.0, quiet=True)
    plan = json.loads((tmp_path / "full.json").read_text())
    for lr in plan["layers"]:
        lr["qk"], lr["qk_pairs"] = 2, None  # two of four pairs per group; the tool chooses which
    (tmp_path / "plan.json").write_text(json.dumps(plan))
    out = tmp_path / "c"
    api.compress(str(d), str(out), plan_file=str(tmp_path / "plan.json"), quiet=True, weights_only=not whitened,
                 texts=[str(calib_file)] if whitened else None, n_blocks=8, context=32)
    chosen = {lr["layer"]: lr["qk_pairs"] for lr in json.loads((out / "attncompress.json").read_text())["plan"]["layers"]}
    assert chosen == KEEP  # by construction
    ids = torch.randint(0, 96, (2, 24), generator=torch.Generator().manual_seed(4))
    with torch.no_grad():
        got, want = load_model(out).model(ids), ref(ids).logits
    # source: transformers' forward on the constructed weights; dropping pairs with zero query rows is exact
    torch.testing.assert_close(got, want, atol=1e-5, rtol=0)
