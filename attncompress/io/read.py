"""Lazy tensor access by name for every supported checkpoint format.

A `TensorSource` lists names, shapes and dtypes without loading anything, then
hands out one tensor at a time. Safetensors files are memory-mapped after their
header has been checked against the file's size; GGUF tensors are dequantised to
float32 one at a time; torch state dicts load only with `weights_only=True`.
"""
from __future__ import annotations

import json
import os
import pickle
import struct
from pathlib import Path

import numpy as np
import torch

from ..errors import CompressError

# safetensors dtype names → (torch dtype, bytes per element)
_ST_DTYPES = {
    "F64": (torch.float64, 8), "F32": (torch.float32, 4), "F16": (torch.float16, 2), "BF16": (torch.bfloat16, 2),
    "I64": (torch.int64, 8), "I32": (torch.int32, 4), "I16": (torch.int16, 2), "I8": (torch.int8, 1),
    "U8": (torch.uint8, 1), "BOOL": (torch.bool, 1),
}
MANIFEST = "attncompress.json"  # marks a directory written by this tool


class TensorSource:
    """Names, shapes and one tensor at a time from a checkpoint.

    Attributes:
        path: what the user named (file or directory).
        format: "safetensors", "torch" or "gguf".
        config: the model's config.json as a dict (for GGUF: built from its metadata), or None.
        files: every file the tensors come from (for checksums).
    """

    format = "?"

    def __init__(self, path: Path, config: dict | None):
        self.path = path
        self.config = config
        self._index: dict[str, tuple[tuple[int, ...], str, Path]] = {}  # name → (shape, dtype, file)

    def names(self) -> list[str]:
        return list(self._index)

    def shape(self, name: str) -> tuple[int, ...]:
        return self._index[name][0]

    def dtype(self, name: str) -> str:
        return self._index[name][1]

    def file_of(self, name: str) -> Path:
        return self._index[name][2]

    @property
    def files(self) -> list[Path]:
        return sorted({f for _, _, f in self._index.values()})

    def get(self, name: str) -> torch.Tensor:
        """One tensor, as stored (GGUF: dequantised float32)."""
        raise NotImplementedError

    def tokenizer(self):
        """A `tokenizers.Tokenizer`, or None when the checkpoint has none."""
        tok = self.path / "tokenizer.json" if self.path.is_dir() else self.path.with_name("tokenizer.json")
        if not tok.is_file():
            return None
        from tokenizers import Tokenizer
        try:
            return Tokenizer.from_file(str(tok))
        except Exception as e:  # the tokenizers library raises a plain Exception
            raise CompressError(f"{tok}: not a readable tokenizer.json ({str(e).splitlines()[0]})") from None

    def dtypes(self) -> dict[str, int]:
        """How many tensors of each stored dtype."""
        out: dict[str, int] = {}
        for _, dt, _ in self._index.values():
            out[dt] = out.get(dt, 0) + 1
        return dict(sorted(out.items()))


class SafetensorsSource(TensorSource):
    format = "safetensors"

    def __init__(self, path: Path, files: list[Path], config: dict | None):
        super().__init__(path, config)
        self._handles: dict[Path, object] = {}
        for f in files:
            for name, (shape, dtype) in read_safetensors_header(f).items():
                if name in self._index:
                    raise CompressError(f"{f}: tensor {name} also stored in {self._index[name][2]}; expected each once")
                self._index[name] = (shape, dtype, f)

    def get(self, name: str) -> torch.Tensor:
        f = self._index[name][2]
        if f not in self._handles:
            from safetensors import safe_open
            self._handles[f] = safe_open(str(f), framework="pt")
        return self._handles[f].get_tensor(name)


def read_safetensors_header(path: Path) -> dict[str, tuple[tuple[int, ...], str]]:
    """Check a safetensors header against the file before anything is mapped.

    Returns name → (shape, dtype). Raises CompressError for a truncated file, a
    header that is not JSON, an unsupported dtype, offsets that overlap, leave
    gaps, disagree with the shape, or point past the end of the file.
    """
    size = path.stat().st_size
    with open(path, "rb") as fh:
        head = fh.read(8)
        if len(head) < 8:
            raise CompressError(f"{path}: truncated safetensors file ({size} bytes); expected an 8-byte header length")
        (n,) = struct.unpack("<Q", head)
        if n > size - 8:
            raise CompressError(f"{path}: header claims {n} bytes but the file has {size - 8} after the length; the file is truncated")
        raw = fh.read(n)
    try:
        header = json.loads(raw)
    except (UnicodeDecodeError, json.JSONDecodeError):
        raise CompressError(f"{path}: safetensors header is not valid JSON; the file is corrupt") from None
    if not isinstance(header, dict):
        raise CompressError(f"{path}: safetensors header is not a JSON object; the file is corrupt")
    header.pop("__metadata__", None)
    data_size = size - 8 - n
    out, spans = {}, []
    for name, info in header.items():
        try:
            dtype, shape, (start, end) = info["dtype"], tuple(int(d) for d in info["shape"]), info["data_offsets"]
        except (KeyError, TypeError, ValueError):
            raise CompressError(f"{path}: tensor {name} has a malformed header entry; expected dtype, shape, data_offsets") from None
        if dtype not in _ST_DTYPES:
            raise CompressError(f"{path}: tensor {name} has unsupported dtype {dtype}; expected one of {', '.join(_ST_DTYPES)}")
        need = int(np.prod(shape, dtype=np.int64)) * _ST_DTYPES[dtype][1]
        if not (isinstance(start, int) and isinstance(end, int)) or start < 0 or end < start:
            raise CompressError(f"{path}: tensor {name} has invalid data offsets [{start}, {end}]")
        if end - start != need:
            raise CompressError(f"{path}: tensor {name} spans {end - start} bytes but shape {list(shape)} of {dtype} needs {need}")
        if end > data_size:
            raise CompressError(f"{path}: tensor {name} ends at byte {end} but the data section has {data_size} bytes; the file is truncated")
        out[name] = (shape, dtype)
        spans.append((start, end, name))
    spans.sort()
    for (s0, e0, a), (s1, e1, b) in zip(spans, spans[1:]):
        if s1 < e0:
            raise CompressError(f"{path}: tensors {a} and {b} overlap in the data section; the header is corrupt")
    return out


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
        config = _read_json(path / "config.json") if (path / "config.json").is_file() else None
        index = path / "model.safetensors.index.json"
        if index.is_file():
            weight_map = _read_json(index).get("weight_map")
            if not isinstance(weight_map, dict) or not weight_map:
                raise CompressError(f"{index}: expected a non-empty 'weight_map' of tensor names to shard files")
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
        raise CompressError(f"{path}: not readable (permission denied)")
    suffix = path.suffix.lower()
    if suffix == ".safetensors":
        return SafetensorsSource(path, [path], None)
    if suffix == ".gguf":
        from .gguf import GGUFSource
        return GGUFSource(path)
    if suffix in (".bin", ".pt", ".pth"):
        return TorchSource(path, path, None)
    raise CompressError(f"{path}: unknown file type {suffix or '(none)'}; expected .safetensors, .gguf, .pt or a model directory")
