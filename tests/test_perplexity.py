"""The perplexity protocol: its windows, and our perplexity against one computed from the reference library's logits."""
import json
import math

import pytest
import torch
from click.testing import CliRunner
from tokenizers import Tokenizer

from attncompress.cli import main
from attncompress.evaluate import windows
from conftest import reference_nll


def test_windows_follow_the_stated_protocol():
    # worked by hand from the protocol in the docstring: 9 targets in chunks of 3 (stride 4 > context - 1)
    assert windows(10, 4, 4) == [(0, 4, 3), (3, 7, 3), (6, 10, 3)]
    assert windows(10, 4, 2) == [(0, 4, 3), (2, 6, 2), (4, 8, 2), (6, 10, 2)]
    assert windows(11, 4, 2)[-1] == (7, 11, 1)  # a short last chunk still sees a whole window
    assert windows(3, 4, 4) == [(0, 3, 2)] and windows(1, 4, 4) == []
    for n, c, s in [(50, 8, 8), (50, 8, 3), (50, 8, 1), (7, 8, 8), (57, 16, 16)]:
        targets = [e - k for b, e, new in windows(n, c, s) for k in range(new, 0, -1)]
        assert targets == list(range(1, n)), (n, c, s)  # every token after the first, once, in order
        assert all(e - b <= c and e - b > new for b, e, new in windows(n, c, s))


@pytest.mark.parametrize("family", ["llama", "gpt2"])
@pytest.mark.parametrize("context,stride", [(16, None), (16, 16), (16, 5), (16, 1)])
def test_perplexity_command_matches_the_reference_library(tiny_dirs, calib_file, family, context, stride):
    d, ref = tiny_dirs[family]
    args = ["perplexity", str(d), "--text", str(calib_file), "--context", str(context), "--max-tokens", "70",
            "--json"] + (["--stride", str(stride)] if stride else [])
    r = CliRunner().invoke(main, args)
    assert r.exit_code == 0, r.output
    got = json.loads(r.stdout)
    ids = torch.tensor(Tokenizer.from_file(str(d / "tokenizer.json")).encode(calib_file.read_text()).ids[:70])
    nll, count = reference_nll(lambda x: ref(x).logits, ids, context, stride or context)
    # source: transformers' logits, scored by the protocol as written in conftest.reference_nll
    assert got["tokens"] == count == 69
    assert got["nll"] == pytest.approx(nll, abs=1e-5) and got["perplexity"] == pytest.approx(math.exp(nll), rel=1e-5)


def test_perplexity_of_an_encoder_is_refused(tiny_dirs, calib_file):
    r = CliRunner().invoke(main, ["perplexity", str(tiny_dirs["bert"][0]), "--text", str(calib_file)])
    assert r.exit_code == 1 and "perplexity needs a decoder" in r.output and "Traceback" not in r.output
