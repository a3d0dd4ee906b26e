"""Alignment of embedding spaces: unit length, mean centring and orthogonal Procrustes.

Two Word2Vec models of different slices live in arbitrarily rotated coordinate systems. Before
their vectors can be compared, each slice's vectors are prepared (unit length, the mean vector
removed, unit length again, so that cosine similarity is a dot product and the common direction
that skip-gram vectors share does not dominate; the unit-centre-unit recipe is common practice),
then one slice is rotated onto another by the orthogonal matrix that best maps the vectors of
shared anchor words onto each other (orthogonal Procrustes, Schonemann 1966; used for diachronic
embeddings by Hamilton, Leskovec and Jurafsky 2016).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy.linalg import svd

from drift.errors import DriftError
from drift.options import check_anchor_trim

#: Fewer anchors than this cannot fix a rotation at all.
MIN_ANCHORS = 2
#: Refits of an alignment with trimmed anchors (the rotation settles after two or three).
TRIM_ROUNDS = 3

#: What ``--anchors`` may hold once parsed: a number of most frequent shared words, or words.
AnchorSpec = int | Sequence[str] | None


@dataclass
class SliceVectors:
    """One model's vocabulary and prepared vectors (row ``i`` belongs to ``words[i]``)."""

    label: str
    words: list[str]
    vectors: np.ndarray  # float32, n_words x dim, prepared (see prepare_vectors)
    counts: np.ndarray  # int64, the model's count of each word
    index: dict[str, int] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if not self.index:
            self.index = {word: i for i, word in enumerate(self.words)}

    def rows(self, words: Sequence[str]) -> np.ndarray:
        """Row numbers of ``words`` (all of which must be in the vocabulary)."""
        return np.fromiter((self.index[w] for w in words), dtype=np.int64, count=len(words))


def unit_rows(matrix: np.ndarray) -> np.ndarray:
    """``matrix`` with every row scaled to length one (all-zero rows stay zero)."""
    norms = np.linalg.norm(matrix, axis=1, keepdims=True)
    return matrix / np.where(norms > 0, norms, 1.0)


def prepare_vectors(matrix: np.ndarray) -> np.ndarray:
    """Unit-normalise, mean-centre and unit-normalise again; float32 (see the module notes)."""
    matrix = unit_rows(np.asarray(matrix, dtype=np.float64))
    matrix = matrix - matrix.mean(axis=0, keepdims=True)
    return unit_rows(matrix).astype(np.float32)


def procrustes_rotation(source: np.ndarray, target: np.ndarray) -> np.ndarray:
    """The orthogonal ``R`` that minimises ``||source @ R - target||`` (Frobenius norm).

    ``source`` and ``target`` hold the anchor words' vectors row by row in the same order. The
    SVD solution of Schonemann (1966): with ``U S V^T = svd(source^T target)``, ``R = U V^T``.
    The small d x d cross-product is formed from the float32 vectors directly (no float64 copy
    of the anchor matrices) and decomposed in float64.
    """
    cross = np.asarray(source).T @ np.asarray(target)
    left, _, right = svd(cross.astype(np.float64), full_matrices=False)
    return left @ right


def parse_anchors(value: str | int | Sequence[str] | None) -> AnchorSpec:
    """Turn ``--anchors`` into a number of words or a word list.

    A whole number N means the N most frequent shared words; anything else is a path to a UTF-8
    file of anchor words, separated by white space (lines starting with ``#`` are skipped).
    """
    if value is None:
        return None
    if isinstance(value, int):
        if value < MIN_ANCHORS:
            raise DriftError(
                f"--anchors {value} is too few; give at least {MIN_ANCHORS} words "
                "or a word-list file."
            )
        return value
    if not isinstance(value, str | Path):
        words = list(dict.fromkeys(value))
        if len(words) < MIN_ANCHORS:
            raise DriftError(
                f"The anchor list holds {len(words)} words; give at least {MIN_ANCHORS}."
            )
        return words
    text = str(value).strip()
    if text.isdigit():
        return parse_anchors(int(text))
    path = Path(text)
    if not path.is_file():
        raise DriftError(
            f"--anchors {text} is neither a number of words nor an existing word-list file; "
            "give e.g. --anchors 5000 or the path of a file with one anchor word per line."
        )
    try:
        content = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise DriftError(
            f"The anchor file {path} cannot be read as UTF-8 text ({exc.__class__.__name__}); "
            "save it as UTF-8 with one word per line."
        ) from None
    lines = [line for line in content.splitlines() if not line.lstrip().startswith("#")]
    words = [word for line in lines for word in line.split()]
    if len(words) < MIN_ANCHORS:
        raise DriftError(
            f"The anchor file {path} holds {len(words)} words; give at least {MIN_ANCHORS}."
        )
    return list(dict.fromkeys(words))


def anchor_words(
    source: SliceVectors,
    target: SliceVectors,
    anchors: AnchorSpec = None,
) -> list[str]:
    """The anchor words shared by ``source`` and ``target``.

    ``None``: every shared word. A number N: the N shared words with the highest combined model
    count. A word list: those of its words both models know.
    """
    if anchors is None:
        shared = [w for w in target.words if w in source.index]
    elif isinstance(anchors, int):
        shared = [w for w in target.words if w in source.index]
        combined = target.counts[target.rows(shared)] + source.counts[source.rows(shared)]
        order = np.argsort(-combined, kind="stable")[:anchors]
        shared = [shared[i] for i in order]
    else:
        shared = [w for w in anchors if w in source.index and w in target.index]
    if len(shared) < MIN_ANCHORS:
        raise DriftError(
            f"Slices {source.label} and {target.label} share only {len(shared)} anchor words, "
            f"too few to align them; use more anchors or a lower min count when training."
        )
    return shared


def align_onto(
    source: SliceVectors,
    target: SliceVectors,
    anchors: AnchorSpec = None,
    trim: float = 0.0,
) -> np.ndarray:
    """The rotation that carries ``source``'s prepared vectors onto ``target``'s.

    Fitted on the anchor words (see :func:`anchor_words`); apply it as ``source.vectors @ R``.
    With ``trim`` > 0 the fit is repeated ``TRIM_ROUNDS`` times on the anchors that moved least,
    leaving out the ``trim`` share that the previous rotation displaced most, so that words which
    really changed do not pull the rotation towards themselves (iterative anchor trimming).
    """
    trim = check_anchor_trim(trim)
    words = anchor_words(source, target, anchors)
    moved = source.vectors[source.rows(words)]
    fixed = target.vectors[target.rows(words)]
    rotation = procrustes_rotation(moved, fixed)
    keep_n = max(MIN_ANCHORS, int(round(len(words) * (1.0 - trim))))
    if trim > 0 and keep_n < len(words):
        for _ in range(TRIM_ROUNDS):
            # Prepared vectors are unit length and the rotation orthogonal: cosine = dot product.
            distance = 1.0 - np.einsum("ij,ij->i", moved @ rotation, fixed)
            keep = np.argsort(distance, kind="stable")[:keep_n]
            rotation = procrustes_rotation(moved[keep], fixed[keep])
    return rotation


def seed_instability(first: SliceVectors, other: SliceVectors) -> np.ndarray:
    """Each word's optimisation noise: the cosine distance between its vectors from two seeds of
    the same slice, ``other`` rotated onto ``first`` over every shared word; one value per word
    of ``first`` (NaN where ``other`` lacks it)."""
    rotation = align_onto(other, first)
    rows_other = np.fromiter(
        (other.index.get(w, -1) for w in first.words), dtype=np.int64, count=len(first.words)
    )
    present = rows_other >= 0
    out = np.full(len(first.words), np.nan)
    moved = other.vectors[rows_other[present]] @ rotation
    out[present] = 1.0 - np.einsum("ij,ij->i", moved, first.vectors[present])
    return out
