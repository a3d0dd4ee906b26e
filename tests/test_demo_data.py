"""The bundled demo archive: it is what its generator writes, and each planted word does what
data_demo/planted.csv says (the demo is invented data; these checks hold it to its own design)."""

from __future__ import annotations

import csv
import gzip
import hashlib
import importlib.util
import io
import json
import re
import sys
from collections import Counter
from pathlib import Path
from types import ModuleType

import pytest

DEMO = Path(__file__).resolve().parents[1] / "data_demo"
ARCHIVE = DEMO / "archive.csv.gz"
WORD = re.compile(r"\w+")  # drift's default tokenization, lower-cased
WINDOW = 5  # the skip-gram window the demo is built for
FIRST_YEAR, LAST_YEAR = 1950, 2009
TRANSITION_YEARS = 3  # a shift word is fully in its new topic three years after its onset


def load_generator() -> ModuleType:
    """data_demo/generate.py as a module (it is a script, not part of the package)."""
    spec = importlib.util.spec_from_file_location("drift_demo_generate", DEMO / "generate.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up here
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def generator() -> ModuleType:
    return load_generator()


@pytest.fixture(scope="module")
def committed_csv() -> bytes:
    return gzip.decompress(ARCHIVE.read_bytes())


@pytest.fixture(scope="module")
def documents(committed_csv: bytes) -> list[tuple[int, list[str]]]:
    """(year, tokens) of every committed document."""
    rows = csv.DictReader(io.StringIO(committed_csv.decode("utf-8")))
    return [(int(row["date"][:4]), WORD.findall(row["text"].lower())) for row in rows]


@pytest.fixture(scope="module")
def planted() -> list[dict[str, str]]:
    with open(DEMO / "planted.csv", encoding="utf-8", newline="") as handle:
        return list(csv.DictReader(handle))


@pytest.fixture(scope="module")
def yearly_counts(documents: list[tuple[int, list[str]]]) -> dict[int, Counter]:
    counts: dict[int, Counter] = {}
    for year, tokens in documents:
        counts.setdefault(year, Counter()).update(tokens)
    return counts


def count_in(yearly: dict[int, Counter], word: str, years: range) -> int:
    return sum(yearly[y][word] for y in years)


def topic_words(generator: ModuleType, name: str) -> set[str]:
    topic = generator.TOPIC_BY_NAME[name]
    return set(topic.nouns) | set(topic.verbs) | set(topic.adjectives)


def context_hits(documents: list[tuple[int, list[str]]], word: str, years: range,
                 vocabularies: dict[str, set[str]]) -> Counter:
    """How many words of each vocabulary stand within WINDOW tokens of ``word`` in ``years``."""
    hits: Counter = Counter()
    for year, tokens in documents:
        if year not in years:
            continue
        for i, token in enumerate(tokens):
            if token != word:
                continue
            for near in tokens[max(0, i - WINDOW):i] + tokens[i + 1:i + 1 + WINDOW]:
                for name, vocabulary in vocabularies.items():
                    if near in vocabulary:
                        hits[name] += 1
    return hits


def share_of(hits: Counter, name: str) -> float:
    total = sum(hits.values())
    assert total > 0, "the word has no topic words around it"
    return hits[name] / total


# ---------------------------------------------------------------------------------------------
# The committed files are the generator's output
# ---------------------------------------------------------------------------------------------


def test_committed_archive_is_what_the_generator_writes(generator, committed_csv):
    # Compared uncompressed: gzip bytes can differ between zlib builds, the CSV cannot.
    regenerated = generator.csv_bytes(generator.generate_rows(generator.SEED))
    assert hashlib.sha256(regenerated).hexdigest() == hashlib.sha256(committed_csv).hexdigest()


def test_planted_csv_is_the_generators_gold_list(generator):
    assert (DEMO / "planted.csv").read_bytes() == generator.planted_csv_bytes()


def test_counts_json_matches_an_independent_count(committed_csv, documents):
    counts = json.loads((DEMO / "counts.json").read_text(encoding="utf-8"))
    assert counts["csv_sha256"] == hashlib.sha256(committed_csv).hexdigest()
    per_decade: dict[str, dict[str, int]] = {}
    for year, tokens in documents:
        bucket = per_decade.setdefault(f"{year // 10 * 10}s", {"documents": 0, "tokens": 0})
        bucket["documents"] += 1
        bucket["tokens"] += len(tokens)
    assert {d: {k: v[k] for k in ("documents", "tokens")} for d, v in
            counts["decades"].items()} == per_decade
    assert counts["all"]["tokens"] == sum(len(tokens) for _, tokens in documents)
    assert counts["all"]["types"] == len({t for _, tokens in documents for t in tokens})
    years = Counter(year for year, _ in documents)
    assert {int(y): v["documents"] for y, v in counts["years"].items()} == dict(years)


def test_generator_word_lists_do_not_overlap(generator):
    assert generator.vocabulary_problems() == []


def test_gzip_output_does_not_depend_on_time_or_path(generator):
    data = b"id,date,source,text\n"
    first = generator.gzip_bytes(data)
    assert first == generator.gzip_bytes(data)
    assert first[4:8] == b"\x00\x00\x00\x00"  # gzip header MTIME field (RFC 1952) is zero
    assert gzip.decompress(first) == data


# ---------------------------------------------------------------------------------------------
# The archive's shape (issue #2: six decades of about 150,000 tokens, at most 5 MB)
# ---------------------------------------------------------------------------------------------


def test_archive_is_small_with_iso_dates_and_the_expected_columns(committed_csv):
    assert ARCHIVE.stat().st_size <= 5 * 1024 * 1024
    rows = list(csv.DictReader(io.StringIO(committed_csv.decode("utf-8"))))
    assert list(rows[0]) == ["id", "date", "source", "text"]
    assert len({row["id"] for row in rows}) == len(rows)
    assert all(re.fullmatch(r"\d{4}-\d{2}-\d{2}", row["date"]) for row in rows)
    assert {int(row["date"][:4]) for row in rows} == set(range(FIRST_YEAR, LAST_YEAR + 1))
    assert {row["source"] for row in rows} == {"gazette", "minutes", "letter"}
    lengths = [len(WORD.findall(row["text"])) for row in rows]
    assert min(lengths) >= 40 and max(lengths) <= 260


def test_every_decade_holds_about_150k_tokens(documents):
    tokens = Counter()
    for year, words in documents:
        tokens[year // 10 * 10] += len(words)
    assert sorted(tokens) == [1950, 1960, 1970, 1980, 1990, 2000]
    for decade, total in tokens.items():
        assert 140_000 <= total <= 160_000, (decade, total)


# ---------------------------------------------------------------------------------------------
# Each planted word does what its kind says
# ---------------------------------------------------------------------------------------------


def test_gold_list_has_the_kinds_the_issue_asks_for(planted):
    kinds = Counter(row["kind"] for row in planted)
    assert kinds["shift"] >= 5 and kinds["frequency"] >= 5 and kinds["emerging"] >= 2
    assert len({row["onset"] for row in planted if row["kind"] == "shift"}) >= 5


def test_shift_words_move_to_their_new_topic_at_a_steady_frequency(
        generator, documents, planted, yearly_counts):
    for row in (r for r in planted if r["kind"] == "shift"):
        word, onset = row["word"], int(row["onset"])
        vocabularies = {name: topic_words(generator, name)
                        for name in (row["from_topic"], row["to_topic"])}
        before = range(FIRST_YEAR, onset)
        after = range(onset + TRANSITION_YEARS, LAST_YEAR + 1)
        hits_before = context_hits(documents, word, before, vocabularies)
        hits_after = context_hits(documents, word, after, vocabularies)
        assert share_of(hits_before, row["from_topic"]) > 0.9, (word, hits_before)
        assert share_of(hits_after, row["to_topic"]) > 0.9, (word, hits_after)
        per_year_before = count_in(yearly_counts, word, before) / len(before)
        per_year_after = count_in(yearly_counts, word, after) / len(after)
        assert 0.75 < per_year_after / per_year_before < 1.33, (word, per_year_before,
                                                                 per_year_after)
        per_decade = [count_in(yearly_counts, word, range(d, d + 10))
                      for d in range(FIRST_YEAR, LAST_YEAR, 10)]
        assert min(per_decade) >= 100, (word, per_decade)


def test_frequency_words_keep_their_topic_and_change_count_sixfold(
        generator, documents, planted, yearly_counts):
    for row in (r for r in planted if r["kind"] == "frequency"):
        word, onset, topic = row["word"], int(row["onset"]), row["from_topic"]
        assert row["to_topic"] == topic
        before = range(FIRST_YEAR, onset)
        after = range(onset + 10, LAST_YEAR + 1)
        rate_before = count_in(yearly_counts, word, before) / len(before)
        rate_after = count_in(yearly_counts, word, after) / len(after)
        ratio = max(rate_before, rate_after) / min(rate_before, rate_after)
        assert ratio >= 5.5, (word, rate_before, rate_after)
        others = {name: topic_words(generator, name) for name in generator.TOPIC_BY_NAME}
        for years in (before, after):
            hits = context_hits(documents, word, years, others)
            assert share_of(hits, topic) > 0.9, (word, years, hits.most_common(3))
        per_decade = [count_in(yearly_counts, word, range(d, d + 10))
                      for d in range(FIRST_YEAR, LAST_YEAR, 10)]
        assert min(per_decade) >= 25, (word, per_decade)  # in every decade's model


def test_emerging_words_are_absent_before_their_onset(planted, yearly_counts):
    for row in (r for r in planted if r["kind"] == "emerging"):
        word, onset = row["word"], int(row["onset"])
        assert count_in(yearly_counts, word, range(FIRST_YEAR, onset)) == 0, word
        later = range(onset + TRANSITION_YEARS, LAST_YEAR + 1)
        assert count_in(yearly_counts, word, later) / len(later) >= 10, word


def test_fading_words_are_absent_five_years_after_their_onset(planted, yearly_counts):
    for row in (r for r in planted if r["kind"] == "fading"):
        word, onset = row["word"], int(row["onset"])
        assert count_in(yearly_counts, word, range(onset + 5, LAST_YEAR + 1)) == 0, word
        earlier = range(FIRST_YEAR, onset)
        assert count_in(yearly_counts, word, earlier) / len(earlier) >= 10, word


# ---------------------------------------------------------------------------------------------
# Words that every topic shares stay out of the topics' contexts
# ---------------------------------------------------------------------------------------------

MINUTES_CLOSING = re.compile(r" The next meeting will be held on the first (\w+) of (\w+)\.$")
LETTER_OPENING = re.compile(r"^Sir, I write as an? (\w+) of this town of many years standing\. ")


def test_day_and_month_names_occur_only_in_the_closing_line_of_minutes(generator, committed_csv):
    """A rare word used beside every topic's words gets a noisy vector; these stay in one phrase."""
    weekdays, months = set(generator.WEEKDAYS), set(generator.MONTHS)
    closings = Counter()
    for row in csv.DictReader(io.StringIO(committed_csv.decode("utf-8"))):
        found = MINUTES_CLOSING.search(row["text"])
        assert (found is not None) == (row["source"] == "minutes"), row["id"]
        text = row["text"]
        if found:
            assert found[1].lower() in weekdays and found[2].lower() in months, found[0]
            closings.update([found[1].lower(), found[2].lower()])
            text = text[:found.start()]
        rest = WORD.findall(text.lower())
        assert not weekdays & set(rest), row["id"]
        # "may" is also the verb of a letter template ("May I ask why ...")
        assert not (months - {"may"}) & set(rest), row["id"]
    assert set(closings) == weekdays | months


def test_general_nouns_occur_only_in_the_opening_line_of_letters(generator, committed_csv):
    general = set(generator.GENERAL_NOUNS)
    for row in csv.DictReader(io.StringIO(committed_csv.decode("utf-8"))):
        found = LETTER_OPENING.search(row["text"])
        assert (found is not None) == (row["source"] == "letter"), row["id"]
        text = row["text"]
        if found:
            assert found[1] in general, found[0]
            text = text[found.end():]
        assert not general & set(WORD.findall(text.lower())), row["id"]


def test_each_place_is_named_among_its_own_topics_words(generator, documents):
    vocabularies = {name: topic_words(generator, name) for name in generator.TOPIC_BY_NAME}
    for topic, place in generator.PLACE_OF_TOPIC.items():
        word = place.split()[-1]
        hits = context_hits(documents, word, range(FIRST_YEAR, LAST_YEAR + 1), vocabularies)
        assert share_of(hits, topic) > 0.9, (place, hits.most_common(3))


def test_words_that_were_not_planted_keep_their_frequency(planted, yearly_counts):
    first = sum((yearly_counts[y] for y in range(1950, 1960)), Counter())
    last = sum((yearly_counts[y] for y in range(2000, 2010)), Counter())
    planted_words = {row["word"] for row in planted}
    common = [w for w, n in first.items() if n >= 100 and w not in planted_words]
    assert len(common) > 200
    moved = {w: (first[w], last[w]) for w in common if not 0.5 <= last[w] / first[w] <= 2.0}
    assert moved == {}
