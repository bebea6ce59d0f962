"""`compare`: a model against itself, counts against the safetensors headers, the KV formula, the JSON schema."""
import json
import shutil
import struct

import numpy as np
import pytest
import torch
from click.testing import CliRunner

from attncompress import native
from attncompress.cli import main
from attncompress.compare import SCHEMA, compare, embedding_agreement
from attncompress.compress import compress
from attncompress.errors import CompressError
from conftest import WORDS

FLOAT_DTYPES = {"F64": 8, "F32": 4, "F16": 2, "BF16": 2}


def _header(path):
    """Parse a safetensors file by hand: 8-byte little-endian header length, then the JSON header."""
    with open(path, "rb") as f:
        (n,) = struct.unpack("<Q", f.read(8))
        header = json.loads(f.read(n))
    header.pop("__metadata__", None)
    return n, header


def _header_counts(files):
    """(float elements, block-matrix elements, bytes) from the headers alone."""
    total = block = size = 0
    for f in files:
        n, header = _header(f)
        size += 8 + n + max(info["data_offsets"][1] for info in header.values())  # the layout of the format
        for name, info in header.items():
            if info["dtype"] not in FLOAT_DTYPES:
                continue  # integer tensors (kept rotary pairs) are indices, not parameters
            numel = int(np.prod(info["shape"], dtype=np.int64))
            total += numel
            # a block matrix: a 2-D tensor inside a layer that is not a norm (q, k, v, o, feed-forward, factors)
            if "layers." in name and len(info["shape"]) == 2 and "norm" not in name:
                block += numel
    return total, block, size


@pytest.fixture(scope="module")
def compressed(tiny_dirs, tmp_path_factory):
    """family → a compressed copy (keep 0.6, plain SVD) of the tiny model."""
    out = {}
    for fam in ("llama", "qwen2", "gpt2", "bert"):
        d = tmp_path_factory.mktemp(f"c-{fam}") / "m"
        compress(str(tiny_dirs[fam][0]), str(d), keep=0.6, weights_only=True, quiet=True)
        out[fam] = d
    return out


@pytest.fixture(scope="module")
def lines_file(tmp_path_factory):
    """40 seeded lines of the tiny vocabulary."""
    g = torch.Generator().manual_seed(3)
    ids = torch.randint(0, len(WORDS), (40, 9), generator=g).tolist()
    p = tmp_path_factory.mktemp("lines") / "lines.txt"
    p.write_text("\n".join(" ".join(WORDS[i] for i in row) for row in ids) + "\n", encoding="utf-8")
    return p


@pytest.mark.parametrize("family", ["llama", "gpt2"])
def test_model_against_itself_has_ratio_one(tiny_dirs, calib_file, family):
    d = str(tiny_dirs[family][0])
    r = compare(d, d, [str(calib_file)], speed_runs=0)
    q = r["quality"]
    # identity: the same weights on the same tokens give the same perplexity, so the ratio is exactly 1
    assert q["tokens"] > 1000 and q["a"] == q["b"] and q["ratio"] == 1.0
    assert r["ratios"]["parameters"] == 1.0 and r["ratios"]["kv_bytes_per_token"] == 1.0


def test_encoder_against_itself_has_cosine_one(tiny_dirs, compressed, lines_file):
    d = str(tiny_dirs["bert"][0])
    q = compare(d, d, [str(lines_file)], speed_runs=0)["quality"]
    # identity: cos(x, x) = 1 and each line keeps its nearest neighbour
    assert q["lines"] == 40 and q["neighbour_agreement"] == 1.0
    for key in ("mean", "p5", "min"):
        assert q["cosine"][key] == pytest.approx(1.0, abs=1e-9)
    q2 = compare(d, str(compressed["bert"]), [str(lines_file)], speed_runs=0)["quality"]
    assert q2["cosine"]["min"] <= q2["cosine"]["p5"] <= q2["cosine"]["mean"] <= 1.0 + 1e-9


def test_embedding_agreement_matches_numpy():
    torch.manual_seed(0)
    ea = torch.randn(30, 8)
    eb = ea + 0.7 * torch.randn(30, 8)
    got = embedding_agreement(ea, eb)
    a, b = ea.double().numpy(), eb.double().numpy()
    cos = (a * b).sum(1) / np.linalg.norm(a, axis=1) / np.linalg.norm(b, axis=1)
    # source: numpy's cosine and its default (linear) percentile, independently of torch
    assert got["cosine"]["mean"] == pytest.approx(cos.mean(), abs=1e-12)
    assert got["cosine"]["p5"] == pytest.approx(np.percentile(cos, 5), abs=1e-12)
    assert got["cosine"]["min"] == pytest.approx(cos.min(), abs=1e-12)

    def top1(x):
        s = (x / np.linalg.norm(x, axis=1, keepdims=True)) @ (x / np.linalg.norm(x, axis=1, keepdims=True)).T
        np.fill_diagonal(s, -np.inf)
        return s.argmax(1)
    assert got["neighbour_agreement"] == pytest.approx((top1(a) == top1(b)).mean(), abs=1e-12)
    assert 0.0 < got["neighbour_agreement"] < 1.0  # the noise is large enough to change some neighbours


@pytest.mark.parametrize("family", ["llama", "qwen2"])
def test_counts_equal_the_safetensors_headers(tiny_dirs, compressed, family):
    src = tiny_dirs[family][0]
    r = compare(str(src), str(compressed[family]), speed_runs=0)
    for side, d in (("a", src), ("b", compressed[family])):
        files = sorted(d.glob("*.safetensors"))
        total, block, size = _header_counts(files)
        # source: the safetensors format (8-byte length, JSON header, data), parsed here without the library
        assert r[side]["parameters"]["total"] == total
        assert r[side]["parameters"]["block_matrices"] == block
        assert r[side]["disk"]["bytes"] == size == sum(f.stat().st_size for f in files)
        assert r[side]["disk"]["quantised"] is False
    assert r["ratios"]["block_matrices"] == pytest.approx(r["b"]["parameters"]["block_matrices"]
                                                          / r["a"]["parameters"]["block_matrices"])
    assert r["ratios"]["block_matrices"] < 0.75  # keep 0.6 (a plan may land a little off the target)


@pytest.mark.parametrize("family", ["llama", "qwen2", "gpt2"])
def test_kv_bytes_equal_the_plan_formula(tiny_dirs, compressed, family):
    src, out = tiny_dirs[family][0], compressed[family]
    manifest = json.loads((out / "attncompress.json").read_text())
    shape, plan = manifest["shape"], manifest["plan"]
    rotary = shape["rope_theta"] is not None
    # formula: Σ_layers n_kv·(w_qk + w_vo)·4, w_qk = 2·pairs under rotary (each pair is two key numbers)
    want = sum(shape["n_kv_heads"] * ((2 if rotary else 1) * L["qk"] + L["vo"]) * 4 for L in plan["layers"])
    dense = shape["n_layers"] * shape["n_kv_heads"] * 2 * shape["head_dim"] * 4
    r = compare(str(src), str(out), speed_runs=0)
    assert r["b"]["kv_bytes_per_token"] == want
    assert r["a"]["kv_bytes_per_token"] == dense
    assert want < dense


def test_different_tokenizers_are_refused(tiny_dirs, calib_file, tmp_path):
    from tokenizers import Tokenizer, models, pre_tokenizers
    other = tmp_path / "other"
    shutil.copytree(tiny_dirs["llama"][0], other)
    vocab = {"[UNK]": 0, **{w: len(WORDS) - i for i, w in enumerate(WORDS)}}  # the same words, other ids
    tok = Tokenizer(models.WordLevel(vocab, unk_token="[UNK]"))
    tok.pre_tokenizer = pre_tokenizers.Whitespace()
    tok.save(str(other / "tokenizer.json"))
    with pytest.raises(CompressError, match="tokenizers split the text differently"):
        compare(str(tiny_dirs["llama"][0]), str(other), [str(calib_file)], speed_runs=0)


# the documented schema (compare's docstring), key by key
MODEL_KEYS = {"path", "format", "family", "compressed", "parameters", "disk", "runtime_bytes", "kv_bytes_per_token",
              "plan", "method"}
RATIO_KEYS = {"parameters", "block_matrices", "disk_bytes", "runtime_bytes", "kv_bytes_per_token"}
PPL_KEYS = {"kind", "texts", "tokenizer", "tokens", "context", "stride", "a", "b", "nll_a", "nll_b", "ratio",
            "per_text"}
EMB_KEYS = {"kind", "texts", "tokenizer", "lines", "cosine", "neighbour_agreement", "spearman", "cosines", "per_text"}
SIDE_KEYS = {"a_ms", "b_ms", "speedup", "a_runs_ms", "b_runs_ms"}
DECODE_KEYS = SIDE_KEYS | {"cached_tokens", "tokens_per_run", "a_bytes", "b_bytes", "a_limit_ms", "b_limit_ms",
                           "a_over_limit", "b_over_limit", "limit_speedup", "a_tokens_per_s", "b_tokens_per_s"}


def test_json_has_the_documented_keys(tiny_dirs, compressed, calib_file, lines_file, tmp_path):
    runner = CliRunner()
    res = runner.invoke(main, ["compare", str(tiny_dirs["llama"][0]), str(compressed["llama"]), "--text",
                               str(calib_file), "--runs", "2", "--json", "--quiet", "--out", str(tmp_path / "rep")])
    assert res.exit_code == 0, res.output
    r = json.loads(res.output)
    assert r["schema"] == SCHEMA and set(r) == {"schema", "a", "b", "ratios", "quality", "format_effect", "speed"}
    assert set(r["a"]) == set(r["b"]) == MODEL_KEYS and set(r["ratios"]) == RATIO_KEYS
    assert set(r["a"]["parameters"]) == {"total", "block_matrices", "groups"}
    assert set(r["a"]["disk"]) == {"bytes", "files", "quantised", "dtypes", "format", "note"}
    assert r["a"]["disk"]["format"] == r["b"]["disk"]["format"] == "float32" and r["format_effect"] is None
    assert r["a"]["plan"] is None and set(r["b"]["plan"]) == {"strategy", "keep", "layers", "full"}
    assert set(r["quality"]) == PPL_KEYS
    sp = r["speed"]
    assert set(sp) == {"threads", "runs", "thread_choice", "load_average_after", "prompt", "decode", "bandwidth_gb_s",
                       "decode_weights", "decode_step"}
    assert set(sp["thread_choice"]) == {"threads", "wait_policy", "reason", "load_average", "cores"}
    assert sp["decode_step"] == {"a": "compiled kernel", "b": "compiled kernel"} or not native.library()
    assert set(sp["prompt"]) == SIDE_KEYS | {"tokens"} and set(sp["decode"]) == DECODE_KEYS
    assert len(sp["decode"]["a_runs_ms"]) == 2 and sp["prompt"]["tokens"] == 256
    # definition: speedup = time of A / time of B
    assert sp["decode"]["speedup"] == pytest.approx(sp["decode"]["a_ms"] / sp["decode"]["b_ms"])
    assert (tmp_path / "rep" / "report.md").is_file()
    assert json.loads((tmp_path / "rep" / "compare.json").read_text()) == r

    res = runner.invoke(main, ["compare", str(tiny_dirs["bert"][0]), str(compressed["bert"]), "--text",
                               str(lines_file), "--runs", "1", "--json", "--quiet"])
    assert res.exit_code == 0, res.output
    r = json.loads(res.output)
    assert set(r["quality"]) == EMB_KEYS and set(r["quality"]["cosine"]) == {"mean", "p5", "min"}
    assert set(r["speed"]) == {"threads", "runs", "thread_choice", "load_average_after", "batch"}
    assert set(r["speed"]["batch"]) == SIDE_KEYS | {"sentences", "tokens", "a_sentences_s", "b_sentences_s"}
    assert r["speed"]["batch"]["sentences"] == 32
    # definition: sentences per second of a batch of 32 = 32 / its time
    assert r["speed"]["batch"]["b_sentences_s"] == pytest.approx(32e3 / r["speed"]["batch"]["b_ms"])
    assert r["a"]["kv_bytes_per_token"] is None and r["ratios"]["kv_bytes_per_token"] is None


def test_cli_table_and_errors(tiny_dirs, compressed, calib_file):
    runner = CliRunner()
    res = runner.invoke(main, ["compare", str(tiny_dirs["llama"][0]), str(compressed["llama"]), "--text",
                               str(calib_file), "--runs", "0", "--quiet"])
    assert res.exit_code == 0, res.output
    assert "perplexity" in res.output and "KV cache bytes/token" in res.output
    res = runner.invoke(main, ["compare", str(tiny_dirs["llama"][0]), str(tiny_dirs["bert"][0]), "--runs", "0"])
    assert res.exit_code == 1
    assert res.output.strip().splitlines()[-1].startswith("Error: ") and "decoder" in res.output



def _numpy_average_ranks(x):
    """Reference ranks by their definition: 1 + (values below) + (other values equal) / 2, with numpy."""
    x = np.asarray(x)
    return 1 + (x[None, :] < x[:, None]).sum(1) + ((x[None, :] == x[:, None]).sum(1) - 1) / 2


def test_spearman_matches_a_numpy_reference():
    from attncompress.evaluate import ranks, spearman
    g = torch.Generator().manual_seed(1)
    x = torch.randint(0, 6, (40,), generator=g).double()  # many ties
    y = x + torch.randint(0, 4, (40,), generator=g).double()
    # source: scipy is not installed in the venv, so a numpy reference written differently: ranks by counting
    # (average ranks for ties, as scipy.stats.rankdata's default) and numpy's Pearson correlation of the ranks
    np.testing.assert_allclose(ranks(x).numpy(), _numpy_average_ranks(x.numpy()), rtol=0, atol=1e-12)
    want = np.corrcoef(_numpy_average_ranks(x.numpy()), _numpy_average_ranks(y.numpy()))[0, 1]
    assert spearman(x, y) == pytest.approx(want, abs=1e-12)
    # identity: a monotone map keeps every rank (ρ = 1), reversing the order gives ρ = −1
    assert spearman(x, x.exp()) == pytest.approx(1.0) and spearman(x, -x) == pytest.approx(-1.0)


def test_embedding_agreement_spearman_of_pairwise_similarities():
    torch.manual_seed(2)
    ea = torch.randn(12, 5)
    eb = ea + 0.5 * torch.randn(12, 5)
    got = embedding_agreement(ea, eb)
    a = ea.numpy() / np.linalg.norm(ea.numpy(), axis=1, keepdims=True)
    b = eb.numpy() / np.linalg.norm(eb.numpy(), axis=1, keepdims=True)
    iu = np.triu_indices(12, 1)
    sa, sb = (a @ a.T)[iu], (b @ b.T)[iu]
    # source: numpy — the 66 pairwise cosines of each model, ranked by counting, correlated by np.corrcoef
    want = np.corrcoef(_numpy_average_ranks(sa), _numpy_average_ranks(sb))[0, 1]
    assert got["spearman"] == pytest.approx(want, abs=1e-9)
    assert len(got["cosines"]) == 12


def test_per_text_agreement(tiny_dirs, compressed, lines_file, tmp_path):
    other = tmp_path / "other.txt"
    other.write_text("\n".join(lines_file.read_text().splitlines()[::-1][:15]), encoding="utf-8")
    d = str(tiny_dirs["bert"][0])
    both = compare(d, str(compressed["bert"]), [str(lines_file), str(other)], speed_runs=0)["quality"]
    alone = compare(d, str(compressed["bert"]), [str(other)], speed_runs=0)["quality"]
    assert [t["name"] for t in both["per_text"]] == [lines_file.name, "other.txt"] and alone["per_text"] == []
    # definition: a text's figures are those of comparing on that text alone
    for key in ("neighbour_agreement", "spearman"):
        assert both["per_text"][1][key] == pytest.approx(alone[key], abs=1e-9)
    assert both["per_text"][1]["cosine"]["mean"] == pytest.approx(alone["cosine"]["mean"], abs=1e-9)
