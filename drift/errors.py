"""The one exception type that reaches the user as a plain sentence (exit code 2)."""

from __future__ import annotations

import difflib
from collections.abc import Iterable


class DriftError(Exception):
    """Bad usage or bad input: one plain sentence saying what is wrong and what to do.

    Every public function raises it for a problem the user can fix; the command line prints
    the sentence without a traceback and exits with code 2.

    Examples
    --------
    >>> import drift
    >>> try:
    ...     drift.rank_run(workdir / "nowhere")
    ... except drift.DriftError as error:
    ...     print(error)
    Run folder .../nowhere does not exist; make it with 'drift slice SOURCE --out .../nowhere'.
    """


def close_matches(word: str, known: Iterable[str], n: int = 5) -> list[str]:
    """Words from ``known`` that look most like ``word`` (difflib ratio), best first."""
    return difflib.get_close_matches(word, list(known), n=n, cutoff=0.6)


def unknown_word_error(
    word: str, known: Iterable[str], where: str = "the vocabulary"
) -> DriftError:
    """A DriftError for a word that is not in ``known``, suggesting the closest known words."""
    suggestions = close_matches(word, known)
    hint = f"; did you mean {', '.join(suggestions)}?" if suggestions else "; check the spelling."
    return DriftError(f"'{word}' is not in {where}{hint}")
