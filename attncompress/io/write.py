"""Writing directories and files atomically: a temporary sibling, then one rename.

`ShardWriter` streams tensors into safetensors shards without holding a shard in
memory: each tensor goes to a spool file as it comes, and a full shard is laid out
(header, then the tensors in the safetensors library's own order) by copying from
the spool, so a shard is byte-for-byte what `safetensors.torch.save_file` writes.
"""
from __future__ import annotations

import contextlib
import json
import os
import re
import shutil
import struct
from pathlib import Path

import torch

from ..errors import CompressError
from .source import MANIFEST, ST_DTYPES
from .storage import encode, encode_all

INDEX = "model.safetensors.index.json"
DEFAULT_SHARD_SIZE = "2GB"
_DTYPE_NAMES = {dt: name for name, (dt, _) in ST_DTYPES.items()}
# The order in which the safetensors library lays out tensor data: by dtype (its internal dtype order, descending),
# then by name. From observing safetensors 0.8's output; tests/test_bad_input.py checks it against save_file.
_LAYOUT_ORDER = ("I64", "F64", "F32", "I32", "BF16", "F16", "I16", "I8", "U8", "BOOL")
_COPY_CHUNK = 1 << 23  # bytes per read/write when moving data from the spool into a shard


def check_output(out: str | Path, force: bool) -> Path:
    """Refuse early (before any work) when the output exists without --force, or cannot be made where it is.

    Missing parent folders are fine: `atomic_dir` and `write_json_atomic` create them when they write.
    """
    out = Path(out)
    if out.exists() and not force:
        raise CompressError(f"{out}: already exists; choose another --out or pass --force to replace it")
    if out.exists() and not out.is_dir():
        raise CompressError(f"{out}: exists and is not a directory; choose another --out")
    _existing_ancestor(out)
    return out


def _existing_ancestor(path: Path) -> Path:
    """The nearest ancestor of `path` that exists; it must be a directory."""
    anc = path.absolute().parent
    while not anc.exists():
        anc = anc.parent
    if not anc.is_dir():
        raise CompressError(f"{anc}: is a file, so {path} cannot be made below it; choose another --out")
    return anc


def _make_parents(path: Path) -> list[Path]:
    """Create the missing parent folders of `path`; returns those created, outermost first."""
    created = []
    anc = path.absolute().parent
    while not anc.exists():
        created.append(anc)
        anc = anc.parent
    created.reverse()
    try:
        for d in created:
            d.mkdir()
    except OSError as e:
        _remove_created(created)
        raise CompressError(f"{d}: cannot create the folder ({e.strerror or e}); choose a writable --out") from None
    return created


def _remove_created(created: list[Path]) -> None:
    """Remove folders `_make_parents` created (innermost first), where they are still empty."""
    for d in reversed(created):
        try:
            d.rmdir()
        except OSError:
            pass


@contextlib.contextmanager
def atomic_dir(out: str | Path, force: bool = False):
    """Yield a temporary directory beside `out`; on success it replaces `out` in one rename.

    Missing parent folders of `out` are created first. On any error (disk full, Ctrl-C) the temporary
    directory, and the parent folders made for it, are removed and `out` is untouched.
    """
    out = check_output(out, force)
    created = _make_parents(out)
    tmp = out.parent / f".{out.name}.partial-{os.getpid()}"
    shutil.rmtree(tmp, ignore_errors=True)
    try:
        tmp.mkdir()
    except OSError as e:
        _remove_created(created)
        raise CompressError(f"{out.parent}: cannot create the output there ({e.strerror or e}); "
                            "choose a writable --out") from None
    try:
        yield tmp
        if out.exists():
            old = out.parent / f".{out.name}.old-{os.getpid()}"
            out.rename(old)
            tmp.rename(out)
            shutil.rmtree(old, ignore_errors=True)
        else:
            tmp.rename(out)
    except OSError as e:
        shutil.rmtree(tmp, ignore_errors=True)
        _remove_created(created)
        raise CompressError(f"{out}: writing failed ({e.strerror or e}); nothing was left behind") from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        _remove_created(created)
        raise


def save_tensors(path: Path, tensors: dict[str, torch.Tensor], dtype: str | None = None) -> None:
    """One safetensors file, names sorted so identical inputs give identical bytes; stored as `dtype`
    (a format of `io.storage`; None: as given)."""
    from safetensors.torch import save_file
    if dtype is not None:
        tensors = encode_all(tensors, dtype)
    save_file({k: tensors[k].contiguous() for k in sorted(tensors)}, str(path), metadata={"format": "pt"})


def dumps(obj) -> str:
    """Canonical JSON: sorted keys, two-space indent, newline at the end."""
    return json.dumps(obj, indent=2, sort_keys=True, default=str) + "\n"


def write_json_atomic(path: str | Path, obj) -> None:
    """Write `obj` as canonical JSON to `path` through a temporary sibling; missing parent folders are made."""
    path = Path(path)
    if path.is_dir():
        raise CompressError(f"{path}: is a directory; give a file name for --out")
    _existing_ancestor(path)
    created = _make_parents(path)
    tmp = path.with_name(f".{path.name}.partial-{os.getpid()}")
    try:
        tmp.write_text(dumps(obj), encoding="utf-8")
        tmp.replace(path)
    except OSError as e:
        tmp.unlink(missing_ok=True)
        _remove_created(created)
        raise CompressError(f"{path}: writing failed ({e.strerror or e})") from None


def write_model_dir(tmp: Path, weights: dict[str, torch.Tensor] | None, manifest: dict, tokenizer=None,
                    config: dict | None = None, dtype: str | None = None) -> None:
    """Fill a (temporary) directory with the weights, the manifest, the tokenizer and the source config.

    `weights` None: the tensors are already there (written by a `ShardWriter`). `dtype`: the storage format
    of the weights (`io.storage`; None: as given).
    """
    if weights is not None:
        save_tensors(tmp / "model.safetensors", weights, dtype)
    (tmp / MANIFEST).write_text(dumps(manifest), encoding="utf-8")
    if tokenizer is not None:
        tokenizer.save(str(tmp / "tokenizer.json"))
    if config is not None:
        (tmp / "source-config.json").write_text(dumps(config), encoding="utf-8")


# ------------------------------------------------------------------------------------------ sharded output

_UNITS = {"": 1, "B": 1, "KB": 10**3, "MB": 10**6, "GB": 10**9, "TB": 10**12,
          "KIB": 2**10, "MIB": 2**20, "GIB": 2**30, "TIB": 2**40}


def parse_size(text: str | int, option: str = "--shard-size") -> int:
    """A byte count from "2GB", "500MB", "1.5GiB" or a plain number of bytes (decimal units as on disk labels).

    Example: "2GB" → 2000000000, "1KiB" → 1024, 4096 → 4096.
    """
    if isinstance(text, int) and not isinstance(text, bool):
        value = text
    else:
        m = re.fullmatch(r"\s*(\d+(?:\.\d+)?)\s*([A-Za-z]*)\s*", str(text))
        unit = m.group(2).upper() if m else None
        if m is None or unit not in _UNITS:
            raise CompressError(f"{option}: expected a size such as 2GB, 500MB or 1000000 (bytes), got {text!r}")
        value = int(float(m.group(1)) * _UNITS[unit])
    if value <= 0:
        raise CompressError(f"{option}: must be a positive size, got {text!r}")
    return value


class ShardWriter:
    """Write tensors one at a time as safetensors shards of at most `shard_size` bytes of tensor data.

    Tensors are assigned to shards in the order they are added; a shard is closed when the next tensor
    would take it past `shard_size` (a tensor larger than that gets a shard of its own). `close` names
    the result: one shard is `model.safetensors`; several are `model-0000k-of-0000N.safetensors` with
    `model.safetensors.index.json`, the layout `open_source` (and the Hugging Face loaders) read.

    Memory: nothing is kept but names, shapes and offsets. Disk: the output plus one spooled shard.
    `metadata` is the header's `__metadata__` (default {"format": "pt"}, as `save_tensors` writes). `dtype`:
    the storage format tensors are written in (`io.storage`; an int8 matrix becomes two tensors), None: as given.
    """

    def __init__(self, directory: Path, shard_size: int, metadata: dict[str, str] | None = None,
                 dtype: str | None = None):
        self.directory, self.shard_size, self.dtype = Path(directory), shard_size, dtype
        self.metadata = {"format": "pt"} if metadata is None else metadata
        self._done: list[tuple[Path, list[str], int]] = []  # closed shards: (file, names, data bytes)
        self._entries: list[tuple[str, str, list[int], int, int]] = []  # (name, dtype, shape, spool offset, bytes)
        self._names: set[str] = set()
        self._spool_path: Path | None = None
        self._spool: int | None = None  # file descriptor
        self._size = 0

    def add(self, name: str, tensor: torch.Tensor) -> None:
        """Append one tensor (written to disk now, in the writer's format; the caller may drop it)."""
        if self.dtype is None:
            self._add(name, tensor)
        else:
            for n, t in encode(name, tensor, self.dtype):
                self._add(n, t)

    def _add(self, name: str, tensor: torch.Tensor) -> None:
        assert name not in self._names, f"tensor {name} added twice"
        if tensor.dtype not in _DTYPE_NAMES:
            raise CompressError(f"tensor {name}: dtype {tensor.dtype} cannot be stored in safetensors here")
        t = tensor.detach().contiguous()
        data = t.reshape(-1).view(torch.uint8).numpy()  # the raw bytes, no copy (little-endian, as the format says)
        if self._entries and self._size + data.nbytes > self.shard_size:
            self._close_shard()
        if self._spool is None:
            self._spool_path = self.directory / f".spool-{len(self._done)}"
            self._spool = os.open(self._spool_path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
        _write_all(self._spool, memoryview(data))
        self._entries.append((name, _DTYPE_NAMES[t.dtype], list(t.shape), self._size, data.nbytes))
        self._names.add(name)
        self._size += data.nbytes

    def close(self) -> list[str]:
        """Finish the last shard, give the shards their final names (and the index); return the file names."""
        if self._entries or not self._done:
            self._close_shard()
        n = len(self._done)
        names = ["model.safetensors"] if n == 1 else [f"model-{k + 1:05d}-of-{n:05d}.safetensors" for k in range(n)]
        for (f, _, _), final in zip(self._done, names):
            f.rename(self.directory / final)
        if n > 1:
            weight_map = {t: final for (_, ts, _), final in zip(self._done, names) for t in ts}
            total = sum(size for _, _, size in self._done)
            (self.directory / INDEX).write_text(dumps({"metadata": {"total_size": total}, "weight_map": weight_map}),
                                                encoding="utf-8")
        return names

    def _close_shard(self) -> None:
        """Lay out the spooled shard as a safetensors file (header, then data in the library's order)."""
        order = sorted(self._entries, key=lambda e: (_LAYOUT_ORDER.index(e[1]), e[0]))
        header: dict = {"__metadata__": self.metadata}
        offset = 0
        for name, dtype, shape, _, nbytes in order:
            header[name] = {"dtype": dtype, "shape": shape, "data_offsets": [offset, offset + nbytes]}
            offset += nbytes
        # compact JSON as the library writes it, padded with spaces to a multiple of 8 bytes
        text = json.dumps(header, separators=(",", ":"), ensure_ascii=False).encode("utf-8")
        text += b" " * ((8 - len(text) % 8) % 8)
        shard = self.directory / f".shard-{len(self._done)}.safetensors"
        src = None
        if self._spool is not None:
            os.close(self._spool)
            self._spool = None
            src = os.open(self._spool_path, os.O_RDONLY)
        dst = os.open(shard, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
        try:
            _write_all(dst, memoryview(struct.pack("<Q", len(text)) + text))
            for _, _, _, at, nbytes in order:
                end = at + nbytes
                while at < end:
                    chunk = os.pread(src, min(_COPY_CHUNK, end - at), at)
                    assert chunk, "spool file shorter than what was written to it"
                    _write_all(dst, memoryview(chunk))
                    at += len(chunk)
        finally:
            os.close(dst)
            if src is not None:
                os.close(src)
                self._spool_path.unlink()
        self._done.append((shard, [e[0] for e in self._entries], offset))
        self._entries, self._size = [], 0

    def abort(self) -> None:
        """Close open files (the caller removes the directory)."""
        if self._spool is not None:
            os.close(self._spool)
            self._spool = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.abort()
        return False


def _write_all(fd: int, data: memoryview) -> None:
    """os.write until every byte is written (one call may write fewer)."""
    while len(data):
        n = os.write(fd, data[:_COPY_CHUNK])
        data = data[n:]
