"""Writing directories and files atomically: a temporary sibling, then one rename."""
from __future__ import annotations

import contextlib
import json
import os
import shutil
from pathlib import Path

import torch

from ..errors import CompressError
from .read import MANIFEST


def check_output(out: str | Path, force: bool) -> Path:
    """Refuse early (before any work) when the output exists without --force or its parent is missing."""
    out = Path(out)
    if out.exists() and not force:
        raise CompressError(f"{out}: already exists; choose another --out or pass --force to replace it")
    if out.exists() and not out.is_dir():
        raise CompressError(f"{out}: exists and is not a directory; choose another --out")
    if not out.parent.is_dir():
        raise CompressError(f"{out.parent}: no such directory for --out")
    return out


@contextlib.contextmanager
def atomic_dir(out: str | Path, force: bool = False):
    """Yield a temporary directory beside `out`; on success it replaces `out` in one rename.

    On any error (disk full, Ctrl-C) the temporary directory is removed and `out` is untouched.
    """
    out = check_output(out, force)
    tmp = out.parent / f".{out.name}.partial-{os.getpid()}"
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir()
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
        raise CompressError(f"{out}: writing failed ({e.strerror or e}); nothing was left behind") from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def save_tensors(path: Path, tensors: dict[str, torch.Tensor]) -> None:
    """One safetensors file, names sorted so identical inputs give identical bytes."""
    from safetensors.torch import save_file
    save_file({k: tensors[k].contiguous() for k in sorted(tensors)}, str(path), metadata={"format": "pt"})


def dumps(obj) -> str:
    """Canonical JSON: sorted keys, two-space indent, newline at the end."""
    return json.dumps(obj, indent=2, sort_keys=True, default=str) + "\n"


def write_json_atomic(path: str | Path, obj) -> None:
    path = Path(path)
    if not path.parent.is_dir():
        raise CompressError(f"{path.parent}: no such directory")
    tmp = path.with_name(f".{path.name}.partial-{os.getpid()}")
    try:
        tmp.write_text(dumps(obj), encoding="utf-8")
        tmp.replace(path)
    except OSError as e:
        tmp.unlink(missing_ok=True)
        raise CompressError(f"{path}: writing failed ({e.strerror or e})") from None


def write_model_dir(tmp: Path, weights: dict[str, torch.Tensor], manifest: dict, tokenizer=None,
                    config: dict | None = None) -> None:
    """Fill a (temporary) directory with the weights, the manifest, the tokenizer and the source config."""
    save_tensors(tmp / "model.safetensors", weights)
    (tmp / MANIFEST).write_text(dumps(manifest), encoding="utf-8")
    if tokenizer is not None:
        tokenizer.save(str(tmp / "tokenizer.json"))
    if config is not None:
        (tmp / "source-config.json").write_text(dumps(config), encoding="utf-8")
