"""GGUF metadata as plain Python values, and the tokenizer stored in it.

The tokenizer built here reproduces the ids of transformers' own GGUF loading
(`AutoTokenizer.from_pretrained(dir, gguf_file=name)`) for byte-level BPE
("gpt2") vocabularies, with one deliberate difference: a BOS token is added
only when the file says `tokenizer.ggml.add_bos_token = True`, where
transformers adds one for every llama-architecture file.
"""
from __future__ import annotations

import gguf
import tokenizers
from tokenizers import AddedToken, decoders, models, pre_tokenizers, processors

from attncompress.errors import CompressError

_CONTROL = 3  # gguf.TokenType.CONTROL: special tokens such as <|im_start|>


def read_metadata(reader: gguf.GGUFReader) -> dict[str, object]:
    """Read every metadata field of a GGUF file as a plain Python value.

    Args:
        reader: an open `gguf.GGUFReader`.

    Returns:
        field name -> value: `str` for strings, `int` / `float` / `bool` for
        scalars, `list` for arrays. The header pseudo-fields
        (`GGUF.version`, `GGUF.tensor_count`, `GGUF.kv_count`) are included
        because the reader lists them as fields.
    """
    # contents() already decodes strings and turns numpy scalars/arrays into
    # Python ints, floats, bools and lists.
    return {name: field.contents() for name, field in reader.fields.items()}


def tokenizer_from_gguf(meta: dict, path: str) -> tokenizers.Tokenizer:
    """Build a `tokenizers.Tokenizer` from the vocabulary in GGUF metadata.

    Only byte-level BPE (`tokenizer.ggml.model == "gpt2"`) is supported.
    Pre-tokenisation is GPT-2's regex (`ByteLevel(use_regex=True)`) whatever
    `tokenizer.ggml.pre` says, because that is what transformers' GGUF loading
    does; llama.cpp's "smollm" pre-tokeniser also splits every digit first,
    which gives different ids for whitespace runs before digits.

    Args:
        meta: the output of `read_metadata`.
        path: the GGUF file, used only in error messages.

    Returns:
        the tokenizer; control tokens (`tokenizer.ggml.token_type == 3`) are
        special tokens; BOS is prepended only if
        `tokenizer.ggml.add_bos_token` is True (missing means False).

    Raises:
        CompressError: the tokenizer model is not "gpt2", the tokens or merges
            are missing, or BOS is requested without a BOS id.
    """
    name = meta.get("tokenizer.ggml.model")
    if name != "gpt2":
        raise CompressError(f"{path}: GGUF tokenizer model {name!r} is not supported; expected 'gpt2'")
    tokens = meta.get("tokenizer.ggml.tokens")
    if not tokens:
        raise CompressError(f"{path}: GGUF metadata has no tokenizer.ggml.tokens; expected the vocabulary "
                            "of a byte-level BPE tokenizer (re-export the file with its tokenizer)")
    merges = meta.get("tokenizer.ggml.merges")
    if not merges:
        raise CompressError(f"{path}: GGUF metadata has no tokenizer.ggml.merges; expected the merge list "
                            "of a byte-level BPE tokenizer (re-export the file with its tokenizer)")

    vocab = {tok: i for i, tok in enumerate(tokens)}  # a repeated token keeps its last id, as in transformers
    unk_id = meta.get("tokenizer.ggml.unknown_token_id")
    bpe = models.BPE(
        vocab=vocab,
        merges=[_split_merge(m, path) for m in merges],
        unk_token=tokens[unk_id] if unk_id is not None and 0 <= unk_id < len(tokens) else None,
        fuse_unk=True,
    )
    tok = tokenizers.Tokenizer(bpe)
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False, trim_offsets=False, use_regex=True)
    tok.decoder = decoders.ByteLevel()
    tok.add_special_tokens([AddedToken(tokens[i], normalized=False, special=True)
                            for i in _special_ids(meta, len(tokens))])

    if meta.get("tokenizer.ggml.add_bos_token", False):
        bos_id = meta.get("tokenizer.ggml.bos_token_id")
        if bos_id is None or not 0 <= bos_id < len(tokens):
            raise CompressError(f"{path}: tokenizer.ggml.add_bos_token is True but tokenizer.ggml.bos_token_id "
                                f"is {bos_id!r}; expected a token id below {len(tokens)}")
        bos = tokens[bos_id]
        tok.post_processor = processors.TemplateProcessing(
            single=f"{bos}:0 $A:0", pair=f"{bos}:0 $A:0 $B:1", special_tokens=[(bos, bos_id)])
    return tok


def _split_merge(merge: str, path: str) -> tuple[str, str]:
    """Split one "left right" merge rule into its two halves."""
    parts = merge.split(" ")
    if len(parts) != 2:
        raise CompressError(f"{path}: GGUF merge rule {merge!r} is not of the form 'left right'")
    return parts[0], parts[1]


def _special_ids(meta: dict, n_tokens: int) -> list[int]:
    """Ids of the control tokens; BOS/EOS/UNK when the file has no token types."""
    types = meta.get("tokenizer.ggml.token_type")
    if types is not None:
        return [i for i, t in enumerate(types) if t == _CONTROL]
    keys = ("tokenizer.ggml.unknown_token_id", "tokenizer.ggml.bos_token_id", "tokenizer.ggml.eos_token_id")
    return sorted({meta[k] for k in keys if meta.get(k) is not None and meta[k] < n_tokens})
