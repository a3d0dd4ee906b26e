"""The run folder: paths, the run manifest (run.json), atomic writes, the lock and stage reuse.

Every stage reads the previous stage's files from the run folder and writes its own. The manifest
records, per stage, the parameters, a fingerprint of the inputs, versions and timings, so that a
stage whose inputs and parameters are unchanged can be reused instead of recomputed.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import platform
import re
import tempfile
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from drift.errors import DriftError

#: Bumped when the layout of the run folder changes in a way older code cannot read.
RUN_FORMAT_VERSION = 1
MANIFEST_NAME = "run.json"
LOCK_NAME = ".lock"


@dataclass(frozen=True)
class RunPaths:
    """Where each stage's files live inside one run folder."""

    root: Path

    def __post_init__(self) -> None:
        object.__setattr__(self, "root", Path(self.root))  # accept str as well

    @property
    def manifest(self) -> Path:
        return self.root / MANIFEST_NAME

    @property
    def slices_dir(self) -> Path:
        return self.root / "slices"

    @property
    def slice_summary(self) -> Path:
        return self.slices_dir / "summary.csv"

    def slice_file(self, label: str) -> Path:
        return self.slices_dir / f"{label}.txt"

    @property
    def counts(self) -> Path:
        return self.root / "counts.parquet"

    @property
    def models_dir(self) -> Path:
        return self.root / "models"

    def model_file(self, label: str, seed: int) -> Path:
        return self.models_dir / label / f"seed-{seed}.kv"

    @property
    def control_dir(self) -> Path:
        return self.root / "control"

    def control_model_file(self, label: str, seed: int) -> Path:
        return self.control_dir / label / f"seed-{seed}.kv"

    @property
    def scores_parquet(self) -> Path:
        return self.root / "scores.parquet"

    @property
    def scores_csv(self) -> Path:
        return self.root / "scores.csv"

    @property
    def timeline_parquet(self) -> Path:
        return self.root / "timeline.parquet"

    @property
    def terms_parquet(self) -> Path:
        return self.root / "terms.parquet"

    @property
    def neighbours_parquet(self) -> Path:
        return self.root / "neighbours.parquet"

    @property
    def charts_dir(self) -> Path:
        return self.root / "charts"

    @property
    def word_charts_dir(self) -> Path:
        return self.charts_dir / "words"


def package_version() -> str:
    """The installed version of drift (the distribution is called lexical-drift)."""
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("lexical-drift")
    except PackageNotFoundError:  # running from a source tree that is not installed
        return "0+unknown"


def library_versions() -> dict[str, str]:
    """Versions of Python and of the libraries whose behaviour shapes the results."""
    import gensim
    import numpy
    import pandas
    import scipy

    return {
        "drift": package_version(),
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "pandas": pandas.__version__,
        "gensim": gensim.__version__,
    }


# ---------------------------------------------------------------------------- atomic writes


def _read_umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


_UMASK = _read_umask()  # read once at import: os.umask is process-wide, not thread-safe


@contextlib.contextmanager
def atomic_path(target: Path) -> Iterator[Path]:
    """Yield a temporary path beside ``target``; on success rename it onto ``target``.

    A crash leaves at most a stray temporary file, never a half-written target.
    """
    target = Path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    os.chmod(tmp, 0o666 & ~_UMASK)  # mkstemp makes 0600; results are for sharing
    try:
        yield tmp
        os.replace(tmp, target)
    finally:
        if tmp.exists():
            tmp.unlink()


def write_text_atomic(target: Path, text: str) -> None:
    """Write ``text`` (UTF-8) to ``target`` atomically."""
    with atomic_path(target) as tmp:
        tmp.write_text(text, encoding="utf-8")


def write_json_atomic(target: Path, data: Any) -> None:
    """Write ``data`` as indented JSON to ``target`` atomically."""
    write_text_atomic(target, json.dumps(data, indent=2, sort_keys=True, default=str) + "\n")


# ---------------------------------------------------------------------------- fingerprints


def fingerprint_file(path: Path, chunk_size: int = 1 << 20) -> str:
    """A cheap, stable fingerprint of a file: size, mtime and a hash of its first and last MiB."""
    path = Path(path)
    stat = path.stat()
    digest = hashlib.sha256(f"{stat.st_size}:{stat.st_mtime_ns}".encode())
    with path.open("rb") as handle:
        digest.update(handle.read(chunk_size))
        if stat.st_size > chunk_size:
            handle.seek(max(stat.st_size - chunk_size, chunk_size))
            digest.update(handle.read(chunk_size))
    return digest.hexdigest()[:16]


def fingerprint_path(path: Path) -> str:
    """Fingerprint a file, or every file under a folder (names included)."""
    path = Path(path)
    if path.is_file():
        return fingerprint_file(path)
    digest = hashlib.sha256()
    for child in sorted(p for p in path.rglob("*") if p.is_file()):
        digest.update(str(child.relative_to(path)).encode())
        digest.update(fingerprint_file(child).encode())
    return digest.hexdigest()[:16]


def fingerprint_params(params: dict[str, Any]) -> str:
    """A stable hash of a parameter dictionary."""
    text = json.dumps(params, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


# ---------------------------------------------------------------------------- manifest


def new_manifest() -> dict[str, Any]:
    return {
        "format_version": RUN_FORMAT_VERSION,
        "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "versions": library_versions(),
        "stages": {},
    }


def read_manifest(root: Path) -> dict[str, Any]:
    """Read run.json, refusing a folder made by an incompatible version of drift."""
    path = RunPaths(Path(root)).manifest
    if not path.exists():
        return new_manifest()
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise DriftError(
            f"{path} is not a readable run manifest ({exc.__class__.__name__}); "
            "remove the folder or choose another --out."
        ) from None
    found = manifest.get("format_version")
    if found != RUN_FORMAT_VERSION:
        raise DriftError(
            f"{root} was made by another version of drift (run format {found}, this version reads "
            f"{RUN_FORMAT_VERSION}); start a new run folder or use the matching drift version."
        )
    return manifest


def record_stage(
    root: Path,
    stage: str,
    params: dict[str, Any],
    inputs: str,
    seconds: float,
    extra: dict[str, Any] | None = None,
) -> dict[str, Any]:
    """Write one finished stage into run.json (atomically) and return the updated manifest."""
    manifest = read_manifest(root)
    manifest["versions"] = library_versions()
    manifest["stages"][stage] = {
        "params": params,
        "fingerprint": fingerprint_params({"params": params, "inputs": inputs}),
        "inputs": inputs,
        "finished": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "seconds": round(seconds, 3),
        **(extra or {}),
    }
    write_json_atomic(RunPaths(Path(root)).manifest, manifest)
    return manifest


def stage_is_current(root: Path, stage: str, params: dict[str, Any], inputs: str) -> bool:
    """True when ``stage`` finished earlier with the same parameters and input fingerprint."""
    recorded = read_manifest(root).get("stages", {}).get(stage)
    if not recorded:
        return False
    return recorded.get("fingerprint") == fingerprint_params({"params": params, "inputs": inputs})


def forget_stage(root: Path, stage: str) -> None:
    """Drop a stage (and so invalidate the stages after it) from run.json."""
    manifest = read_manifest(root)
    if manifest["stages"].pop(stage, None) is not None:
        write_json_atomic(RunPaths(Path(root)).manifest, manifest)


# ------------------------------------------------------------------- folder checks and lock


def prepare_run_folder(root: Path) -> RunPaths:
    """Create (or reopen) a run folder for writing; refuse a path that is a file."""
    root = Path(root)
    if root.exists() and not root.is_dir():
        raise DriftError(f"--out {root} is a file, not a folder; choose a folder path for the run.")
    root.mkdir(parents=True, exist_ok=True)
    read_manifest(root)  # refuses a folder from an incompatible version
    return RunPaths(root)


def existing_run(root: Path, needs: str = "slices") -> RunPaths:
    """Open a run folder that must already hold the output of an earlier stage."""
    root = Path(root)
    paths = RunPaths(root)
    if not root.is_dir():
        raise DriftError(
            f"Run folder {root} does not exist; make it with 'drift slice SOURCE --out {root}'."
        )
    read_manifest(root)
    if needs == "slices" and not paths.slice_summary.exists():
        raise DriftError(
            f"{root} has no slices yet; make them with 'drift slice SOURCE --out {root}'."
        )
    if needs == "models" and not paths.models_dir.is_dir():
        raise DriftError(f"{root} has no trained models yet; train them with 'drift train {root}'.")
    if needs == "scores" and not paths.scores_parquet.exists():
        raise DriftError(f"{root} has no scores yet; compute them with 'drift rank {root}'.")
    return paths


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


@contextlib.contextmanager
def run_lock(root: Path) -> Iterator[None]:
    """Hold the run folder for one writer; a second writer is refused with a clear message.

    The lock file holds the owner's process id, so a lock left by a killed process is taken over.
    """
    lock = Path(root) / LOCK_NAME
    lock.parent.mkdir(parents=True, exist_ok=True)
    for _ in range(2):
        try:
            fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
        except FileExistsError:
            try:
                owner = int(lock.read_text().strip() or 0)
            except (OSError, ValueError):
                owner = 0
            if owner and owner != os.getpid() and _pid_alive(owner):
                raise DriftError(
                    f"Run folder {root} is in use by another drift process (pid {owner}); "
                    "wait for it to finish or choose another folder."
                ) from None
            if owner == os.getpid():  # re-entrant use within one process
                yield
                return
            lock.unlink(missing_ok=True)  # stale lock from a process that died
            continue
        with os.fdopen(fd, "w") as handle:
            handle.write(str(os.getpid()))
        try:
            yield
        finally:
            lock.unlink(missing_ok=True)
        return
    raise DriftError(f"Could not take the lock {lock}; remove it if no drift process is running.")


# ---------------------------------------------------------------------------- safe names

_SLUG_RE = re.compile(r"[^a-z0-9]+")


def safe_name(word: str, max_len: int = 40) -> str:
    """A file-system-safe name for a word: an ASCII slug plus a short hash of the exact word.

    A raw word never becomes part of a path, so tokens such as ``../../etc/passwd`` or
    ``<script>`` cannot escape the folder or collide with each other.
    """
    slug = _SLUG_RE.sub("-", word.lower()).strip("-")[:max_len] or "word"
    digest = hashlib.sha256(word.encode("utf-8")).hexdigest()[:8]
    return f"{slug}-{digest}"
