"""The interface every checkpoint reader presents, and the facts the readers and the writer share.

A `TensorSource` lists names, shapes and dtypes without loading anything, then hands out one tensor at a
time; `io.read` (safetensors, torch) and `io.gguf` implement it.
"""
from __future__ import annotations

from pathlib import Path

import torch

from ..errors import CompressError

# safetensors dtype names → (torch dtype, bytes per element)
ST_DTYPES = {
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
