"""Open any supported path as a runnable model: source checkpoints and compressed directories."""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path


from . import arch
from .factorize import balance_layer
from .errors import CompressError
from .io.read import open_source
from .io.source import MANIFEST, TensorSource
from .io.storage import decode
from .model import Transformer, build
from .shape import ModelShape


@dataclass
class Loaded:
    """A model ready to run, with where it came from."""
    model: Transformer
    shape: ModelShape
    tokenizer: object | None  # tokenizers.Tokenizer
    source: TensorSource
    walk: arch.Walk | None  # None for a compressed directory
    manifest: dict | None  # the compressed directory's manifest, or None for a source checkpoint

    @property
    def path(self) -> Path:
        return self.source.path


def is_compressed(path: str | Path) -> bool:
    return Path(path).is_dir() and (Path(path) / MANIFEST).is_file()


def read_manifest(path: str | Path) -> dict:
    f = Path(path) / MANIFEST
    try:
        m = json.loads(f.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as e:
        raise CompressError(f"{f}: not a readable manifest ({e.__class__.__name__})") from None
    if not isinstance(m, dict) or "shape" not in m or "format_version" not in m:
        raise CompressError(f"{f}: manifest lacks 'shape' or 'format_version'; expected a directory written by attncompress")
    return m


def load_weights(path: str | Path, heads: int | None = None, kv_heads: int | None = None):
    """(shape, canonical weights, source, walk, manifest) without building the runtime."""
    source = open_source(path)
    if is_compressed(path):
        manifest = read_manifest(path)
        shape = ModelShape.from_json(manifest["shape"])
        weights = decode(source.names(), source.get)  # float32 whatever the stored format (io.storage)
        return shape, weights, source, None, manifest
    w = arch.walk(source, heads, kv_heads)
    weights = dict(arch.canonical_weights(source, w))
    return w.shape, weights, source, w, None


def load_model(path: str | Path, heads: int | None = None, kv_heads: int | None = None,
               balanced: bool = False) -> Loaded:
    """Open `path` (model directory, compressed directory, .safetensors or .gguf) and build our runtime.

    `balanced`: rebalance every layer's factor pairs first (`factorize.balance_layer`: the same products), as
    a tune wants them whatever wrote the directory.

    Raises:
        CompressError: missing or corrupt files, unknown family, shapes that disagree with the config.
    """
    shape, weights, source, w, manifest = load_weights(path, heads, kv_heads)
    if balanced:
        for i in range(shape.n_layers):
            balance_layer(shape.n_heads, shape.n_kv_heads, shape.rotary, weights, f"layers.{i}.")
    model = build(shape, weights)
    model.eval()
    return Loaded(model, shape, source.tokenizer(), source, w, manifest)


def tokens(loaded, text: str) -> list[int]:
    """Token ids of a text with the model's own tokenizer."""
    if loaded.tokenizer is None:
        raise CompressError(f"{loaded.path}: no tokenizer found; expected tokenizer.json beside the weights or GGUF metadata")
    return loaded.tokenizer.encode(text).ids
