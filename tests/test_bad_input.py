"""Bad input, faults and streaming: one CLI row per case of docs/what-happens-when.md, then the streaming writer.

Every row runs `attncompress compress` through click's CliRunner and checks the exact one-line message, the exit
status (2 for usage errors, 1 for failures, 130 for an interruption) and that nothing was left in the output's
parent directory: no output directory and no `.NAME.partial-*` temporary.
"""
import errno
import json
import os
import re
import shutil
import struct
import subprocess
import sys
from pathlib import Path

import pytest
import torch
from click.testing import CliRunner
from safetensors.torch import load_file, save_file

from attncompress import analysis, arch, factorize, plan as planlib, strategies
from attncompress import compress as pipeline
from attncompress.cli import main
from attncompress.errors import CompressError
from attncompress.loading import load_model, load_weights
from attncompress.io.read import open_source
from attncompress.io.write import ShardWriter, parse_size

BAD = Path(__file__).resolve().parent.parent / "fixtures" / "bad"  # corrupt files made by fixtures/make_fixtures.py
_PROGRESS = re.compile(r"^[a-z]+: \d+/\d+ \w+ \| ")  # progress lines on stderr (attncompress.progress)
_STATE_DICT_FILE = "pytorch_model.bin"


# ----------------------------------------------------------------------------------------------- helpers

def _copy_model(tiny_dirs, tmp_path, family="llama") -> Path:
    """A private copy of a tiny saved model directory, safe to damage."""
    d = tmp_path / f"{family}-copy"
    shutil.copytree(tiny_dirs[family][0], d)
    return d


def _config_only(tiny_dirs, tmp_path, weights: str | None = None) -> Path:
    """A model directory holding only the tiny llama's config.json and tokenizer (and `weights`, a file of BAD)."""
    d = tmp_path / "model"
    d.mkdir()
    for f in ("config.json", "tokenizer.json"):
        shutil.copy(tiny_dirs["llama"][0] / f, d / f)
    if weights is not None:
        shutil.copy(BAD / weights, d / "model.safetensors")
    return d


def _edit_config(d: Path, **changes) -> None:
    cfg = json.loads((d / "config.json").read_text())
    cfg.update(changes)
    (d / "config.json").write_text(json.dumps(cfg))


def _edit_tensor(d: Path, name: str, fn) -> None:
    f = d / "model.safetensors"
    t = load_file(str(f))
    t[name] = fn(t[name])
    save_file(t, str(f), metadata={"format": "pt"})


def _plan_file(tmp_path, family_dir, edit=None) -> Path:
    """The full-rank plan of a model, edited as a user might."""
    shape, *_ = load_weights(family_dir)
    data = json.loads(planlib.full_plan(shape).to_json())
    if edit is not None:
        edit(data)
    p = tmp_path / "plan.json"
    p.write_text(json.dumps(data))
    return p


class _Payload:
    """Pickles as a call to open(marker, "w"): loading it without weights_only would create the marker file."""

    def __init__(self, marker):
        self.marker = str(marker)

    def __reduce__(self):
        return (open, (self.marker, "w"))


def _deny_read(c, target: Path) -> None:
    """Make `target` unreadable: chmod, and for root (who reads anything) an os.access that says what a user sees."""
    mode = target.stat().st_mode
    target.chmod(0)
    c.cleanups.append(lambda: target.chmod(mode))
    if os.geteuid() == 0:
        real = os.access
        c.mp.setattr(os, "access", lambda p, m, **kw: False if Path(p) == target else real(p, m, **kw))


def _write_fault(monkeypatch, exc, after: int = 1):
    """os.write succeeds (short) `after` times, then raises `exc`: a disk that fills up, or Ctrl-C mid-write."""
    real, calls = os.write, []

    def fake(fd, data):
        calls.append(fd)
        if len(calls) > after:
            raise exc
        return real(fd, bytes(data[: max(1, len(data) // 2)]))  # short writes, as a filling disk gives
    monkeypatch.setattr(os, "write", fake)
    return calls


# --------------------------------------------------------------------------------------- the table's rows
# Each row: (id, setup). setup(ctx) builds the input and returns (arguments after "compress", message, exit code).
# ctx has tiny_dirs, tmp_path, calib (a calibration text), out (the --out directory) and monkeypatch.

class Ctx:
    def __init__(self, tiny_dirs, tmp_path, calib, monkeypatch):
        self.tiny_dirs, self.tmp, self.calib, self.mp = tiny_dirs, tmp_path, str(calib), monkeypatch
        self.outs = tmp_path / "outs"
        self.outs.mkdir()
        self.out = self.outs / "small"
        self.cleanups = []  # undo what a row did to the file system (permissions)

    def args(self, src, *extra, keep=True, text=None):
        a = [str(src)] + (["--keep", "0.5"] if keep else []) + ["--text", text or self.calib, "--out", str(self.out),
                                                                 "--calib-context", "32", "--calib-blocks", "8"]
        return a + list(extra)


def row_missing_path(c):
    src = c.tmp / "nowhere"
    return c.args(src), f"{src}: no such file or directory; expected a model directory, .safetensors or .gguf file", 1


def row_unreadable_file(c):
    d = _copy_model(c.tiny_dirs, c.tmp)
    _deny_read(c, d / "model.safetensors")
    return c.args(d), f"{d / 'model.safetensors'}: not readable (permission denied); check its permissions", 1


def row_unreadable_directory(c):
    d = _copy_model(c.tiny_dirs, c.tmp)
    _deny_read(c, d)
    return c.args(d), f"{d}: directory not readable (permission denied); check its permissions", 1


def row_no_weights(c):
    d = _config_only(c.tiny_dirs, c.tmp)
    return c.args(d), (f"{d}: no weights found; expected model.safetensors, sharded safetensors with "
                       "model.safetensors.index.json, or pytorch_model.bin"), 1


def row_truncated_length(c):
    d = _config_only(c.tiny_dirs, c.tmp, "truncated-length.safetensors")  # 3 bytes
    return c.args(d), (f"{d / 'model.safetensors'}: truncated safetensors file (3 bytes); "
                       "expected an 8-byte header length"), 1


def row_truncated_data(c):
    d = _copy_model(c.tiny_dirs, c.tmp)
    f = d / "model.safetensors"
    raw = f.read_bytes()
    (n,) = struct.unpack("<Q", raw[:8])
    keep = len(raw) // 2
    f.write_bytes(raw[:keep])
    # the tensor the cut falls into: the format puts data_offsets relative to the end of the header
    header = json.loads(raw[8:8 + n])
    data = keep - 8 - n
    name, info = next((k, v) for k, v in header.items() if k != "__metadata__" and v["data_offsets"][1] > data)
    return c.args(d), (f"{f}: tensor {name} ends at byte {info['data_offsets'][1]} but the data section has {data} "
                       "bytes; the file is truncated"), 1


def row_header_claims_more(c):
    d = _config_only(c.tiny_dirs, c.tmp, "header-claims-more.safetensors")  # a header length of 10**6
    f = d / "model.safetensors"
    size = f.stat().st_size
    return c.args(d), (f"{f}: header claims 1000000 bytes but the file has {size - 8} after the length; "
                       "the file is truncated"), 1


def row_header_not_json(c):
    d = _config_only(c.tiny_dirs, c.tmp, "header-not-json.safetensors")  # header b"{oops]"
    return c.args(d), f"{d / 'model.safetensors'}: safetensors header is not valid JSON; the file is corrupt", 1


def _header_row(fixture: str, message: str):
    """A row whose model directory holds a corrupt safetensors file of BAD; `{f}` in the message is that file."""
    def row(c):
        d = _config_only(c.tiny_dirs, c.tmp, fixture)
        return c.args(d), message.format(f=d / "model.safetensors"), 1
    return row


# the headers are written out in fixtures/make_fixtures.py (BAD_HEADERS)
row_overlapping_offsets = _header_row(
    "overlapping-offsets.safetensors", "{f}: tensors a and b overlap in the data section; the header is corrupt")
row_offsets_past_the_end = _header_row(
    "offsets-past-the-end.safetensors",
    "{f}: tensor b ends at byte 32 but the data section has 16 bytes; the file is truncated")
row_offsets_inverted = _header_row(
    "offsets-inverted.safetensors",
    "{f}: tensor a has invalid data offsets [16, 0]; expected [start, end] with 0 <= start <= end")
row_offsets_disagree_with_shape = _header_row(
    "offsets-disagree-with-shape.safetensors", "{f}: tensor a spans 12 bytes but shape [4] of F32 needs 16")
row_unsupported_dtype = _header_row(
    "unsupported-dtype.safetensors",
    "{f}: tensor a has unsupported dtype F8_E4M3; expected one of F64, F32, F16, BF16, I64, I32, I16, I8, U8, BOOL")


def row_integer_weights(c):
    d = _copy_model(c.tiny_dirs, c.tmp)
    name = "model.layers.0.self_attn.q_proj.weight"
    _edit_tensor(d, name, lambda t: t.round().to(torch.int64))
    return c.args(d), (f"{d / 'model.safetensors'}: tensor {name} has dtype torch.int64; "
                       "expected floating point"), 1


def row_nan_and_inf_weights(c):
    d = _copy_model(c.tiny_dirs, c.tmp)
    name = "model.layers.1.mlp.up_proj.weight"

    def spoil(t):
        t = t.clone()
        t[3, 5], t[0, 0] = float("nan"), float("inf")
        return t
    _edit_tensor(d, name, spoil)
    return c.args(d), (f"{d / 'model.safetensors'}: tensor {name} has 2 NaN or infinite values; "
                       "expected finite weights"), 1


def row_config_disagrees_with_shapes(c):
    d = _copy_model(c.tiny_dirs, c.tmp)
    _edit_config(d, intermediate_size=72)
    return c.args(d), (f"{d / 'model.safetensors'}: tensor model.layers.0.mlp.gate_proj.weight has shape [64, 32] "
                       "but the config implies [72, 32]; config.json and the weights disagree"), 1


def row_unknown_family(c):
    d = _copy_model(c.tiny_dirs, c.tmp)
    _edit_config(d, model_type="mamba")
    return c.args(d), f"{d}: unknown model family 'mamba'; supported: bert, gpt2, llama, mistral, qwen2", 1


def row_gguf_unsupported_architecture(c):
    f = c.tmp / "model.gguf"
    shutil.copy(BAD / "architecture-mamba.gguf", f)
    return c.args(f), f"{f}: GGUF architecture 'mamba' is not supported; expected one of llama", 1


def row_gguf_unsupported_quantisation(c):
    f = c.tmp / "model.gguf"
    shutil.copy(BAD / "quantisation-q8_1.gguf", f)  # the gguf package writes Q8_1 blocks but cannot dequantise them
    return c.args(f), (f"{f}: tensor token_embd.weight has quantisation type Q8_1, which the installed gguf package "
                       "cannot dequantise; expected a float type or a block quantisation it reads "
                       "(e.g. Q4_0, Q4_K, Q6_K, Q8_0)"), 1


def row_pickled_code(c):
    d = _config_only(c.tiny_dirs, c.tmp)
    c.marker, c.state_dict = c.tmp / "payload-ran", d / _STATE_DICT_FILE
    torch.save({"model.embed_tokens.weight": torch.zeros(96, 32), "extra": _Payload(c.marker)}, c.state_dict)
    return c.args(d), (f"{d / _STATE_DICT_FILE}: refused: the state dict holds pickled objects other than tensors; "
                       "convert it to safetensors"), 1


def _plan_row(edit, message):
    def row(c):
        p = _plan_file(c.tmp, c.tiny_dirs["llama"][0], edit)
        return c.args(c.tiny_dirs["llama"][0], "--plan", str(p), keep=False), message.format(p=p), 1
    return row


def _drop_layer(data):
    del data["layers"][1]


def _set(key, value):
    def edit(data):
        data["layers"][0][key] = value
    return edit


def row_plan_malformed(c):
    p = c.tmp / "plan.json"
    p.write_text("{not json")
    return c.args(c.tiny_dirs["llama"][0], "--plan", str(p), keep=False), (
        f"plan {p}: not valid JSON (Expecting property name enclosed in double quotes: line 1 column 2 (char 1)); "
        "write the plan with attncompress"), 1


def row_plan_of_another_model(c):
    p = _plan_file(c.tmp, c.tiny_dirs["gpt2"][0])
    return c.args(c.tiny_dirs["llama"][0], "--plan", str(p), keep=False), (
        f"plan {p}: made for another model (family 'gpt2' in the plan, 'llama' in the model; n_kv_heads 4 in the "
        "plan, 2 in the model; d_ff 128 in the plan, 64 in the model); make a new plan for this model"), 1


row_plan_rank_above_maximum = _plan_row(_set("vo", 9), "plan {p}: layer 0 vo: rank 9 is above the maximum 8 "
                                                       "(head_dim 8); lower it")
row_plan_negative_rank = _plan_row(_set("vo", -1), "plan {p}: layer 0 vo: rank -1; every matrix keeps at least 1")
row_plan_missing_layer = _plan_row(_drop_layer, "plan {p}: layer 1 missing (the plan lists 1 of the model's 2 "
                                                "layers); make the plan again")


def row_text_empty(c):
    t = c.tmp / "empty.txt"
    t.write_bytes(b"")
    return c.args(c.tiny_dirs["llama"][0], text=str(t)), f"{t}: empty text file; give a file with some text in it", 1


def row_text_not_utf8(c):
    t = c.tmp / "latin1.txt"
    t.write_bytes("w1 w2 caf\u00e9 w3".encode("latin-1"))  # é is the single byte 0xe9 in Latin-1
    return c.args(c.tiny_dirs["llama"][0], text=str(t)), (
        f"{t}: not UTF-8 text (invalid byte at offset 9); save it as UTF-8"), 1


def row_text_shorter_than_context(c):
    t = c.tmp / "short.txt"
    t.write_text("w1 w2 w3")
    return c.args(c.tiny_dirs["llama"][0], text=str(t)), (
        f"{t}: 3 tokens is shorter than one block of 32; give more text or a smaller --calib-context"), 1


def row_output_exists(c):
    c.out.mkdir()
    (c.out / "mine.txt").write_text("precious")
    return c.args(c.tiny_dirs["llama"][0]), (
        f"{c.out}: already exists; choose another --out or pass --force to replace it"), 1


def row_disk_full(c):
    c.calls = _write_fault(c.mp, OSError(errno.ENOSPC, os.strerror(errno.ENOSPC)))
    return c.args(c.tiny_dirs["llama"][0]), f"{c.out}: writing failed (No space left on device); nothing was left behind", 1


def row_interrupted_write(c):
    c.calls = _write_fault(c.mp, KeyboardInterrupt(), after=3)
    return c.args(c.tiny_dirs["llama"][0]), "interrupted; nothing was left half-written", 130


def row_bad_shard_size(c):
    return c.args(c.tiny_dirs["llama"][0], "--shard-size", "lots"), (
        "--shard-size: expected a size such as 2GB, 500MB or 1000000 (bytes), got 'lots'"), 1


def row_usage_keep_and_plan(c):
    p = _plan_file(c.tmp, c.tiny_dirs["llama"][0])
    return c.args(c.tiny_dirs["llama"][0], "--plan", str(p)), "give --keep or --plan, not both", 2


def row_usage_no_out(c):
    return [str(c.tiny_dirs["llama"][0]), "--keep", "0.5", "--text", c.calib], "Missing option '--out'.", 2


ROWS = {name[4:]: fn for name, fn in list(globals().items()) if name.startswith("row_")}


def _lines(result) -> list[str]:
    """What the user saw, without progress lines and (for usage errors) click's usage and hint lines."""
    out = [ln for ln in result.output.splitlines() if ln and not _PROGRESS.match(ln)]
    if result.exit_code == 2:
        out = [ln for ln in out if not ln.startswith(("Usage: ", "Try '"))]
    return out


@pytest.mark.parametrize("row", list(ROWS))
def test_what_happens_when(row, tiny_dirs, calib_file, tmp_path, monkeypatch):
    c = Ctx(tiny_dirs, tmp_path, calib_file, monkeypatch)
    args, message, code = ROWS[row](c)
    before = sorted(os.listdir(c.outs))
    mine = (c.out / "mine.txt").read_text() if (c.out / "mine.txt").exists() else None
    try:
        result = CliRunner().invoke(main, ["compress"] + args)
    finally:
        monkeypatch.undo()  # restores os.write / os.access before anything else runs
        for undo in c.cleanups:
            undo()
    # a crash would surface as result.exception with a traceback object; a handled error exits through SystemExit
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    assert _lines(result) == [f"Error: {message}"], result.output
    assert result.exit_code == code
    assert "Traceback" not in result.output
    # nothing new beside --out: no output directory, no .small.partial-* temporary
    assert sorted(os.listdir(c.outs)) == before
    if mine is not None:
        assert (c.out / "mine.txt").read_text() == mine and sorted(os.listdir(c.out)) == ["mine.txt"]
    if row in ("disk_full", "interrupted_write"):
        assert len(c.calls) > 1  # the fault really happened part-way through writing
    if row == "pickled_code":
        # the refusal came before the payload could run ...
        assert not c.marker.exists()
        # ... and the payload is real: an unrestricted load runs it (source: Python's pickle protocol, __reduce__)
        torch.load(c.state_dict, weights_only=False)
        assert c.marker.exists()


# -------------------------------------------------------------------------------------- streaming output

def test_shard_writer_bytes_equal_the_safetensors_library(tmp_path):
    g = torch.Generator().manual_seed(0)
    dtypes = [torch.float64, torch.float32, torch.float16, torch.bfloat16, torch.int64, torch.int32, torch.int16,
              torch.int8, torch.uint8, torch.bool]
    tensors = {}
    for i in range(40):
        shape = torch.randint(0, 5, (i % 3,), generator=g).tolist()
        tensors[f"n{(i * 7) % 40}.t{i}"] = (torch.randn(shape, generator=g) * 50).to(dtypes[i % len(dtypes)])
    save_file(tensors, str(tmp_path / "reference.safetensors"), metadata={"format": "pt"})
    (tmp_path / "ours").mkdir()
    with ShardWriter(tmp_path / "ours", shard_size=10**9) as w:
        for name in reversed(list(tensors)):  # arrival order must not matter
            w.add(name, tensors[name])
        assert w.close() == ["model.safetensors"]
    # source: safetensors.torch.save_file writes the reference bytes
    assert (tmp_path / "ours" / "model.safetensors").read_bytes() == (tmp_path / "reference.safetensors").read_bytes()
    assert sorted(os.listdir(tmp_path / "ours")) == ["model.safetensors"]  # no spool left


def test_shards_and_index_round_trip(tmp_path):
    g = torch.Generator().manual_seed(1)
    tensors = {f"t{i}": torch.randn(10 + i, generator=g) for i in range(12)}  # 40..84 bytes each
    tensors["big"] = torch.randn(75, generator=g)  # 300 bytes: larger than a shard, so a shard of its own
    with ShardWriter(tmp_path, shard_size=200) as w:
        for name, t in tensors.items():
            w.add(name, t)
        files = w.close()
    assert len(files) > 1 and files[0] == f"model-00001-of-{len(files):05d}.safetensors"
    index = json.loads((tmp_path / "model.safetensors.index.json").read_text())
    assert sorted(index["weight_map"]) == sorted(tensors)
    assert index["metadata"]["total_size"] == sum(t.numel() * 4 for t in tensors.values())
    for f in files:
        # each shard stays within the size (no single tensor here is larger), read by the safetensors library
        part = load_file(str(tmp_path / f))
        assert sum(t.numel() * 4 for t in part.values()) <= 200 or list(part) == ["big"]
        for name, t in part.items():
            assert index["weight_map"][name] == f
            torch.testing.assert_close(t, tensors[name], atol=0, rtol=0)
    src = open_source(tmp_path)
    assert sorted(src.names()) == sorted(tensors)


@pytest.mark.parametrize("text,want", [("2GB", 2 * 10**9), ("500MB", 5 * 10**8), ("1.5KB", 1500), ("1KiB", 1024),
                                       ("4096", 4096), (4096, 4096)])
def test_parse_size(text, want):
    assert parse_size(text) == want  # decimal units as on disk labels, binary ones with "i" (IEC 80000-13)


@pytest.mark.parametrize("text", ["lots", "2XB", "0", "-5MB", ""])
def test_parse_size_refuses(text):
    with pytest.raises(CompressError, match="^--shard-size: "):
        parse_size(text)


def test_source_tensors_own_their_memory(tiny_dirs):
    # a tensor handed out must not be a view of a whole-file mapping (which would keep every page it touched)
    src = open_source(tiny_dirs["llama"][0])
    name = "model.layers.0.mlp.up_proj.weight"
    t = src.get(name)
    assert t.untyped_storage().nbytes() == t.numel() * t.element_size()
    # source: the safetensors library's own reader gives the same values
    torch.testing.assert_close(t, load_file(str(tiny_dirs["llama"][0] / "model.safetensors"))[name], atol=0, rtol=0)


def _one_shot(d: Path, out: Path, keep: float, texts, n_blocks: int, context: int, strategy: str = "uniform"):
    """The whole-model computation: every weight in memory, calibration through the whole runtime at once."""
    loaded = load_model(d)
    sh = loaded.shape
    weights = dict(arch.canonical_weights(loaded.source, loaded.walk))
    stats = None
    if texts:
        calib = pipeline._calibration(loaded, texts, context, n_blocks)
        stats = analysis.collect_stats(loaded.model, calib.ids, mask=calib.mask)
    roots = [analysis.layer_roots(stats[i] if stats else None, pipeline.DEFAULT_DAMPING,
                                  with_bias_row=not sh.rotary and sh.qkv_bias,
                                  down=weights[f"layers.{i}.ff.down.weight"]) for i in range(sh.n_layers)]
    spectra = [analysis.layer_spectra(sh, weights, i, roots[i]) for i in range(sh.n_layers)]
    p = strategies.make_plan(pipeline.spectra_list(sh, spectra), sh, keep, strategy)
    p = pipeline.choose_pairs(sh, p, spectra)
    new = {n: t for n, t in weights.items() if not n.startswith("layers.")}
    for i in range(sh.n_layers):
        layer = pipeline.factorize_layer(sh, weights, i, p.ranks(i), roots[i])
        factorize.balance_layer(sh.n_heads, sh.n_kv_heads, sh.rotary, layer, f"layers.{i}.")
        new.update(layer)
    save_file({k: new[k].contiguous() for k in sorted(new)}, str(out), metadata={"format": "pt"})
    return new


@pytest.mark.parametrize("family,whitened", [("llama", True), ("qwen2", True), ("gpt2", True), ("bert", True),
                                             ("llama", False)])
def test_streaming_equals_the_one_shot_computation(tiny_dirs, calib_file, tmp_path, family, whitened):
    d = tiny_dirs[family][0]
    texts = [str(calib_file)] if whitened else None
    # the method the one-shot path computes: uniform ranks, down-reach output weights, no sequential pass
    pipeline.compress(d, tmp_path / "streamed", keep=0.6, texts=texts, weights_only=not whitened, quiet=True,
                      n_blocks=12, context=32, strategy="uniform", priced=False, sequential=False)
    want = _one_shot(d, tmp_path / "one-shot.safetensors", 0.6, texts, 12, 32)
    got = load_file(str(tmp_path / "streamed" / "model.safetensors"))
    assert sorted(got) == sorted(want)
    for name in want:
        assert torch.equal(got[name], want[name].contiguous()), name
    # source: safetensors.torch.save_file of the one-shot tensors gives the same bytes
    assert (tmp_path / "streamed" / "model.safetensors").read_bytes() == \
        (tmp_path / "one-shot.safetensors").read_bytes()


def test_sharded_output_runs_like_the_single_file(tiny_dirs, calib_file, tmp_path):
    d = tiny_dirs["llama"][0]
    kw = dict(keep=0.6, texts=[str(calib_file)], quiet=True, n_blocks=8, context=32)
    one = pipeline.compress(d, tmp_path / "one", **kw)
    many = pipeline.compress(d, tmp_path / "many", shard_size="20KB", **kw)
    assert one["files"] == ["model.safetensors"] and len(many["files"]) > 1
    assert (tmp_path / "many" / "model.safetensors.index.json").is_file()
    assert not any(p.name.startswith(".") for p in (tmp_path / "many").iterdir())  # no spool or scratch left
    ids = torch.randint(0, 96, (2, 12), generator=torch.Generator().manual_seed(3))
    with torch.no_grad():
        torch.testing.assert_close(load_model(tmp_path / "many").model(ids), load_model(tmp_path / "one").model(ids),
                                   atol=0, rtol=0)


def test_identical_inputs_give_identical_bytes_across_processes(tiny_dirs, calib_file, tmp_path):
    d = tiny_dirs["qwen2"][0]  # rotary, grouped-query attention and biases: every code path of a layer
    outs = []
    for run, hash_seed in (("a", "1"), ("b", "2")):
        out = tmp_path / run
        cmd = [sys.executable, "-c", "from attncompress.cli import main; main()", "compress", str(d), "--keep", "0.6",
               "--text", str(calib_file), "--out", str(out), "--calib-context", "32", "--calib-blocks", "8",
               "--shard-size", "30KB"]
        # a different hash seed per process: no output may depend on set or dict-of-str iteration order
        env = dict(os.environ, PYTHONHASHSEED=hash_seed)
        subprocess.run(cmd, check=True, capture_output=True, env=env, timeout=300)
        outs.append(out)
    files = sorted(p.name for p in outs[0].iterdir())
    assert len([f for f in files if f.endswith(".safetensors")]) > 1  # shards and index are covered too
    assert files == sorted(p.name for p in outs[1].iterdir())
    for f in files:
        assert (outs[0] / f).read_bytes() == (outs[1] / f).read_bytes(), f


# ------------------------------------------------------------------------------------------- tune

def test_interrupted_tune_leaves_no_output_and_a_complete_checkpoint(tiny_dirs, calib_file, tmp_path, monkeypatch):
    compressed = tmp_path / "compressed"
    pipeline.compress(tiny_dirs["llama"][0], compressed, keep=0.6, texts=[str(calib_file)], quiet=True, n_blocks=8,
                      context=32)
    outs = tmp_path / "outs"
    outs.mkdir()
    out = outs / "tuned"
    real, calls = torch.optim.AdamW.step, []

    def step(self, *a, **kw):  # Ctrl-C during the third optimiser step
        calls.append(1)
        if len(calls) == 3:
            raise KeyboardInterrupt
        return real(self, *a, **kw)
    monkeypatch.setattr(torch.optim.AdamW, "step", step)
    result = CliRunner().invoke(main, ["tune", str(compressed), "--text", str(calib_file), "--out", str(out),
                                       "--steps", "4", "--save-every", "1", "--context", "32", "--batch", "2",
                                       "--teacher", "none", "--quiet"])
    monkeypatch.undo()
    ckpt = outs / ".tuned.tune-checkpoint.pt"
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    assert result.exit_code == 130
    # the tune command prints its own one-line message (no "Error: " prefix, unlike the other rows)
    assert _lines(result) == [f"interrupted at step 3 of 4; the checkpoint {ckpt} holds step 2; "
                              "continue with --resume"], result.output
    # no output directory and no temporary: only the checkpoint, kept on purpose for --resume, and complete
    assert sorted(os.listdir(outs)) == [ckpt.name]
    assert torch.load(ckpt, weights_only=False)["step"] == 2
