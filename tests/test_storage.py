"""Storage formats (--dtype): every format round-trips, int8 scales, defaults, and what expand and tune write."""
import json
import struct

import numpy as np
import pytest
import torch
from click.testing import CliRunner

from attncompress import api
from attncompress.cli import main
from attncompress.compress import compress
from attncompress.io import storage
from attncompress.loading import load_model, load_weights
from attncompress.model import build


def _numpy_round(w: torch.Tensor, name: str, dtype: str) -> torch.Tensor:
    """What `dtype` storage should give back for float32 `w`, computed with numpy alone."""
    x = w.numpy().astype(np.float32)
    if dtype == "float32":
        return torch.from_numpy(x.copy())
    if dtype == "float16":
        return torch.from_numpy(x.astype(np.float16).astype(np.float32))
    if dtype == "bfloat16":  # round to nearest even on the top 16 bits of the float32 pattern
        u = x.view(np.uint32).astype(np.uint64)
        u = ((u + 0x7FFF + ((u >> 16) & 1)) >> 16) << 16
        return torch.from_numpy(u.astype(np.uint32).view(np.float32))
    if x.ndim != 2:  # int8: vectors stay float32
        return torch.from_numpy(x.copy())
    axis = 0 if name.endswith(".b") else 1
    amax = np.abs(x.astype(np.float64)).max(axis=axis, keepdims=True)
    scale = np.where(amax > 0, amax / 127.0, 1.0)
    q = np.clip(np.round(x / scale), -127, 127)  # numpy rounds half to even, as torch.round does
    return torch.from_numpy((q * scale.astype(np.float32)).astype(np.float32))


def _header(path) -> dict:
    raw = path.read_bytes()
    return json.loads(raw[8:8 + struct.unpack("<Q", raw[:8])[0]])


@pytest.fixture(scope="module")
def float32_dir(tiny_dirs, tmp_path_factory):
    out = tmp_path_factory.mktemp("f32") / "m"
    compress(str(tiny_dirs["llama"][0]), str(out), keep=0.6, weights_only=True, quiet=True)
    return out


@pytest.mark.parametrize("dtype", list(storage.DTYPES))
def test_every_dtype_round_trips(tiny_dirs, float32_dir, tmp_path, dtype):
    out = tmp_path / dtype
    compress(str(tiny_dirs["llama"][0]), str(out), keep=0.6, weights_only=True, quiet=True, dtype=dtype)
    assert json.loads((out / "attncompress.json").read_text())["dtype"] == dtype
    stored = {v["dtype"] for k, v in _header(out / "model.safetensors").items() if k != "__metadata__"}
    expect = {"float32": {"F32", "I64"}, "bfloat16": {"BF16", "I64"}, "float16": {"F16", "I64"},
              "int8": {"I8", "F32", "I64"}}[dtype]  # I64: the rotary pairs
    assert stored == expect
    shape, w32, *_ = load_weights(float32_dir)
    _, got, *_ = load_weights(out)
    assert set(got) == set(w32)
    want = {n: _numpy_round(t, n, dtype) if t.is_floating_point() else t for n, t in w32.items()}
    for n in w32:
        # source: numpy's rounding of the same float32 weights (half to even; per-channel int8 as documented)
        torch.testing.assert_close(got[n], want[n], atol=1e-7 if dtype == "int8" else 0, rtol=1e-6 if dtype == "int8" else 0)
    ids = torch.randint(0, 96, (2, 12), generator=torch.Generator().manual_seed(0))
    with torch.no_grad():
        ours = load_model(out).model(ids)
        ref = build(shape, want)(ids)
        full = build(shape, w32)(ids)
    torch.testing.assert_close(ours, ref, atol=1e-5, rtol=0)  # the same logits as numpy's rounded weights
    tol = {"float32": 0, "bfloat16": 0.1, "float16": 0.01, "int8": 0.1}[dtype]  # common practice, no source
    assert float((ours - full).abs().max()) <= tol


def test_int8_scales_recover_the_weights_within_half_a_step():
    g = torch.Generator().manual_seed(3)
    for name, w in (("x.weight", torch.randn(40, 24, generator=g)), ("x.b", torch.randn(24, 7, generator=g) * 1e-3),
                    ("x.a", torch.cat([torch.zeros(1, 9), torch.randn(5, 9, generator=g)]))):
        q, scale = storage.quantise(w, name)
        assert q.dtype == torch.int8 and int(q.abs().max()) == 127
        axis = 0 if name == "x.b" else 1
        assert scale.shape[axis] == 1 and scale.shape[1 - axis] == w.shape[1 - axis]
        err = (q.double() * scale.double() - w.double()).abs()
        # half a quantisation step (round to nearest), numpy's max giving the step; plus the float32 rounding of
        # the stored scale, at most 127 · 2⁻²⁴ steps
        step = np.abs(w.numpy().astype(np.float64)).max(axis=axis, keepdims=True) / 127
        assert (err.numpy() <= np.where(step > 0, step, 1) * (0.5 + 127 * 2.0 ** -24)).all()
        assert (err.numpy() > np.where(step > 0, step, 1) * 0.45).any()  # the bound is near-tight, not vacuous


def test_default_keeps_the_source_width():
    # issue 14: 16-bit sources stay 16-bit, a quantised GGUF is written 16-bit
    assert storage.source_width(["BF16", "BF16"]) == "bfloat16"
    assert storage.source_width(["F16"]) == "float16"
    assert storage.source_width(["F32", "F16"]) == "float32"
    assert storage.source_width(["Q4_1", "Q6_K"]) == "float16"
    assert storage.default_dtype(None, {"dtype": "int8"}) == "int8"
    assert storage.default_dtype(None, {}) == "float32"  # a directory from before formats were recorded


def test_float16_overflow_is_refused():
    with pytest.raises(Exception, match=r"^tensor x.weight: values up to 7e\+04 do not fit float16"):
        storage.encode("x.weight", torch.tensor([[7e4, 1.0]]), "float16")


def test_expand_writes_a_float_model(tiny_dirs, tmp_path):
    src = tmp_path / "q"
    compress(str(tiny_dirs["llama"][0]), str(src), keep=0.6, weights_only=True, quiet=True, dtype="int8")
    r = api.expand(str(src), str(tmp_path / "dense"))
    assert r["dtype"] == "float16"
    assert {v["dtype"] for k, v in _header(tmp_path / "dense" / "model.safetensors").items()
            if k != "__metadata__"} == {"F16"}
    res = CliRunner().invoke(main, ["expand", str(src), "--out", str(tmp_path / "d2"), "--dtype", "int8"])
    assert res.exit_code == 2 and "Invalid value for '--dtype'" in res.output
    assert not (tmp_path / "d2").exists()
    res = CliRunner().invoke(main, ["compress", str(tiny_dirs["llama"][0]), "--keep", "0.6", "--weights-only",
                                    "--out", str(tmp_path / "c"), "--dtype", "int4"])
    assert res.exit_code == 2 and not (tmp_path / "c").exists()


def test_tune_trains_in_float32_and_writes_the_chosen_dtype(tiny_dirs, calib_file, tmp_path):
    from attncompress import tune as tunelib
    src = tmp_path / "q"
    compress(str(tiny_dirs["llama"][0]), str(src), keep=0.6, weights_only=True, quiet=True, dtype="int8")
    opts = dict(steps=2, batch=2, context=16, lr=3e-3, teacher="none", quiet=True, save_every=0)
    tunelib.tune(src, [str(calib_file)], tmp_path / "t8", **opts)  # default: the input's format
    tunelib.tune(src, [str(calib_file)], tmp_path / "t16", dtype="bfloat16", **opts)
    for name, want in (("t8", "int8"), ("t16", "bfloat16")):
        assert json.loads((tmp_path / name / "attncompress.json").read_text())["dtype"] == want
    _, w8, *_ = load_weights(tmp_path / "t8")
    _, w16, *_ = load_weights(tmp_path / "t16")
    # the same float32 training wrote both, so they differ by the two formats' rounding only (bfloat16: 2⁻⁸
    # relative; int8: half a step of max|row|/127)
    assert set(w8) == set(w16)
    torch.testing.assert_close(w8["layers.0.attn_norm.weight"], w16["layers.0.attn_norm.weight"], atol=4e-3, rtol=4e-3)
    a8, a16 = w8["layers.0.ff.gate.a"], w16["layers.0.ff.gate.a"]
    assert float((a8 - a16).abs().max()) <= float(a16.abs().max()) / 127


def test_compare_reports_disk_format_and_what_the_format_alone_costs(tiny_dirs, calib_file, tmp_path):
    from attncompress import evaluate
    from attncompress.compare import compare
    src = tiny_dirs["llama"][0]
    out = tmp_path / "q"
    compress(str(src), str(out), keep=0.6, weights_only=True, quiet=True, dtype="int8")
    r = compare(str(src), str(out), [str(calib_file)], context=64, max_tokens=600, speed_runs=0)
    assert r["a"]["disk"]["format"] == "float32" and r["b"]["disk"]["format"] == "int8"
    fe = r["format_effect"]
    assert fe["format"] == "int8" and fe["float32"] == pytest.approx(r["quality"]["a"], rel=1e-6)
    # source: numpy's rounding of the original's weights to int8, run through our runtime
    shape, w, *_ = load_weights(src)
    rounded = build(shape, {n: _numpy_round(t, n, "int8") if t.is_floating_point() else t for n, t in w.items()})
    ids = load_model(src).tokenizer.encode(calib_file.read_text()).ids[:600]
    want = evaluate.perplexity(rounded, ids, context=64)["perplexity"]
    assert fe["rounded"] == pytest.approx(want, rel=1e-5) and fe["ratio"] == pytest.approx(want / fe["float32"], rel=1e-5)
