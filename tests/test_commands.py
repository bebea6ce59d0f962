"""Every command through the command line on the tiny models, each result checked against an outside source."""
import json
import math

import numpy as np
import pytest
import torch
import transformers as tf
from click.testing import CliRunner
from safetensors import safe_open
from tokenizers import Tokenizer

from attncompress.cli import main
from conftest import WORDS, reference_nll


def _cli(*args):
    r = CliRunner().invoke(main, [str(a) for a in args])
    assert r.exit_code == 0, r.output
    return r


def _ids(d, path, n):
    """The first n token ids of a text file by the model's tokenizer.json (HF tokenizers library)."""
    return torch.tensor(Tokenizer.from_file(str(d / "tokenizer.json")).encode(path.read_text()).ids[:n])


@pytest.fixture(scope="module")
def small(tiny_dirs, calib_file, tmp_path_factory):
    """The tiny llama compressed to keep 0.5 through `compress`, and its `expand`ed dense directory."""
    base = tmp_path_factory.mktemp("cmd")
    _cli("compress", tiny_dirs["llama"][0], "--keep", "0.5", "--text", calib_file, "--out", base / "c",
         "--calib-blocks", "8", "--calib-context", "32")
    _cli("expand", base / "c", "--out", base / "dense")
    return base / "c", base / "dense"


def test_inspect_counts_what_transformers_counts(tiny_dirs):
    d, ref = tiny_dirs["llama"]
    r = json.loads(_cli("inspect", d, "--json").stdout)
    cfg = ref.config
    # source: transformers' config and parameter count of the same directory
    assert (r["family"], r["shape"]["n_heads"], r["shape"]["n_kv_heads"], r["shape"]["d_ff"]) == \
        ("llama", cfg.num_attention_heads, cfg.num_key_value_heads, cfg.intermediate_size)
    assert r["parameters"]["total"] == ref.num_parameters()
    assert r["kv_bytes_per_token"] == cfg.num_hidden_layers * cfg.num_key_value_heads * 2 * 8 * 4  # g·2·hd·float32


def test_spectrum_values_are_numpys_singular_values(tiny_dirs, tmp_path):
    d, ref = tiny_dirs["llama"]
    _cli("spectrum", d, "--out", tmp_path / "s")
    r = json.loads((tmp_path / "s" / "spectra.json").read_text())
    for i, layer in enumerate(ref.model.layers):
        w = layer.mlp.up_proj.weight.detach().double().numpy()
        # source: numpy.linalg.svd of the weight (weights-only spectra)
        np.testing.assert_allclose(r["layers"][i]["up"]["values"][0], np.linalg.svd(w, compute_uv=False), rtol=1e-6)
        assert r["layers"][i]["up"]["energy_kept"][-1] == pytest.approx(1.0)


def test_plan_then_compress_keeps_the_planned_parameters(tiny_dirs, tmp_path):
    d, _ = tiny_dirs["llama"]
    _cli("plan", d, "--keep", "0.5", "--out", tmp_path / "p.json")
    plan = json.loads((tmp_path / "p.json").read_text())
    _cli("compress", d, "--plan", tmp_path / "p.json", "--weights-only", "--out", tmp_path / "c")
    kept = 0
    with safe_open(str(tmp_path / "c" / "model.safetensors"), "pt") as f:
        for name in f.keys():
            t = f.get_slice(name)
            # a block matrix: 2-D float inside a layer, not a norm (the kept rotary pairs are integer indices)
            if name.startswith("layers.") and len(t.get_shape()) == 2 and t.get_dtype() == "F32":
                kept += math.prod(t.get_shape())
    # source: the safetensors library's view of the written file against the plan's own prediction
    assert kept == plan["predicted"]["block_params_kept"] <= 0.5 * plan["predicted"]["block_params_dense"]
    manifest = json.loads((tmp_path / "c" / "attncompress.json").read_text())
    assert [(l["qk"], l["vo"], l["ff"]) for l in manifest["plan"]["layers"]] == \
        [(l["qk"], l["vo"], l["ff"]) for l in plan["layers"]]


def test_embed_is_transformers_mean_pooling(tiny_dirs, tmp_path):
    d, ref = tiny_dirs["bert"]
    lines = [" ".join(WORDS[(7 * i + j) % 95] for j in range(3 + i % 5)) for i in range(6)]
    (tmp_path / "lines.txt").write_text("\n".join(lines) + "\n")
    _cli("embed", d, "--text", tmp_path / "lines.txt", "--out", tmp_path / "e.json")
    got = torch.tensor(json.loads((tmp_path / "e.json").read_text())["embeddings"])
    tok = Tokenizer.from_file(str(d / "tokenizer.json"))
    with torch.no_grad():
        want = torch.stack([ref(torch.tensor([tok.encode(l).ids])).last_hidden_state[0].mean(0) for l in lines])
    # source: transformers' BertModel, one unpadded line at a time, mean over its tokens
    torch.testing.assert_close(got, want, atol=1e-5, rtol=0)


def test_compare_perplexities_match_transformers(tiny_dirs, calib_file, small):
    d, ref = tiny_dirs["llama"]
    comp, dense = small
    r = json.loads(_cli("compare", d, comp, "--text", calib_file, "--context", "16", "--stride", "5",
                        "--max-tokens", "80", "--runs", "0", "--json").stdout)
    q = r["quality"]
    ids = _ids(d, calib_file, 80)
    ref_b = tf.AutoModelForCausalLM.from_pretrained(dense).eval()
    # source: transformers on the source directory and on `expand`'s dense directory, scored by the protocol
    for key, model in (("a", ref), ("b", ref_b)):
        nll, count = reference_nll(lambda x: model(x).logits, ids, 16, 5)
        assert q["tokens"] == count and q[key] == pytest.approx(math.exp(nll), rel=1e-5), key
    assert abs(q["b"] / q["a"] - 1) > 1e-4  # ten times the tolerance: the cut changed the model, so B's check has teeth


def test_run_writes_all_three_and_compares_them(tiny_dirs, calib_file, tmp_path):
    d, ref = tiny_dirs["llama"]
    out = tmp_path / "job"
    r = _cli("run", d, "--keep", "0.6", "--text", calib_file, "--steps", "2", "--eval-tokens", "100", "--out", out,
             "--json")
    q = json.loads(r.stdout)["quality"]
    assert sorted(p.name for p in out.iterdir()) == ["compressed", "report", "tuned"]
    _cli("expand", out / "tuned", "--out", tmp_path / "dense")
    ids = _ids(d, calib_file, 100)
    tuned = tf.AutoModelForCausalLM.from_pretrained(tmp_path / "dense").eval()
    for key, model in (("a", ref), ("b", tuned)):
        nll, _ = reference_nll(lambda x: model(x).logits, ids, q["context"], q["stride"])
        # source: transformers on the source and on the expanded tuned model, scored by the protocol
        assert q[key] == pytest.approx(math.exp(nll), rel=1e-5), key
