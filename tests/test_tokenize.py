"""Tokenizing: Unicode word tokens, white-space tokens, lower-casing, long-line cutting."""

from __future__ import annotations

import re
import unicodedata
from pathlib import Path

import gensim
import pyarrow as pa
import pytest
from gensim.models.word2vec import LineSentence
from hypothesis import given, settings
from hypothesis import strategies as st

from drift.ingest.tokenize import (
    MAX_LINE_TOKENS,
    split_long_line,
    tokenize,
    tokenize_array,
    tokenize_lines,
)

GENSIM_DATA = Path(gensim.__file__).parent / "test" / "test_data"


def reference_word_tokens(text: str, keep_case: bool = False) -> list[str]:
    """Reference from the Unicode character database (Python's unicodedata): NFC, lower-case,
    then maximal runs of letters (L*), marks (M*), numbers (N*) and connector punctuation (Pc)."""
    text = unicodedata.normalize("NFC", text)
    if not keep_case:
        text = text.lower()
    tokens, current = [], []
    for ch in text:
        category = unicodedata.category(ch)
        if category[0] in "LMN" or category == "Pc":
            current.append(ch)
        elif current:
            tokens.append("".join(current))
            current = []
    if current:
        tokens.append("".join(current))
    return tokens


def _plain_lowercase(ch: str) -> bool:
    """Characters whose lower case is one character of the same kind (Python's full case mapping
    turns a few, such as U+0130, into two characters; Arrow uses the simple mapping)."""
    lower = ch.lower()
    return (
        len(lower) == 1
        and unicodedata.category(lower)[0] == unicodedata.category(ch)[0]
        and ch != "\u03a3"
    )


text_alphabet = st.characters(
    codec="utf-8",
    categories=[
        "Lu",
        "Ll",
        "Lo",
        "Mn",
        "Nd",
        "No",
        "Pc",
        "Pd",
        "Po",
        "Ps",
        "Pe",
        "Sm",
        "So",
        "Zs",
        "Cc",
    ],
    exclude_characters="\n",
).filter(_plain_lowercase)


@settings(max_examples=200, deadline=None)
@given(st.text(text_alphabet, max_size=60))
def test_word_tokens_follow_the_unicode_character_database(text):
    # Reference: unicodedata general categories and NFC (the Unicode Standard, via Python).
    assert tokenize(text) == reference_word_tokens(text)
    assert tokenize(text, keep_case=True) == reference_word_tokens(text, keep_case=True)


@settings(max_examples=300, deadline=None)
@given(st.text(st.characters(codec="utf-8", exclude_characters="\n"), max_size=60))
def test_pretokenized_splits_exactly_like_str_split(text):
    # Reference: Python's str.split(), which splits on Unicode white space (after NFC).
    assert (
        tokenize(text, keep_case=True, pretokenized=True)
        == unicodedata.normalize("NFC", text).split()
    )


def test_matches_gensim_tokenizer_on_real_news_text():
    # gensim.utils.tokenize takes runs of word characters without digits; on the Lee news corpus
    # (gensim's bundled lee_background.cor) with digits blanked out, our tokens must be the same.
    lines = (GENSIM_DATA / "lee_background.cor").read_text(encoding="utf-8").splitlines()
    assert len(lines) > 250
    for line in lines:
        without_digits = re.sub(r"\d", " ", line)
        expected = list(gensim.utils.tokenize(without_digits, lower=True))
        assert tokenize(without_digits) == expected


def test_nfc_composes_and_lowercases():
    assert tokenize("Cafe\u0301 CAFÉ caf\u00e9") == ["café", "café", "café"]
    assert tokenize("\u212b") == ["å"]  # ANGSTROM SIGN is NFC-equal to LATIN CAPITAL A WITH RING
    assert tokenize("Don’t “stop” — now…", keep_case=True) == ["Don", "t", "stop", "now"]
    assert tokenize("snake_case x½ नमस्ते") == ["snake_case", "x½", "नमस्ते"]


def test_pretokenized_keeps_punctuation_and_lowercases_unless_asked():
    assert tokenize("New-York , U.S.A.", pretokenized=True) == ["new-york", ",", "u.s.a."]
    assert tokenize("New-York", pretokenized=True, keep_case=True) == ["New-York"]


def test_lines_of_a_document_are_kept_and_empty_lines_dropped():
    assert tokenize_lines("First line.\n\n  \t \nSecond, line!\r\n") == [
        ["first", "line"],
        ["second", "line"],
    ]


def test_limit_is_gensims_sentence_limit():
    # gensim truncates sentences longer than MAX_WORDS_IN_BATCH words (word2vec.py).
    assert MAX_LINE_TOKENS == gensim.models.word2vec.MAX_WORDS_IN_BATCH


def test_long_lines_are_cut_like_gensim_line_sentence(tmp_path):
    # Reference: gensim's LineSentence cuts lines into consecutive max_sentence_length pieces.
    corpus = (GENSIM_DATA / "head500.noblanks.cor").read_text(encoding="utf-8").splitlines()
    long_line = " ".join(corpus[:12])  # real (stemmed Wikipedia) text, over 20,000 tokens
    assert len(long_line.split()) > 2 * MAX_LINE_TOKENS
    path = tmp_path / "long.txt"
    path.write_text(long_line + "\n", encoding="utf-8")
    expected = list(LineSentence(str(path)))
    assert tokenize_lines(long_line, pretokenized=True) == expected
    assert all(len(piece) <= MAX_LINE_TOKENS for piece in expected)


def test_split_long_line():
    assert split_long_line(list("abcde"), 2) == [["a", "b"], ["c", "d"], ["e"]]
    assert split_long_line(list("ab"), 2) == [["a", "b"]]


def test_tokenize_array_reports_lines_documents_and_counts():
    result = tokenize_array(pa.array(["Alpha beta", None, "", "!!", "gamma\ndelta epsilon"]))
    assert result.lines.to_pylist() == ["alpha beta", "gamma", "delta epsilon"]
    assert result.doc_index.tolist() == [0, 4, 4]
    assert result.token_counts.tolist() == [2, 1, 2]
    assert result.tokens.to_pylist() == ["alpha", "beta", "gamma", "delta", "epsilon"]
    assert result.tokens_per_document(5).tolist() == [2, 0, 0, 0, 3]


def test_tokenize_array_cuts_long_lines_and_keeps_document_order():
    result = tokenize_array(pa.array(["a b c d e", "f g"]), max_tokens=2)
    assert result.lines.to_pylist() == ["a b", "c d", "e", "f g"]
    assert result.doc_index.tolist() == [0, 0, 0, 1]
    assert result.token_counts.tolist() == [2, 2, 1, 2]


@pytest.mark.parametrize("text", ["", " ", "\n\n", "—…“”"])
def test_texts_without_tokens(text):
    assert tokenize(text) == []
    assert tokenize_lines(text) == []
