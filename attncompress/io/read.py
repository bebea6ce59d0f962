"""Lazy tensor access by name for every supported checkpoint format.

A `TensorSource` lists names, shapes and dtypes without loading anything, then
hands out one tensor at a time. Safetensors files have their header checked
against the file's size first; each tensor is then read into its own buffer, so
the bytes of a tensor the caller has dropped do not stay resident (a mapping of
the whole file would keep every page it ever touched, up to the model's size).
GGUF tensors are dequantised to float32 one at a time; torch state dicts load
only with `weights_only=True`.
"""
from __future__ import annotations

import json
import math
import os
import pickle
import struct
from pathlib import Path

import torch

from ..errors import CompressError
from .gguf import GGUFSource
from .source import ST_DTYPES, TensorSource

MAX_HEADER = 100_000_000  # bytes; the safetensors library's own limit for a header


class SafetensorsSource(TensorSource):
    format = "safetensors"

    def __init__(self, path: Path, files: list[Path], config: dict | None):
        super().__init__(path, config)
        self._spans: dict[str, tuple[int, int]] = {}  # name → (first byte, end) in its file
        for f in files:
            for name, (shape, dtype, begin, end) in read_safetensors_header(f).items():
                if name in self._index:
                    raise CompressError(f"{f}: tensor {name} also stored in {self._index[name][2]}; expected each once")
                self._index[name] = (shape, dtype, f)
                self._spans[name] = (begin, end)

    def get(self, name: str) -> torch.Tensor:
        shape, dtype, f = self._index[name]
        begin, end = self._spans[name]
        buf = torch.empty(end - begin, dtype=torch.uint8)  # a fresh buffer: freed with the tensor
        view, got = memoryview(buf.numpy()), 0
        try:
            with open(f, "rb") as fh:
                fh.seek(begin)
                while got < len(view):  # one read() may return less than asked for
                    n = fh.readinto(view[got:])
                    if not n:
                        break
                    got += n
        except OSError as e:
            raise CompressError(f"{f}: cannot read tensor {name} ({e.strerror or e}); check the file") from None
        if got < len(view):
            raise CompressError(f"{f}: tensor {name} ends at byte {end} but the file stops at {begin + got}; "
                                "the file was truncated after it was opened")
        return buf.view(ST_DTYPES[dtype][0]).reshape(shape)


def _open_readable(path: Path):
    """Open a file for reading; a permission or I/O problem becomes a CompressError naming it."""
    if not os.access(path, os.R_OK):
        raise CompressError(f"{path}: not readable (permission denied); check its permissions")
    try:
        return open(path, "rb")
    except OSError as e:
        raise CompressError(f"{path}: cannot be read ({e.strerror or e}); check the file and its permissions") from None


def read_safetensors_header(path: Path) -> dict[str, tuple[tuple[int, ...], str, int, int]]:
    """Check a safetensors header against the file before any tensor is read.

    Returns name → (shape, dtype, first byte, end byte), the bytes counted from the start of the
    file. Raises CompressError for an unreadable or truncated file, a header that is not JSON, a
    malformed entry, an unsupported dtype, or offsets that overlap, disagree with the shape or
    point past the end of the file.
    """
    with _open_readable(path) as fh:
        size = os.fstat(fh.fileno()).st_size
        head = fh.read(8)
        if len(head) < 8:
            raise CompressError(f"{path}: truncated safetensors file ({size} bytes); expected an 8-byte header length")
        (n,) = struct.unpack("<Q", head)
        if n > size - 8:
            raise CompressError(f"{path}: header claims {n} bytes but the file has {size - 8} after the length; the file is truncated")
        if n > MAX_HEADER:
            raise CompressError(f"{path}: header claims {n} bytes, above the {MAX_HEADER}-byte limit; "
                                "the file is not safetensors or is corrupt")
        raw = fh.read(n)
    try:
        header = json.loads(raw)
    except (UnicodeDecodeError, json.JSONDecodeError):
        raise CompressError(f"{path}: safetensors header is not valid JSON; the file is corrupt") from None
    if not isinstance(header, dict):
        raise CompressError(f"{path}: safetensors header is not a JSON object; the file is corrupt")
    header.pop("__metadata__", None)
    data_start, data_size = 8 + n, size - 8 - n
    out, spans = {}, []
    for name, info in header.items():
        dtype, shape, start, end = _header_entry(path, name, info)
        need = math.prod(shape) * ST_DTYPES[dtype][1]  # exact integers: no overflow on absurd shapes
        if end - start != need:
            raise CompressError(f"{path}: tensor {name} spans {end - start} bytes but shape {list(shape)} of {dtype} needs {need}")
        if end > data_size:
            raise CompressError(f"{path}: tensor {name} ends at byte {end} but the data section has {data_size} bytes; the file is truncated")
        out[name] = (shape, dtype, data_start + start, data_start + end)
        spans.append((start, end, name))
    spans.sort()
    for (s0, e0, a), (s1, e1, b) in zip(spans, spans[1:]):
        if s1 < e0:
            raise CompressError(f"{path}: tensors {a} and {b} overlap in the data section; the header is corrupt")
    return out


def _header_entry(path: Path, name: str, info) -> tuple[str, tuple[int, ...], int, int]:
    """(dtype, shape, start, end) of one header entry, each checked for type and range."""
    def bad(what):
        return CompressError(f"{path}: tensor {name} has {what}; the header is corrupt")
    if not isinstance(info, dict) or not {"dtype", "shape", "data_offsets"} <= set(info):
        raise bad("a malformed header entry (expected dtype, shape, data_offsets)")
    dtype, shape, offsets = info["dtype"], info["shape"], info["data_offsets"]
    if not isinstance(dtype, str):
        raise bad(f"dtype {dtype!r}, not a name")
    if dtype not in ST_DTYPES:
        raise CompressError(f"{path}: tensor {name} has unsupported dtype {dtype}; expected one of {', '.join(ST_DTYPES)}")
    if not isinstance(shape, list) or not all(_is_count(d) for d in shape):
        raise bad(f"shape {shape!r}; expected a list of non-negative whole numbers")
    if not (isinstance(offsets, list) and len(offsets) == 2 and all(_is_count(o) for o in offsets)) \
            or offsets[1] < offsets[0]:
        raise CompressError(f"{path}: tensor {name} has invalid data offsets {offsets!r}; "
                            "expected [start, end] with 0 <= start <= end")
    return dtype, tuple(shape), offsets[0], offsets[1]


def _is_count(x) -> bool:
    """A non-negative int that is not a bool (JSON true would pass isinstance(x, int))."""
    return isinstance(x, int) and not isinstance(x, bool) and x >= 0


class TorchSource(TensorSource):
    """A torch state dict, loaded with weights_only=True so no pickled code can run."""
    format = "torch"

    def __init__(self, path: Path, file: Path, config: dict | None):
        super().__init__(path, config)
        try:
            sd = torch.load(file, map_location="cpu", weights_only=True, mmap=True)
        except pickle.UnpicklingError:
            raise CompressError(f"{file}: refused: the state dict holds pickled objects other than tensors; "
                                "convert it to safetensors") from None
        except (RuntimeError, EOFError, OSError) as e:
            raise CompressError(f"{file}: not a readable torch state dict ({str(e).splitlines()[0][:120]})") from None
        if isinstance(sd, dict) and "state_dict" in sd and isinstance(sd["state_dict"], dict):
            sd = sd["state_dict"]
        if not isinstance(sd, dict) or not all(isinstance(v, torch.Tensor) for v in sd.values()):
            raise CompressError(f"{file}: expected a dict of tensor names to tensors")
        self._tensors = sd
        for name, t in sd.items():
            self._index[name] = (tuple(t.shape), str(t.dtype).removeprefix("torch."), file)

    def get(self, name: str) -> torch.Tensor:
        return self._tensors[name]


def _read_json(path: Path) -> dict:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as e:
        raise CompressError(f"{path}: not valid JSON ({e.__class__.__name__}: {str(e).splitlines()[0][:100]})") from None
    if not isinstance(data, dict):
        raise CompressError(f"{path}: expected a JSON object")
    return data


def open_source(path: str | os.PathLike) -> TensorSource:
    """Open a model directory, a compressed directory, a .safetensors, .pt/.bin or .gguf file.

    Raises:
        CompressError: the path is missing, holds no weights, or a file is corrupt.
    """
    path = Path(path)
    if not path.exists():
        raise CompressError(f"{path}: no such file or directory; expected a model directory, .safetensors or .gguf file")
    if path.is_dir():
        if not os.access(path, os.R_OK | os.X_OK):
            raise CompressError(f"{path}: directory not readable (permission denied); check its permissions")
        config = _read_json(path / "config.json") if (path / "config.json").is_file() else None
        index = path / "model.safetensors.index.json"
        if index.is_file():
            weight_map = _read_json(index).get("weight_map")
            if not isinstance(weight_map, dict) or not weight_map or \
                    not all(isinstance(f, str) and Path(f).name == f for f in weight_map.values()):
                raise CompressError(f"{index}: expected a non-empty 'weight_map' of tensor names to shard file names in the same directory")
            shards = sorted({path / f for f in weight_map.values()})
            for s in shards:
                if not s.is_file():
                    raise CompressError(f"{index}: names shard {s.name}, which is missing")
            return SafetensorsSource(path, shards, config)
        shards = sorted(path.glob("*.safetensors"))
        if shards:
            return SafetensorsSource(path, shards, config)
        for name in ("pytorch_model.bin", "model.pt", "model.pth"):
            if (path / name).is_file():
                return TorchSource(path, path / name, config)
        raise CompressError(f"{path}: no weights found; expected model.safetensors, sharded safetensors with "
                            "model.safetensors.index.json, or pytorch_model.bin")
    if not os.access(path, os.R_OK):
        raise CompressError(f"{path}: not readable (permission denied); check its permissions")
    suffix = path.suffix.lower()
    if suffix == ".safetensors":
        return SafetensorsSource(path, [path], None)
    if suffix == ".gguf":
        return GGUFSource(path)
    if suffix in (".bin", ".pt", ".pth"):
        return TorchSource(path, path, None)
    raise CompressError(f"{path}: unknown file type {suffix or '(none)'}; expected .safetensors, .gguf, .pt or a model directory")
