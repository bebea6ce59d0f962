"""Text input (read_texts, read_lines, token_blocks) and the reference corpora."""
import hashlib
from pathlib import Path

import pytest
import torch

from attncompress import corpora
from attncompress.errors import CompressError
from attncompress.texts import read_lines, read_texts, token_blocks

HAVE_LICENSES = all((corpora.LICENSE_DIR / n).is_file() for n in corpora.LICENSE_FILES)
needs_licenses = pytest.mark.skipif(not HAVE_LICENSES, reason="no /usr/share/common-licenses on this machine")


def _write(path: Path, data: bytes) -> Path:
    """Write raw bytes and return the path."""
    path.write_bytes(data)
    return path


# --- read_texts -------------------------------------------------------------------------------

def test_read_texts_joins_and_describes(tmp_path):
    a = _write(tmp_path / "a.txt", b"first line\nsecond line\n")
    b = _write(tmp_path / "b.txt", "caf\u00e9 au lait".encode("utf-8"))  # no final newline
    text, descs = read_texts([a, str(b)])
    # the joining rule is the spec: files as on disk, "\n\n" between them
    assert text == "first line\nsecond line\n" + "\n\n" + "caf\u00e9 au lait"
    assert [d["name"] for d in descs] == ["a.txt", "b.txt"]
    # sizes and digests checked against the file system and hashlib, not our own bookkeeping
    assert descs[0]["bytes"] == a.stat().st_size == 23  # 11 + 12 bytes
    assert descs[1]["bytes"] == b.stat().st_size == 13  # "é" is two bytes in UTF-8 (RFC 3629)
    assert descs[0]["sha256"] == hashlib.sha256(a.read_bytes()).hexdigest()
    assert descs[1]["sha256"] == hashlib.sha256(b.read_bytes()).hexdigest()
    # two terminated lines; one unterminated line
    assert descs[0]["lines"] == 2 and descs[1]["lines"] == 1


def test_read_texts_drops_a_byte_order_mark(tmp_path):
    p = _write(tmp_path / "bom.txt", b"\xef\xbb\xbfhello\n")  # EF BB BF is the UTF-8 BOM (Unicode ch. 23.8)
    text, descs = read_texts([p])
    assert text == "hello\n"
    assert descs[0]["bytes"] == 9  # the description still counts the bytes on disk


def test_read_texts_missing(tmp_path):
    p = tmp_path / "nope.txt"
    with pytest.raises(CompressError) as e:
        read_texts([p])
    assert str(e.value) == f"{p}: no such text file"


def test_read_texts_directory(tmp_path):
    with pytest.raises(CompressError) as e:
        read_texts([tmp_path])
    assert str(e.value) == f"{tmp_path}: is a directory, not a text file; name the file inside it"


def test_read_texts_unreadable(tmp_path, monkeypatch):
    p = _write(tmp_path / "locked.txt", b"secret\n")

    def refuse(self):
        raise PermissionError(13, "Permission denied", str(self))

    # tests often run as root, where chmod 000 does not stop reading; fake the refusal instead
    monkeypatch.setattr(Path, "read_bytes", refuse)
    with pytest.raises(CompressError) as e:
        read_texts([p])
    assert str(e.value) == f"{p}: cannot read the text file (Permission denied); check that it is readable"


@pytest.mark.parametrize("data, offset", [
    (b"abc\xffdef", 3),  # 0xFF never occurs in UTF-8 (RFC 3629 section 1)
    ("a\u00e9".encode("utf-8") + b"\xe2\x82", 3),  # a (1 byte) + é (2 bytes), then a cut-off 3-byte sequence
    (b"\x80", 0),  # a continuation byte cannot start a character (RFC 3629 section 3)
    ("ok\n".encode("latin-1") + "na\u00efve".encode("latin-1"), 5),  # latin-1 ï is the lone byte 0xEF at 3+2
])
def test_read_texts_not_utf8(tmp_path, data, offset):
    p = _write(tmp_path / "latin.txt", data)
    with pytest.raises(CompressError) as e:
        read_texts([p])
    assert str(e.value) == f"{p}: not UTF-8 text (invalid byte at offset {offset}); save it as UTF-8"


def test_read_texts_empty(tmp_path):
    p = _write(tmp_path / "empty.txt", b"")
    with pytest.raises(CompressError) as e:
        read_texts([p])
    assert str(e.value) == f"{p}: empty text file; give a file with some text in it"


def test_read_texts_whitespace_only(tmp_path):
    p = _write(tmp_path / "blank.txt", b" \n\t\r\n  \n")
    with pytest.raises(CompressError) as e:
        read_texts([p])
    assert str(e.value) == f"{p}: only whitespace, no text; give a file with some text in it"


def test_read_texts_needs_a_path():
    with pytest.raises(CompressError) as e:
        read_texts([])
    assert str(e.value) == "no text files given; name at least one UTF-8 text file"


def test_read_texts_error_names_the_bad_file_among_good(tmp_path):
    good = _write(tmp_path / "good.txt", b"fine\n")
    bad = tmp_path / "missing.txt"
    with pytest.raises(CompressError) as e:
        read_texts([good, bad])
    assert str(e.value) == f"{bad}: no such text file"


# --- read_lines -------------------------------------------------------------------------------

def test_read_lines_strips_and_skips_blank(tmp_path):
    p = _write(tmp_path / "s.txt", b"  one  \r\n\r\ntwo\n   \n\tthree\n")
    assert read_lines(p) == ["one", "two", "three"]


def test_read_lines_same_errors(tmp_path):
    with pytest.raises(CompressError) as e:
        read_lines(tmp_path / "gone.txt")
    assert str(e.value) == f"{tmp_path / 'gone.txt'}: no such text file"
    p = _write(tmp_path / "blank.txt", b"\n\n")
    with pytest.raises(CompressError) as e:
        read_lines(p)
    assert str(e.value) == f"{p}: only whitespace, no text; give a file with some text in it"


# --- token_blocks -----------------------------------------------------------------------------

def test_token_blocks_cuts_and_drops_tail():
    ids = list(range(100, 111))  # 11 tokens
    blocks = token_blocks(ids, 4, source="t.txt")
    # row-major reshape of the first 8 ids, compared with torch's own arange/reshape
    assert blocks.dtype == torch.long and blocks.shape == (2, 4)
    assert torch.equal(blocks, torch.arange(100, 108).reshape(2, 4))


def test_token_blocks_tensor_input_is_not_aliased():
    ids = torch.arange(12, dtype=torch.int32)
    blocks = token_blocks(ids, 6, source="t")
    assert blocks.dtype == torch.long and torch.equal(blocks, torch.arange(12).reshape(2, 6))
    blocks[0, 0] = 999
    assert ids[0].item() == 0  # editing the blocks must not change the caller's ids


def test_token_blocks_exactly_one_block():
    assert token_blocks([7, 8, 9], 3, source="t").tolist() == [[7, 8, 9]]


@pytest.mark.parametrize("n", [0, 1, 127])
def test_token_blocks_too_short(n):
    with pytest.raises(CompressError) as e:
        token_blocks(list(range(n)), 128, source="notes.txt")
    assert str(e.value) == (f"notes.txt: {n} tokens is shorter than one block of 128; "
                            "give more text or a smaller --context")


@pytest.mark.parametrize("context", [0, -4])
def test_token_blocks_bad_context(context):
    with pytest.raises(CompressError) as e:
        token_blocks([1, 2, 3], context, source="t")
    assert str(e.value) == f"--context: must be a positive number of tokens, got {context}"


def test_token_blocks_rejects_2d_and_float():
    with pytest.raises(CompressError) as e:
        token_blocks(torch.zeros(2, 3, dtype=torch.long), 3, source="t")
    assert str(e.value) == "t: token ids must be one sequence (1-D), got shape (2, 3)"
    with pytest.raises(CompressError) as e:
        token_blocks(torch.zeros(6), 3, source="t")
    assert str(e.value) == "t: token ids must be integers, got torch.float32"


# --- corpora ----------------------------------------------------------------------------------

def test_pydoc_split_is_disjoint_and_complete():
    from pydoc_data.topics import topics  # the standard library's own table, the outside reference
    cal = corpora.pydoc_topic_names("calibration")
    held = corpora.pydoc_topic_names("heldout")
    assert cal and held
    assert not set(cal) & set(held)
    assert sorted(cal + held) == sorted(topics)
    # alternate dealing keeps the two halves within one topic of each other in count
    assert abs(len(cal) - len(held)) <= 1


def test_pydoc_text_holds_its_own_topics_only():
    from pydoc_data.topics import topics
    cal_text = corpora.pydoc_text("calibration")
    held_text = corpora.pydoc_text("heldout")
    # long topics are unlikely to appear by chance inside the other part's text
    for name in corpora.pydoc_topic_names("heldout"):
        body = topics[name].strip("\n")
        assert body in held_text
        if len(body) > 2000:
            assert body not in cal_text, name


def test_pydoc_text_is_deterministic_and_truncates():
    a = corpora.pydoc_text("heldout")
    assert a == corpora.pydoc_text("heldout")
    assert corpora.pydoc_text("heldout", max_chars=1000) == a[:1000]
    assert len(corpora.pydoc_text("calibration", 500)) == 500


def test_pydoc_bad_part_and_max_chars():
    with pytest.raises(CompressError) as e:
        corpora.pydoc_text("train")
    assert str(e.value) == "pydoc corpus: unknown part 'train'; expected one of calibration, heldout"
    with pytest.raises(CompressError) as e:
        corpora.pydoc_text("heldout", max_chars=0)
    assert str(e.value) == "max_chars: must be a positive number of characters or None, got 0"


@needs_licenses
def test_license_text_is_the_three_files_in_order():
    text = corpora.license_text()
    assert text == corpora.license_text()  # deterministic
    # compared with the files read directly, not through read_texts
    parts = [(corpora.LICENSE_DIR / n).read_text(encoding="utf-8") for n in ("Apache-2.0", "GPL-3", "MPL-2.0")]
    assert text == "\n\n".join(parts)
    assert corpora.license_text(max_chars=300) == text[:300]


def test_license_text_missing(tmp_path):
    with pytest.raises(CompressError) as e:
        corpora.license_text(directory=tmp_path)
    assert str(e.value) == (f"{tmp_path / 'Apache-2.0'}: no such license file; install the base-files package "
                            "(Debian/Ubuntu) or use another corpus")


def test_corpora_names_and_unknown():
    assert set(corpora.CORPORA) == {"pydoc-calibration", "pydoc-heldout", "licenses"}
    with pytest.raises(CompressError) as e:
        corpora.corpus_text("wiki")
    assert str(e.value) == "corpus: unknown name 'wiki'; expected one of pydoc-calibration, pydoc-heldout, licenses"


def test_write_corpus_round_trip(tmp_path):
    out = tmp_path / "sub" / "held.txt"
    desc = corpora.write_corpus("pydoc-heldout", out, max_chars=5000)
    text, descs = read_texts([out])
    assert text == corpora.pydoc_text("heldout", 5000)
    assert desc["sha256"] == descs[0]["sha256"] == hashlib.sha256(out.read_bytes()).hexdigest()
    assert desc["bytes"] == out.stat().st_size and desc["chars"] == 5000


def test_write_corpus_unwritable(tmp_path):
    blocker = _write(tmp_path / "file", b"x")  # a file where a directory is needed
    with pytest.raises(CompressError) as e:
        corpora.write_corpus("pydoc-heldout", blocker / "out.txt", max_chars=10)
    assert str(e.value).startswith(f"{blocker / 'out.txt'}: cannot write the corpus file (")
    assert str(e.value).endswith("); choose a writable path")


# --- the example texts ------------------------------------------------------------------------

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


def test_example_texts_read_cleanly():
    text, descs = read_texts([EXAMPLES / "calibration.txt"])
    assert descs[0]["bytes"] > 30_000
    lines = read_lines(EXAMPLES / "sentences.txt")
    assert len(lines) >= 100 and len(set(lines)) == len(lines)
