"""Reference English text that ships with the machine, for benchmarks and tests.

Nobody on the project wrote these texts, so they cannot be tuned to flatter
a compressed model:

- "pydoc-calibration" / "pydoc-heldout": the Python language reference topics
  that the standard library carries as `pydoc_data.topics.topics` (topic name ->
  text). The topic names are sorted and dealt out alternately: the names at even
  positions (0, 2, 4, ...) form the calibration part and those at odd positions
  the held-out part, so the two parts never share a topic and are about the same
  size. The texts follow the installed Python version (they change between
  Python releases), so the same interpreter always gives the same text.
- "licenses": the Apache-2.0, GPL-3 and MPL-2.0 license texts from
  /usr/share/common-licenses/ (Debian/Ubuntu package base-files), in that sorted
  order, as held-out text of another kind (legal prose rather than technical
  documentation).
"""
from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Callable

from .errors import CompressError

PYDOC_PARTS = ("calibration", "heldout")
LICENSE_DIR = Path("/usr/share/common-licenses")
LICENSE_FILES = ("Apache-2.0", "GPL-3", "MPL-2.0")  # sorted; regular files, not the GPL -> GPL-3 style links


def _check_max_chars(max_chars: int | None) -> None:
    """Reject a max_chars that is not None or a positive integer."""
    if max_chars is None:
        return
    if isinstance(max_chars, bool) or not isinstance(max_chars, int) or max_chars <= 0:
        raise CompressError(f"max_chars: must be a positive number of characters or None, got {max_chars!r}")


def _topics() -> dict[str, str]:
    """The standard library's pydoc topic texts."""
    try:
        from pydoc_data.topics import topics
    except ImportError:
        raise CompressError(
            "pydoc corpus: this Python has no pydoc_data module; install the full standard library "
            "or point the tool at a text file instead") from None
    return topics


def pydoc_topic_names(part: str) -> list[str]:
    """The pydoc topic names in one part of the split.

    Args:
        part: "calibration" (sorted names at even positions) or "heldout" (odd positions).

    Returns:
        The topic names of that part, sorted.

    Raises:
        CompressError: an unknown part, or no pydoc_data in this Python.
    """
    if part not in PYDOC_PARTS:
        raise CompressError(f"pydoc corpus: unknown part {part!r}; expected one of {', '.join(PYDOC_PARTS)}")
    names = sorted(_topics())
    return names[PYDOC_PARTS.index(part)::2]


def pydoc_text(part: str, max_chars: int | None = None) -> str:
    """The text of one part of the pydoc topics, topics joined with blank lines.

    Args:
        part: "calibration" or "heldout" (see the module docstring for the split).
        max_chars: keep at most this many characters from the start (None: all).

    Returns:
        The topic texts in sorted topic-name order, joined with "\\n\\n".

    Raises:
        CompressError: an unknown part, a bad max_chars, or no pydoc_data in this Python.
    """
    _check_max_chars(max_chars)
    topics = _topics()
    text = "\n\n".join(topics[name].strip("\n") for name in pydoc_topic_names(part))
    return text if max_chars is None else text[:max_chars]


def license_text(max_chars: int | None = None, *, directory: str | Path = LICENSE_DIR) -> str:
    """The Apache-2.0, GPL-3 and MPL-2.0 license texts, in that order, joined with blank lines.

    Args:
        max_chars: keep at most this many characters from the start (None: all).
        directory: where the license files are (the Debian/Ubuntu location by default).

    Returns:
        The joined license texts.

    Raises:
        CompressError: a bad max_chars, or a license file missing or unreadable.
    """
    _check_max_chars(max_chars)
    directory = Path(directory)
    for name in LICENSE_FILES:
        if not (directory / name).is_file():
            raise CompressError(
                f"{directory / name}: no such license file; install the base-files package "
                f"(Debian/Ubuntu) or use another corpus")
    parts = []
    for name in LICENSE_FILES:
        try:
            parts.append((directory / name).read_text(encoding="utf-8").removeprefix("\ufeff"))
        except (OSError, UnicodeDecodeError) as e:
            reason = "not UTF-8 text" if isinstance(e, UnicodeDecodeError) else (e.strerror or type(e).__name__)
            raise CompressError(f"{directory / name}: cannot read the license file ({reason}); "
                                "use another corpus") from None
    text = "\n\n".join(parts)
    return text if max_chars is None else text[:max_chars]


CORPORA: dict[str, Callable[..., str]] = {
    "pydoc-calibration": lambda max_chars=None: pydoc_text("calibration", max_chars),
    "pydoc-heldout": lambda max_chars=None: pydoc_text("heldout", max_chars),
    "licenses": lambda max_chars=None: license_text(max_chars),
}


# The document each corpus comes from: two corpora of one source are different passages of the same kind of text.
SOURCES = {"pydoc-calibration": "the Python language reference", "pydoc-heldout": "the Python language reference",
           "licenses": "the license texts"}


def same_source(a: str, b: str) -> str | None:
    """The shared source of two text names (`corpus:NAME` or files) when both are corpora of it, else None."""
    sa, sb = (SOURCES.get(t[len("corpus:"):]) if t.startswith("corpus:") else None for t in (a, b))
    return sa if sa is not None and sa == sb else None


def corpus_text(name: str, max_chars: int | None = None) -> str:
    """The text of a named corpus.

    Args:
        name: one of the keys of `CORPORA`.
        max_chars: keep at most this many characters from the start (None: all).

    Returns:
        The corpus text.

    Raises:
        CompressError: an unknown name, or the corpus' own errors.
    """
    if name not in CORPORA:
        raise CompressError(f"corpus: unknown name {name!r}; expected one of {', '.join(CORPORA)}")
    return CORPORA[name](max_chars)


def write_corpus(name: str, path: str | Path, max_chars: int | None = None) -> dict:
    """Save a named corpus as a UTF-8 text file so the command line can read it.

    Missing parent directories are created.

    Args:
        name: one of the keys of `CORPORA`.
        path: the file to write (overwritten if it exists).
        max_chars: keep at most this many characters (None: all).

    Returns:
        A manifest description: "corpus", "name" (file name), "bytes", "sha256", "chars".

    Raises:
        CompressError: an unknown name, the corpus' own errors, or a path that cannot be written.
    """
    text = corpus_text(name, max_chars)
    data = text.encode("utf-8")
    p = Path(path)
    try:
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(data)
    except OSError as e:
        reason = e.strerror or type(e).__name__
        raise CompressError(f"{path}: cannot write the corpus file ({reason}); choose a writable path") from None
    return {"corpus": name, "name": p.name, "bytes": len(data),
            "sha256": hashlib.sha256(data).hexdigest(), "chars": len(text)}
