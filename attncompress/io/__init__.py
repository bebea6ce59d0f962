"""Reading checkpoints lazily and writing compressed ones."""
from .read import TensorSource, open_source  # noqa: F401
