"""The compiled decode step (attncompress/native.py) against torch's path through the same halved model."""
import pytest
import torch

from attncompress import api, native
from attncompress.generate import generate_ids
from attncompress.model import KVCache, fuse, halve
from conftest import load_model

# Both paths round at the same places (a product's input and output to float16, as `model.product` does) and
# differ only in the order of float32 sums, so an intermediate value can land one float16 step (2⁻¹¹
# relative) apart and carry that through the layers; 2e-3 of the logits' scale bounds it with room.
TOL = 2e-3


@pytest.fixture(scope="module")
def models(tiny_dirs, calib_file, tmp_path_factory):
    """name → model directory: the tiny llama and qwen2 (biased q, k, v; tied head) dense and compressed at
    keep 0.4 (narrowed heads, kept rotary pairs, factor pairs in every block)."""
    out = {}
    for fam in ("llama", "qwen2"):
        out[fam] = tiny_dirs[fam][0]
        d = tmp_path_factory.mktemp(f"native-{fam}") / "m"
        api.compress(str(tiny_dirs[fam][0]), str(d), keep=0.4, texts=[str(calib_file)], quiet=True, n_blocks=8,
                     context=32, strategy="uniform")
        out[fam + " keep 0.4"] = d
    return out


def _halved(path):
    """The model as `compare` decodes it: fused, product weights in float16."""
    return halve(fuse(load_model(path).model))


def _library():
    lib = native.library()
    if lib is None:
        pytest.skip(f"no compiled kernel here: {native.status()}")
    return lib


def _portable(monkeypatch, tmp_path) -> None:
    """Build the library without AVX-512 (its plain C path) in a private cache, for this test only."""
    monkeypatch.setattr(native, "_LIB", {})
    monkeypatch.setenv("ATTNCOMPRESS_CACHE", str(tmp_path))
    monkeypatch.setattr(native, "FLAGS", tuple(f if f != "-march=native" else "-march=x86-64-v2" for f in native.FLAGS))


@pytest.mark.parametrize("name,portable", [("llama", False), ("qwen2", False), ("llama keep 0.4", False),
                                           ("qwen2 keep 0.4", False), ("qwen2 keep 0.4", True)])
def test_kernel_steps_equal_torch_steps(models, name, portable, monkeypatch, tmp_path):
    if portable:
        _portable(monkeypatch, tmp_path)
    _library()
    m = _halved(models[name])
    assert native.attach(m) == "compiled kernel"
    if "keep" in name:
        assert any(b.attn.w_qk < 8 for b in m.blocks)  # narrowed heads, so kept pairs are exercised
    # 70 positions: the kernel's attention works in chunks of 32 cached positions, so steps cross two chunk
    # boundaries and merge up to three chunks
    ids = torch.randint(0, 96, (1, 70), generator=torch.Generator().manual_seed(3))
    caches = [KVCache(m, 1, 72), KVCache(m, 1, 72)]
    kernel, plain = [], []
    with torch.no_grad():
        for c in caches:
            m(ids[:, :6], cache=c, start=0)  # the prompt goes through torch on both
        for i in range(6, 70):
            kernel.append(m(ids[:, i:i + 1], cache=caches[0], start=i))
            keep, m.native = m.native, None
            plain.append(m(ids[:, i:i + 1], cache=caches[1], start=i))
            m.native = keep
    kernel, plain = torch.cat(kernel, 1), torch.cat(plain, 1)  # (1, 64, V)
    assert not torch.equal(kernel, torch.zeros_like(kernel))
    torch.testing.assert_close(kernel, plain, atol=TOL * float(plain.abs().max()), rtol=0)
    for a, b in zip(caches[0].k + caches[0].v, caches[1].k + caches[1].v):  # the same keys and values written
        torch.testing.assert_close(a, b, atol=TOL * float(b.abs().max()), rtol=0)


def test_kernel_threads_give_the_same_logits(models):
    """1, 2 or 3 threads: rows and attention chunks are split the same way for any team, and each row's sum and
    the chunks' merge are the same code in the same order, so the bits are the same (100 cached positions:
    four attention chunks, and more chunks than some teams have threads)."""
    _library()
    m = _halved(models["llama keep 0.4"])
    native.attach(m)
    ids = torch.randint(0, 96, (1, 101), generator=torch.Generator().manual_seed(4))
    got = []
    old = torch.get_num_threads()
    try:
        for n in (1, 2, 3):
            torch.set_num_threads(n)
            c = KVCache(m, 1, 101)
            with torch.no_grad():
                m(ids[:, :100], cache=c, start=0)
                got.append(m(ids[:, 100:101], cache=c, start=100))
    finally:
        torch.set_num_threads(old)
    assert torch.equal(got[0], got[1]) and torch.equal(got[0], got[2])


def test_kernel_greedy_generation_matches_torch(models):
    _library()
    m = _halved(models["qwen2 keep 0.4"])
    native.attach(m)
    prompts = [[5, 17, 3, 40]]
    with torch.inference_mode():
        fast = generate_ids(m, prompts, max_tokens=12)
        m.native = None
        slow = generate_ids(m, prompts, max_tokens=12)
    assert fast == slow


def test_attach_names_why_the_kernel_does_not_apply(tiny_dirs):
    m = fuse(load_model(tiny_dirs["gpt2"][0]).model)  # learned positions, LayerNorm, no gate
    assert native.attach(m).startswith("torch (product weights are not float16")
    assert native.attach(halve(m)) == "torch (learned position or type tables, or an embedding norm)"
    assert m.native is None


def test_a_step_outside_the_cache_is_refused(models):
    _library()
    m = _halved(models["llama"])
    native.attach(m)
    c = KVCache(m, 1, 4)
    with torch.no_grad(), pytest.raises(IndexError, match="outside the cache"):
        m(torch.tensor([[1]]), cache=c, start=4)


def test_no_compiler_or_a_failed_build_falls_back_to_torch(models, monkeypatch, tmp_path):
    _library()
    cc = native._compiler()
    m = _halved(models["llama"])
    monkeypatch.setattr(native, "_LIB", {})  # a fresh process's state; restored after the test
    monkeypatch.setattr(native, "_compiler", lambda: None)
    assert native.attach(m) == "torch (no C compiler found ($CC, gcc or cc))" and m.native is None
    monkeypatch.setattr(native, "_compiler", lambda: cc)
    monkeypatch.setattr(native, "_LIB", {})
    monkeypatch.setenv("ATTNCOMPRESS_CACHE", str(tmp_path))
    monkeypatch.setattr(native, "FLAGS", native.FLAGS + ("-fno-such-flag",))
    got = native.attach(m)
    assert got.startswith("torch (building decode_step.c with") and m.native is None, got
    assert not list(tmp_path.glob("*.so"))  # no half-written library left behind
