"""The tiny test models attend sharply, so score, pair and position mistakes change their outputs."""
import pytest
import torch
import transformers as tf

from conftest import FAMILIES


@pytest.mark.parametrize("family", FAMILIES)
def test_tiny_models_attend_sharply(tiny_dirs, family):
    d, _ = tiny_dirs[family]
    cls = tf.AutoModel if family == "bert" else tf.AutoModelForCausalLM
    ref = cls.from_pretrained(d, attn_implementation="eager").eval()
    ids = torch.randint(0, 96, (4, 32), generator=torch.Generator().manual_seed(5))
    with torch.no_grad():
        att = ref(ids, output_attentions=True).attentions  # per layer (b, h, s, s)
    # source: transformers' eager attention weights. Rows 16..31 of a uniform causal softmax have a largest
    # weight of 1/17..1/32 (below 0.06; bidirectional 1/32): a mean above 0.3 means the rows are peaked
    peak = torch.stack([a[:, :, 16:].amax(-1).mean() for a in att]).mean().item()
    assert peak > 0.3, peak
