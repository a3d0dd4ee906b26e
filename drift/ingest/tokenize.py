"""Tokens: Unicode word tokens (or white-space separated ones), lower-cased by default.

A *token* is a maximal run of letters, combining marks, digits and connector punctuation (Unicode
categories L*, M*, N* and Pc, so ``_`` too); everything else separates tokens. With
``pretokenized`` a token is any maximal run of characters that are not white space (exactly
Python's ``str.split()``). Text is NFC-normalised before it is cut, and lower-cased unless
``keep_case`` is set.

Each line of a document becomes one output line; a line longer than :data:`MAX_LINE_TOKENS`
tokens is cut into consecutive pieces of that size (the last piece holds the rest), which is how
gensim's own ``LineSentence`` reader cuts long sentences.

The work is done on whole Arrow arrays of documents (:func:`tokenize_array`), with Arrow's
compute kernels and one byte-level translation, so that gigabytes stream through at tens of MB/s;
:func:`tokenize` is the same code applied to one string.
"""

from __future__ import annotations

import functools
import unicodedata
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

#: Longest line written to a slice file: gensim's ``MAX_WORDS_IN_BATCH`` (10,000); gensim
#: silently truncates longer sentences, so longer lines are cut into pieces of this size.
MAX_LINE_TOKENS = 10_000


def _translation(keep: Callable[[str], bool]) -> bytes:
    """A 256-byte table for bytes.translate: ASCII bytes that ``keep`` rejects become a space.

    Bytes from 0x80 up (parts of multi-byte UTF-8 characters) and the newline are never changed,
    so the translation keeps UTF-8 valid and keeps line breaks.
    """
    return bytes(c if c >= 0x80 or c == 0x0A or keep(chr(c)) else 0x20 for c in range(256))


#: ASCII word characters (letters, digits, underscore) are kept; other ASCII bytes become spaces.
_WORD_TABLE = _translation(lambda ch: ch.isalnum() or ch == "_")
#: ASCII white space becomes a plain space; everything else is kept.
_SPACE_TABLE = _translation(lambda ch: not ch.isspace())
#: Non-ASCII characters that separate word tokens (RE2 syntax, applied only to non-ASCII lines).
_NON_ASCII_NON_WORD = r"[^\x00-\x7f\p{L}\p{M}\p{N}\p{Pc}]+"
#: Non-ASCII characters that Python's str.isspace() calls white space: NEL and categories Z*.
_NON_ASCII_SPACE = r"[\x{85}\p{Z}]+"


@dataclass(frozen=True)
class TokenizedLines:
    """The tokenized lines of a batch of documents, in document order.

    ``lines[i]`` holds the tokens of line ``i`` joined by one space, ``doc_index[i]`` the
    position of the document it came from, ``token_counts[i]`` its number of tokens; ``tokens``
    holds every token, line after line. Documents without any token have no line.
    """

    lines: pa.StringArray
    doc_index: np.ndarray
    token_counts: np.ndarray
    tokens: pa.StringArray

    def tokens_per_document(self, n_documents: int) -> np.ndarray:
        """Number of tokens of each of the ``n_documents`` input documents."""
        return np.bincount(self.doc_index, weights=self.token_counts, minlength=n_documents).astype(
            np.int64
        )


def _as_plain_strings(texts: pa.Array | pa.ChunkedArray) -> pa.StringArray:
    """One contiguous ``string`` array without nulls (a null text is an empty text)."""
    if isinstance(texts, pa.ChunkedArray):
        texts = texts.combine_chunks() if texts.num_chunks else pa.array([], pa.string())
    if pa.types.is_dictionary(texts.type):
        texts = texts.dictionary_decode()
    if not pa.types.is_string(texts.type):
        texts = texts.cast(pa.string())
    if texts.null_count:
        texts = pc.fill_null(texts, "")
    return texts


def _translate(texts: pa.StringArray, table: bytes) -> pa.StringArray:
    """Apply a byte translation table to every string (lengths and offsets are unchanged)."""
    validity, offsets, data = texts.buffers()
    if data is None or len(texts) == 0:
        return texts
    translated = pa.py_buffer(data.to_pybytes().translate(table))
    return pa.StringArray.from_buffers(
        len(texts), offsets, translated, validity, texts.null_count, texts.offset
    )


def _is_all_ascii(texts: pa.StringArray) -> bool:
    return len(texts) == 0 or bool(pc.all(pc.string_is_ascii(texts)).as_py())


def _cut_long_lines(token_lists: pa.ListArray, doc_index: np.ndarray, max_tokens: int):
    """Cut lines longer than ``max_tokens`` into consecutive pieces of ``max_tokens`` tokens."""
    counts = pc.list_value_length(token_lists).to_numpy(zero_copy_only=False).astype(np.int64)
    if len(counts) == 0 or counts.max() <= max_tokens:
        return token_lists, doc_index, counts
    pieces = np.maximum(1, -(-counts // max_tokens))
    new_counts = np.repeat(np.minimum(counts, max_tokens), pieces)
    ends = np.cumsum(pieces)
    for line in np.flatnonzero(pieces > 1):  # rare: only documents with very long lines
        n, k = counts[line], pieces[line]
        new_counts[ends[line] - k : ends[line]] = [max_tokens] * (k - 1) + [
            n - max_tokens * (k - 1)
        ]
    offsets = np.zeros(len(new_counts) + 1, dtype=np.int32)
    np.cumsum(new_counts, out=offsets[1:])
    flat = pc.list_flatten(token_lists)
    return (
        pa.ListArray.from_arrays(pa.array(offsets), flat),
        np.repeat(doc_index, pieces),
        new_counts,
    )


_nfc_pattern: str | None = None
#: Ranges where no character has a canonical decomposition (CJK unified ideographs, Hangul
#: syllables, which NFC leaves alone, surrogates and private use); nothing above U+2FA1F has one.
_NO_DECOMPOSITION = (
    (0x3400, 0x4DBF),
    (0x4E00, 0x9FFF),
    (0xAC00, 0xD7A3),
    (0xD800, 0xF8FF),
    (0x20000, 0x2F7FF),
)
_LAST_DECOMPOSABLE = 0x2FA1F


def _codes_with_decompositions() -> list[int]:
    """Non-ASCII code points outside the ranges known to hold no canonical decomposition."""
    codes = []
    start = 0x80
    for low, high in _NO_DECOMPOSITION:
        codes.extend(range(start, low))
        start = high + 1
    codes.extend(range(start, _LAST_DECOMPOSABLE + 1))
    return codes


def _nfc_trigger_pattern() -> str:
    """RE2 class of the characters that can make a text not NFC: marks (\\p{M}), Hangul jamo,
    and every character that NFC maps to something else (found once per process via
    unicodedata, about half a second, and only when non-ASCII text turns up)."""
    global _nfc_pattern
    if _nfc_pattern is None:
        _nfc_pattern = "[\\p{M}" + _nfc_letters() + "]"
    return _nfc_pattern


@functools.lru_cache(maxsize=1)
def _nfc_letters() -> str:
    """RE2 class items for Hangul jamo and the characters that NFC changes."""
    changed = [
        code
        for code in _codes_with_decompositions()
        if unicodedata.normalize("NFC", chr(code)) != chr(code)
    ]
    return r"\x{1100}-\x{11ff}" + "".join(f"\\x{{{code:x}}}" for code in changed)


#: Blocks whose plain letters (category L, unchanged by NFC) take the fast path: Latin, Greek,
#: Cyrillic, Armenian, Hebrew, kana, CJK ideographs and Hangul syllables.
_PLAIN_BLOCKS = (
    (0x80, 0x58F),
    (0x5D0, 0x5EA),
    (0x3041, 0x30FF),
    (0x4E00, 0x9FFF),
    (0xAC00, 0xD7A3),
)


@functools.lru_cache(maxsize=1)
def _unusual_pattern() -> str:
    """RE2 class of the non-ASCII characters that are not plain letters of the common blocks:
    separators, marks, digits, symbols, letters that NFC changes, other scripts. A text without
    them (e.g. plain accented words) needs neither NFC nor the Unicode separator pass. The class
    is explicit ranges (no \\p{..}) so that it compiles in well under a millisecond."""
    ranges = []
    for low, high in _PLAIN_BLOCKS:
        start = None
        for code in range(low, high + 2):
            ch = chr(code)
            plain = (
                code <= high
                and unicodedata.category(ch)[0] == "L"
                and unicodedata.normalize("NFC", ch) == ch
            )
            if plain and start is None:
                start = code
            elif not plain and start is not None:
                ranges.append(f"\\x{{{start:x}}}-\\x{{{code - 1:x}}}")
                start = None
    return "[^\\x00-\\x7f" + "".join(ranges) + "]"


def tokenize_array(
    texts: pa.Array | pa.ChunkedArray,
    keep_case: bool = False,
    pretokenized: bool = False,
    max_tokens: int = MAX_LINE_TOKENS,
) -> TokenizedLines:
    """Tokenize an Arrow array of documents into lines of tokens (see the module docstring)."""
    texts = _as_plain_strings(texts)
    ascii_only = _is_all_ascii(texts)
    unusual = None  # documents with characters that need the Unicode passes
    if not ascii_only:
        unusual = pc.match_substring_regex(texts, _unusual_pattern())
        if not pc.any(unusual).as_py():
            unusual = None
    if unusual is not None:
        needs_nfc = pc.match_substring_regex(texts, _nfc_trigger_pattern())
        if pc.any(needs_nfc).as_py():
            normalized = pc.utf8_normalize(texts.filter(needs_nfc), "NFC")
            texts = pc.replace_with_mask(texts, needs_nfc, normalized)
    if not keep_case:
        texts = pc.ascii_lower(texts) if ascii_only else pc.utf8_lower(texts)
    texts = _translate(texts, _SPACE_TABLE if pretokenized else _WORD_TABLE)
    split = pc.split_pattern(texts, "\n")
    lines = pc.list_flatten(split)
    doc_index = pc.list_parent_indices(split).to_numpy(zero_copy_only=False).astype(np.int64)
    if unusual is not None:  # non-ASCII separators (curly quotes, dashes, no-break spaces, ...)
        pattern = _NON_ASCII_SPACE if pretokenized else _NON_ASCII_NON_WORD
        line_mask = pa.array(unusual.to_numpy(zero_copy_only=False)[doc_index])
        cleaned = pc.replace_substring_regex(lines.filter(line_mask), pattern, " ")
        lines = pc.replace_with_mask(lines, line_mask, cleaned)
    lines = pc.utf8_trim(lines, " ")
    has_tokens = pc.greater(pc.binary_length(lines), 0)
    if not pc.all(has_tokens).as_py():
        lines = lines.filter(has_tokens)
        doc_index = doc_index[has_tokens.to_numpy(zero_copy_only=False)]
    token_lists = pc.ascii_split_whitespace(lines)
    token_lists, doc_index, counts = _cut_long_lines(token_lists, doc_index, max_tokens)
    if len(token_lists):
        joined = pc.binary_join(token_lists, " ")
        tokens = pc.list_flatten(token_lists)
    else:
        joined = tokens = pa.array([], pa.string())
    return TokenizedLines(lines=joined, doc_index=doc_index, token_counts=counts, tokens=tokens)


def tokenize(text: str, keep_case: bool = False, pretokenized: bool = False) -> list[str]:
    """The tokens of one text, in order (lower-cased unless ``keep_case``)."""
    return tokenize_array(pa.array([text], pa.string()), keep_case, pretokenized).tokens.to_pylist()


def tokenize_lines(
    text: str,
    keep_case: bool = False,
    pretokenized: bool = False,
    max_tokens: int = MAX_LINE_TOKENS,
) -> list[list[str]]:
    """The lines one document becomes in a slice file (long ones cut, empty ones dropped)."""
    result = tokenize_array(pa.array([text], pa.string()), keep_case, pretokenized, max_tokens)
    return [line.split(" ") for line in result.lines.to_pylist()]


def split_long_line(tokens: list[str], max_tokens: int = MAX_LINE_TOKENS) -> list[list[str]]:
    """Cut a token list into consecutive pieces of at most ``max_tokens`` tokens."""
    return [tokens[i : i + max_tokens] for i in range(0, len(tokens), max_tokens)] or [[]]
