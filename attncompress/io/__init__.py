"""Reading checkpoints lazily and writing compressed ones."""
from .read import open_source  # noqa: F401
from .source import TensorSource  # noqa: F401
