"""Reading the user's text files and cutting token ids into fixed-length blocks.

Everything a user can get wrong here (a missing file, a directory, bytes that
are not UTF-8, an empty file, too little text for one block) raises
`CompressError` with a one-line message naming the file and the fix.
"""
from __future__ import annotations

import hashlib
import re
from pathlib import Path

import torch

from .corpora import CORPORA, corpus_text
from .errors import CompressError

_BOM = "\ufeff"  # a UTF-8 byte-order mark some editors put first; not part of the text
SENTENCE_CHARS = 400  # a paragraph longer than this is cut at sentence ends (about 100 tokens of English)
_SENTENCE_END = re.compile(r"(?<=[.!?])\s+(?=[A-Z0-9\"'(])")  # after . ! ? and before a capital: a new sentence


def _read_one(path: str | Path) -> tuple[str, dict]:
    """Read one UTF-8 text file (or `corpus:NAME`, a built-in corpus); return its text and its description."""
    if str(path).startswith("corpus:"):
        name = str(path).split(":", 1)[1]
        if name == "samples" or name.startswith("samples:"):
            raise CompressError(f"{path}: text sampled from the source model is made by compress, tune, run, plan "
                                "and spectrum, which know the model; here give a file or another corpus")
        if name not in CORPORA:
            raise CompressError(f"{path}: unknown built-in corpus; expected one of "
                                + ", ".join(f"corpus:{n}" for n in CORPORA))
        data = corpus_text(name).encode("utf-8")
        return data.decode("utf-8"), {"name": str(path), "bytes": len(data),
                                      "sha256": hashlib.sha256(data).hexdigest(), "lines": data.count(b"\n") + 1}
    p = Path(path)
    if not p.exists():
        raise CompressError(f"{path}: no such text file")
    if p.is_dir():
        raise CompressError(f"{path}: is a directory, not a text file; name the file inside it")
    try:
        data = p.read_bytes()
    except OSError as e:
        reason = e.strerror or type(e).__name__
        raise CompressError(f"{path}: cannot read the text file ({reason}); check that it is readable") from None
    if not data:
        raise CompressError(f"{path}: empty text file; give a file with some text in it")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as e:
        # e.start is the offset in bytes of the first byte that does not decode
        raise CompressError(
            f"{path}: not UTF-8 text (invalid byte at offset {e.start}); save it as UTF-8") from None
    if text.startswith(_BOM):
        text = text[len(_BOM):]
    if not text.strip():
        raise CompressError(f"{path}: only whitespace, no text; give a file with some text in it")
    lines = text.count("\n") + (0 if text.endswith("\n") else 1)
    desc = {
        "name": p.name,
        "bytes": len(data),
        "sha256": hashlib.sha256(data).hexdigest(),
        "lines": lines,
    }
    return text, desc


def read_texts(paths: list[str | Path]) -> tuple[str, list[dict]]:
    """Read UTF-8 text files and join them into one text.

    The files are joined in the order given with "\\n\\n" between them, each
    as it is on disk apart from a leading UTF-8 byte-order mark, which is dropped.

    Args:
        paths: the text files, at least one.

    Returns:
        (text, descriptions): the joined text, and one dict per file for a
        manifest with keys "name" (the file name without directories), "bytes"
        (size on disk), "sha256" (hex digest of the raw bytes) and "lines"
        (newline-terminated lines, plus one for an unterminated last line).

    Raises:
        CompressError: no paths; a file that is missing, a directory, unreadable,
            not UTF-8 (the message names the byte offset), empty or whitespace-only.
    """
    if isinstance(paths, (str, Path)):
        paths = [paths]
    if not paths:
        raise CompressError("no text files given; name at least one UTF-8 text file")
    texts, descs = [], []
    for path in paths:
        text, desc = _read_one(path)
        texts.append(text)
        descs.append(desc)
    return "\n\n".join(texts), descs


def read_lines(path: str | Path) -> list[str]:
    """Read a UTF-8 text file as one item per line (e.g. sentences to embed).

    Args:
        path: the text file.

    Returns:
        The lines with surrounding whitespace stripped, empty lines left out,
        in file order.

    Raises:
        CompressError: as `read_texts` for the one file.
    """
    text, _ = _read_one(path)
    # splitlines() also splits on \r\n and \r, so Windows line ends leave no stray \r
    return [line.strip() for line in text.splitlines() if line.strip()]


def split_sentences(text: str, max_chars: int = SENTENCE_CHARS) -> list[str]:
    """The sentences of a text for an encoder, in text order.

    A text without a blank line is one sentence per line. Otherwise each paragraph (lines between blank lines,
    joined with single spaces, as hard-wrapped prose) is one item, and a paragraph longer than `max_chars` is
    cut at sentence ends into pieces of at most `max_chars` (a single longer sentence stays whole).

    Example: "A b.\nC d." → ["A b.", "C d."]; "A b\nc. D e.\n\nF." with max_chars=5 → ["A b c.", "D e.", "F."].
    """
    lines = [ln.strip() for ln in text.splitlines()]
    if all(lines):
        return [ln for ln in lines if ln]
    paragraphs = " ".join(ln if ln else "\n" for ln in lines).split("\n")
    out = []
    for para in paragraphs:
        para = " ".join(para.split())
        if not para:
            continue
        piece = ""
        for sent in _SENTENCE_END.split(para) if len(para) > max_chars else [para]:
            if piece and len(piece) + 1 + len(sent) > max_chars:
                out.append(piece)
                piece = sent
            else:
                piece = f"{piece} {sent}" if piece else sent
        out.append(piece)
    return out


def read_sentences(paths: list[str | Path]) -> tuple[list[str], list[dict]]:
    """The sentences (`split_sentences`) of each text file in turn, and the files' descriptions (`read_texts`).

    Raises:
        CompressError: as `read_texts`.
    """
    if isinstance(paths, (str, Path)):
        paths = [paths]
    _, described = read_texts(paths)
    out = []
    for path in paths:
        out.extend(split_sentences(_read_one(path)[0]))
    return out, described


def token_blocks(ids: list[int] | torch.Tensor, context: int, *, source: str, option: str = "--context") -> torch.Tensor:
    """Cut a token id sequence into non-overlapping blocks of `context` tokens.

    The tail that does not fill a whole block is dropped.

    Args:
        ids: token ids, a list or a 1-D integer tensor `(n_tokens,)`.
        context: tokens per block, positive.
        source: what the ids came from (a file name or corpus name), for messages.
        option: the command-line option that sets `context`, named in messages.

    Returns:
        blocks: `(n_blocks, context)` int64, a fresh tensor (not a view of `ids`),
        where n_blocks = n_tokens // context.

    Raises:
        CompressError: `context` not positive; `ids` not a 1-D integer
            sequence; fewer than `context` tokens.
    """
    if isinstance(context, bool) or not isinstance(context, int) or context <= 0:
        raise CompressError(f"{option}: must be a positive number of tokens, got {context!r}")
    if isinstance(ids, torch.Tensor):
        if ids.dim() != 1:
            raise CompressError(f"{source}: token ids must be one sequence (1-D), got shape {tuple(ids.shape)}")
        if ids.dtype.is_floating_point or ids.dtype.is_complex or ids.dtype == torch.bool:
            raise CompressError(f"{source}: token ids must be integers, got {ids.dtype}")
        flat = ids.to(torch.long)  # (n_tokens,)
    else:
        flat = torch.tensor(list(ids), dtype=torch.long)  # (n_tokens,)
        if flat.dim() != 1:
            raise CompressError(f"{source}: token ids must be one flat list of integers")
    n = flat.numel()
    n_blocks = n // context
    if n_blocks < 1:
        raise CompressError(
            f"{source}: {n} tokens is shorter than one block of {context}; give more text or a smaller {option}")
    # clone so later in-place edits of the blocks never reach the caller's ids
    return flat[: n_blocks * context].reshape(n_blocks, context).clone()  # (n_blocks, context)
