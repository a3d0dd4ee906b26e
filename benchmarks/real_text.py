"""Real, dated English text for the benchmarks: the change logs of installed Debian packages.

Every Debian package installs ``/usr/share/doc/<package>/changelog.Debian.gz`` (native packages:
``changelog.gz`` in the same format): one entry per upload, written by its maintainers, each
closed by a trailer line `` -- Name <address>  Mon, 02 Jan 2023 13:06:21 +0100``. Many packages
also ship their upstream project's change log as ``changelog.gz``, either in the GNU format
(an entry starts ``2022-12-12  Name  <address>``) or as a ``git log`` (``commit``, ``Author:``,
``Date:   Fri Dec 16 23:14:57 2022 +0200``, then the indented message). Each entry of any of the
three formats is one document dated by its own line; files copied into several packages' folders
are read once (by content). The text belongs to each package's authors under that
package's licence (``/usr/share/doc/<package>/copyright``); it is read where it lies at benchmark
time and never copied into the repository.

    python benchmarks/real_text.py            # how much text this machine holds

Run by hand, never in the test suite.
"""

from __future__ import annotations

import csv
import email.utils
import gzip
import hashlib
import re
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

DOC_ROOT = Path("/usr/share/doc")
_HEADER = re.compile(r"^(\S+) \(([^)]+)\)\s+[^;]*;")
_TRAILER = re.compile(r"^ -- (.*?)\s*<[^>]*>\s+(.+?)\s*$")
_WORD = re.compile(r"[^\W\d_]+(?:['’][^\W\d_]+)*", re.UNICODE)
#: Bug closers, addresses and web links carry no English sense.
_NOISE = re.compile(r"closes:\s*#?\d+(?:,\s*#?\d+)*|\S+@\S+|https?://\S+|#\d+", re.IGNORECASE)


@dataclass(frozen=True)
class Entry:
    package: str
    version: str
    year: int
    date: str  # ISO date
    text: str


def changelog_files(root: Path = DOC_ROOT) -> list[Path]:
    """Every change log (Debian and upstream) once: files of the same content count once."""
    seen: set[str] = set()
    files = []
    for folder in sorted(root.iterdir()):
        for name in ("changelog.Debian.gz", "changelog.gz"):
            path = folder / name
            if not path.is_file():
                continue
            digest = hashlib.sha1(path.read_bytes()).hexdigest()
            if digest not in seen:
                seen.add(digest)
                files.append(path)
    return files


_GNU_HEADER = re.compile(r"^(\d{4})-(\d{2})-(\d{2})\s+\S")
_GIT_DATE = re.compile(r"^Date:\s+(.+?)\s*$")
_DIFFSTAT = re.compile(r"^\s*\S+\s+\|\s+\d+|^\s*\d+ files? changed")
_GNU_FILES = re.compile(r"^\*\s*[^:]{0,200}:\s*")
_SIGNATURE = re.compile(r"^\s*(signed-off-by|reviewed-by|acked-by|co-authored-by|cc):", re.I)


def _entry(package: str, version: str, year: int, date: str, body: list[str]) -> Entry | None:
    text = " ".join(s.strip(" *-+\t") for s in body if s.strip())
    text = _NOISE.sub(" ", text)
    if 1990 <= year <= 2030 and text.strip():
        return Entry(package, version, year, date, text)
    return None


def parse_gnu(lines: list[str], package: str) -> Iterator[Entry]:
    """Entries of a GNU-format ChangeLog: a date line, then tab-indented text."""
    date, body, n = None, [], 0
    for line in lines + ["0000-00-00  end"]:
        head = _GNU_HEADER.match(line)
        if head:
            if date is not None:
                entry = _entry(package, f"gnu-{n}", int(date[:4]), date, body)
                if entry:
                    yield entry
            date, body, n = "-".join(head.groups()), [], n + 1
        elif date is not None and line.strip():
            body.append(_GNU_FILES.sub("", line.strip()))


def parse_git_log(lines: list[str], package: str) -> Iterator[Entry]:
    """Entries of a ``git log``: the message lines (indented) of each commit."""
    commit, when, body = None, None, []
    for line in lines + ["commit end"]:
        if line.startswith("commit "):
            if commit and when:
                entry = _entry(package, commit, when.year, when.date().isoformat(), body)
                if entry:
                    yield entry
            commit, when, body = line.split()[1], None, []
            continue
        found = _GIT_DATE.match(line)
        if found and when is None:
            try:
                when = datetime.strptime(found.group(1), "%a %b %d %H:%M:%S %Y %z")
            except ValueError:
                commit = None
            continue
        if line.startswith("    ") and not _SIGNATURE.match(line) and not _DIFFSTAT.match(line):
            body.append(line)


def parse_changelog(path: Path) -> Iterator[Entry]:
    """Entries of one change log in the Debian, GNU or git log format."""
    try:
        with gzip.open(path, "rt", encoding="utf-8", errors="replace") as handle:
            lines = handle.read().splitlines()
    except (OSError, EOFError):
        return
    first = next((line for line in lines if line.strip()), "")
    package_name = path.parent.name
    if first.startswith("commit "):
        yield from parse_git_log(lines, package_name)
        return
    if _GNU_HEADER.match(first):
        yield from parse_gnu(lines, package_name)
        return
    package = version = None
    body: list[str] = []
    for line in lines:
        header = _HEADER.match(line)
        if header:
            package, version, body = header.group(1), header.group(2), []
            continue
        trailer = _TRAILER.match(line)
        if trailer and package:
            try:
                when = email.utils.parsedate_to_datetime(trailer.group(2))
            except (TypeError, ValueError, IndexError):
                package = None
                continue
            entry = _entry(package, version, when.year, when.date().isoformat(), body)
            if entry:
                yield entry
            package = None
            continue
        if package:
            body.append(line)


def entries(root: Path = DOC_ROOT) -> list[Entry]:
    """Every dated entry on this machine, once (the same package and version seen twice: once)."""
    seen: set[tuple[str, str]] = set()
    out = []
    for path in changelog_files(root):
        for entry in parse_changelog(path):
            key = (entry.package, entry.version)
            if key not in seen:
                seen.add(key)
                out.append(entry)
    return out


def tokens(text: str) -> list[str]:
    """Lower-cased word tokens (letters only), as drift's tokenizer would keep them."""
    return [t.lower() for t in _WORD.findall(text)]


_PARAGRAPH_BREAK = re.compile(r"\n\s*\n")
_TEXT_NAMES = re.compile(r"^(news|readme|changes|history|faq|todo|authors|thanks)", re.IGNORECASE)
_TEXT_SUFFIXES = {"", ".gz", ".txt", ".md", ".rst"}


def other_text_files(root: Path = DOC_ROOT) -> list[Path]:
    """Plain-text documentation (NEWS, README, ... files, plain or gzipped) once by content."""
    seen: set[str] = set()
    files = []
    for path in sorted(root.rglob("*")):
        if not path.is_file() or path.is_symlink() or not _TEXT_NAMES.match(path.name):
            continue
        if "".join(path.suffixes[-1:]).lower() not in _TEXT_SUFFIXES:
            continue
        digest = hashlib.sha1(path.read_bytes()).hexdigest()
        if digest not in seen:
            seen.add(digest)
            files.append(path)
    return files


def _read_text(path: Path) -> str:
    opener = gzip.open if path.suffix == ".gz" else open
    try:
        with opener(path, "rt", encoding="utf-8", errors="replace") as handle:
            return handle.read()
    except (OSError, EOFError):
        return ""


def documents(
    root: Path = DOC_ROOT, min_tokens: int = 10, with_other_text: bool = True
) -> list[list[str]]:
    """Token lists for the injection protocol, whose dates are random anyway: every change log
    entry, then (``with_other_text``) each paragraph of the NEWS, README and similar files."""
    docs = [tokens(e.text) for e in entries(root)]
    if with_other_text:
        for path in other_text_files(root):
            for paragraph in _PARAGRAPH_BREAK.split(_NOISE.sub(" ", _read_text(path))):
                docs.append(tokens(paragraph))
    return [d for d in docs if len(d) >= min_tokens]


def write_dated_csv(path: Path, root: Path = DOC_ROOT) -> Path:
    """``id,date,package,text`` rows of every entry, for ``drift slice`` on the real archive."""
    path = Path(path)
    with path.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["id", "date", "package", "text"])
        for entry in entries(root):
            ident = hashlib.sha1(f"{entry.package} {entry.version}".encode()).hexdigest()[:12]
            writer.writerow([ident, entry.date, entry.package, entry.text])
    return path


if __name__ == "__main__":
    every = documents()
    print(f"injection text: {len(every):,} documents, {sum(map(len, every)):,} tokens")
    found = entries()
    years: dict[int, int] = {}
    for e in found:
        years[e.year] = years.get(e.year, 0) + len(tokens(e.text))
    total = sum(years.values())
    print(f"{len(changelog_files())} change logs, {len(found):,} entries, {total:,} tokens")
    for year in sorted(years):
        print(f"  {year}: {years[year]:,}")
