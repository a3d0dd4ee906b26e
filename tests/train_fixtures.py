"""Run folders for the train-stage tests, written directly per the run-folder contract.

The text is real: gensim's bundled corpora in gensim/test/test_data (the Lee background corpus,
lee_background.cor, 300 news documents; lee.cor; and a shortened English Wikipedia dump read with
gensim's WikiCorpus). A run folder here holds what the slice stage writes and the train stage
reads (DEVELOPERS.md): slices/<label>.txt (one line per sentence or piece, tokens separated by one
space), slices/summary.csv and run.json with stages.slice.labels.
"""

from __future__ import annotations

import random
import shutil
from collections import Counter
from pathlib import Path

import pandas as pd
from gensim.test.utils import datapath
from gensim.utils import simple_preprocess

from drift import runfolder

#: gensim's bundled Lee background corpus (real news text, 300 documents).
LEE_BACKGROUND = "lee_background.cor"
#: gensim's bundled shortened English Wikipedia dump (106 articles).
ENWIKI_DUMP = "enwiki-latest-pages-articles1.xml-p000000010p000030302-shortened.bz2"
#: Longest line written to a slice file; the contract allows under 10,000 tokens.
PIECE_TOKENS = 1000


def corpus_lines(name: str) -> list[str]:
    """Documents of a bundled gensim corpus file, tokenized, one space-joined line each."""
    with open(datapath(name), encoding="latin-1") as handle:  # the Lee files are not UTF-8
        docs = [simple_preprocess(line) for line in handle]
    return [" ".join(tokens) for tokens in docs if tokens]


def wiki_lines() -> list[str]:
    """The bundled Wikipedia dump as tokenized lines of at most PIECE_TOKENS tokens."""
    from gensim.corpora import WikiCorpus

    corpus = WikiCorpus(datapath(ENWIKI_DUMP), dictionary={}, processes=1)
    lines = []
    for tokens in corpus.get_texts():
        for start in range(0, len(tokens), PIECE_TOKENS):
            lines.append(" ".join(tokens[start : start + PIECE_TOKENS]))
    return lines


def make_run(root: Path, slices: dict[str, list[str]]) -> Path:
    """A run folder holding ``slices`` (label -> lines, in time order) as the slice stage would."""
    root = Path(root)
    paths = runfolder.prepare_run_folder(root)
    rows = []
    for number, (label, lines) in enumerate(slices.items()):
        runfolder.write_text_atomic(paths.slice_file(label), "".join(f"{line}\n" for line in lines))
        words = [word for line in lines for word in line.split()]
        year = 2001 + number
        rows.append({"label": label, "start": f"{year}-01-01", "end": f"{year}-12-31",
                     "documents": len(lines), "tokens": len(words), "types": len(set(words)),
                     "dropped": 0})
    runfolder.write_table(root, "summary", pd.DataFrame(rows))
    runfolder.record_stage(root, "slice", {"by": "test"}, "test", 0.0, {"labels": list(slices)})
    return root


def lee_run(root: Path, n_slices: int = 3) -> Path:
    """The Lee background corpus cut into ``n_slices`` consecutive slices labelled 2001, ..."""
    lines = corpus_lines(LEE_BACKGROUND)
    size = -(-len(lines) // n_slices)
    slices = {str(2001 + i): lines[i * size : (i + 1) * size] for i in range(n_slices)}
    return make_run(root, slices)


def copy_run(source: Path, target: Path) -> Path:
    """A copy of a run folder (slice files keep their times, so fingerprints still match)."""
    shutil.copytree(source, target)
    return target


def permuted_vocabulary(lines: list[str], seed: int, min_count: int) -> list[str]:
    """The same text with every word consistently replaced by another word (a random bijection).

    Words seen at least ``min_count`` times are permuted among themselves and rarer words among
    themselves, so the trained vocabulary keeps its size while each word loses its contexts.
    """
    counts = Counter(word for line in lines for word in line.split())
    rng = random.Random(seed)
    mapping: dict[str, str] = {}
    frequent = [word for word in counts if counts[word] >= min_count]
    rare = [word for word in counts if counts[word] < min_count]
    for group in (frequent, rare):
        shuffled = group[:]
        rng.shuffle(shuffled)
        mapping.update(zip(group, shuffled, strict=True))
    return [" ".join(mapping[word] for word in line.split()) for line in lines]
