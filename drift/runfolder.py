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
RUN_FORMAT_VERSION = 2  # 2: models as .npy + Parquet (1 stored them as pickle files)
MANIFEST_NAME = "run.json"
LOCK_NAME = ".lock"
EXPORT_MANIFEST = "export.json"


@dataclass(frozen=True)
class RunPaths:
    """Where each stage's files live inside one run folder (the layout: DEVELOPERS.md).

    Parameters
    ----------
    root : str or Path
        The run folder; nothing is created or checked.

    Examples
    --------
    >>> from drift import RunPaths
    >>> paths = RunPaths("runs/letters")
    >>> paths.model_file("1950s", 0).as_posix()
    'runs/letters/models/1950s/seed-0.npy'
    >>> paths.scores_parquet.name
    'scores.parquet'
    """

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
        return TABLES["summary"].path(self.root)

    def slice_file(self, label: str) -> Path:
        return self.slices_dir / f"{label}.txt"

    @property
    def counts(self) -> Path:
        return TABLES["counts"].path(self.root)

    @property
    def documents_parquet(self) -> Path:
        return TABLES["documents"].path(self.root)

    @property
    def documents_csv(self) -> Path:
        return self.root / str(TABLES["documents"].csv_twin)

    @property
    def composition_parquet(self) -> Path:
        return TABLES["composition"].path(self.root)

    @property
    def composition_csv(self) -> Path:
        return self.root / str(TABLES["composition"].csv_twin)

    @property
    def models_dir(self) -> Path:
        return self.root / "models"

    def model_file(self, label: str, seed: int) -> Path:
        return self.models_dir / label / f"seed-{seed}.npy"

    @property
    def control_dir(self) -> Path:
        return self.root / "control"

    def control_model_file(self, label: str, seed: int) -> Path:
        return self.control_dir / label / f"seed-{seed}.npy"

    def control_slice_file(self, name: str) -> Path:
        """The text of control slice ``name`` (control-a, control-b)."""
        return self.control_dir / "slices" / f"{name}.txt"

    @property
    def control_record(self) -> Path:
        """What the control slices were made from (control/slices/control.json)."""
        return self.control_dir / "slices" / "control.json"

    @property
    def scores_parquet(self) -> Path:
        return TABLES["scores"].path(self.root)

    @property
    def scores_csv(self) -> Path:
        return self.root / str(TABLES["scores"].csv_twin)

    @property
    def timeline_parquet(self) -> Path:
        return TABLES["timeline"].path(self.root)

    @property
    def timeline_csv(self) -> Path:
        return self.root / str(TABLES["timeline"].csv_twin)

    @property
    def terms_parquet(self) -> Path:
        return TABLES["terms"].path(self.root)

    @property
    def terms_csv(self) -> Path:
        return self.root / str(TABLES["terms"].csv_twin)

    @property
    def neighbours_parquet(self) -> Path:
        return TABLES["neighbours"].path(self.root)

    @property
    def charts_dir(self) -> Path:
        return self.root / "charts"

    @property
    def word_charts_dir(self) -> Path:
        return self.charts_dir / "words"

    @property
    def report_index(self) -> Path:
        """The report's first page (charts/index.html)."""
        return self.charts_dir / "index.html"

    @property
    def word_index(self) -> Path:
        """The searchable page of every measured word (charts/word-index.html)."""
        return self.charts_dir / "word-index.html"

    def word_page(self, word: str) -> Path:
        """The page of ``word``: charts/words/<safe_name(word)>.html."""
        return self.word_charts_dir / f"{safe_name(word)}.html"


def package_version() -> str:
    """The installed version of drift (the distribution is called lexical-drift)."""
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("lexical-drift")
    except PackageNotFoundError:  # running from a source tree that is not installed
        return "0+unknown"


def library_versions() -> dict[str, str]:
    """Versions of Python and of the libraries whose behaviour shapes the results.

    Read from the installed packages' metadata, so that recording them imports none of the
    libraries (gensim with scipy takes about a second to import).
    """
    from importlib.metadata import version

    versions = {"drift": package_version(), "python": platform.python_version()}
    for library in ("numpy", "scipy", "pandas", "gensim"):
        versions[library] = version(library)
    return versions


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
    """A cheap, stable fingerprint of a file: size, mtime and a hash of its first and last MiB
    (for the archive's source files, which may be large; inside a run folder: content_print)."""
    path = Path(path)
    stat = path.stat()
    digest = hashlib.sha256(f"{stat.st_size}:{stat.st_mtime_ns}".encode())
    with path.open("rb") as handle:
        digest.update(handle.read(chunk_size))
        if stat.st_size > chunk_size:
            handle.seek(max(stat.st_size - chunk_size, chunk_size))
            digest.update(handle.read(chunk_size))
    return digest.hexdigest()[:16]


#: A run folder's cache of its files' content digests, by path inside the folder:
#: ``{"slices/1950s.txt": [size, mtime_ns, digest]}``. Only a speed-up: a missing, stale or
#: unwritable cache means the file is read again.
DIGEST_CACHE = ".content-digests.json"
_DIGESTS: dict[Path, dict[str, list]] = {}


def _run_root_of(path: Path) -> Path | None:
    """The run folder that holds ``path`` (the nearest folder above it with a run.json)."""
    for folder in list(path.parents)[:4]:
        if (folder / MANIFEST_NAME).is_file():
            return folder
    return None


def _digest_cache(root: Path) -> dict[str, list]:
    if root not in _DIGESTS:
        try:
            _DIGESTS[root] = json.loads((root / DIGEST_CACHE).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            _DIGESTS[root] = {}
    return _DIGESTS[root]


def _save_digest(root: Path, key: str, entry: list) -> None:
    cache = _digest_cache(root)
    cache[key] = entry
    try:  # merged with what other processes added since this one read the cache
        kept = json.loads((root / DIGEST_CACHE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        kept = {}
    cache.update({name: value for name, value in kept.items() if name not in cache})
    with contextlib.suppress(OSError):  # a read-only run folder: digests are not kept
        write_text_atomic(root / DIGEST_CACHE, json.dumps(cache, sort_keys=True))


def content_print(path: Path, chunk_size: int = 1 << 20) -> str:
    """A fingerprint of a file's content alone: its size and a BLAKE2b digest of every byte.

    Used for every file inside a run folder, so that a copied run folder (new modification
    times) still matches what its stages recorded, and a change anywhere in a file shows. The
    digest is kept in the run folder's :data:`DIGEST_CACHE` under the file's size and
    modification time, so that a file is read in full only once after it changes.
    """
    path = Path(path)
    stat = path.stat()
    root = _run_root_of(path.absolute())
    key = path.absolute().relative_to(root.absolute()).as_posix() if root else ""
    if root is not None:
        entry = _digest_cache(root).get(key)
        if entry and entry[:2] == [stat.st_size, stat.st_mtime_ns]:
            return str(entry[2])
    digest = hashlib.blake2b(str(stat.st_size).encode(), digest_size=8)
    with path.open("rb") as handle:
        while chunk := handle.read(chunk_size):
            digest.update(chunk)
    value = digest.hexdigest()
    if root is not None:
        _save_digest(root, key, [stat.st_size, stat.st_mtime_ns, value])
    return value


def content_print_tree(folder: Path) -> str:
    """:func:`content_print` of every file under ``folder`` (names included), in one hash."""
    folder = Path(folder)
    digest = hashlib.sha256()
    for child in sorted(p for p in folder.rglob("*") if p.is_file()):
        digest.update(child.relative_to(folder).as_posix().encode())
        digest.update(content_print(child).encode())
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
    if found == 1:
        raise DriftError(
            f"{root} was made by an earlier drift (run format 1), which stored models as pickle "
            "files; this version never opens those, since loading a pickle can run any code in "
            "it. Run the stages again into a new run folder (the source archive is all it needs)."
        )
    if found != RUN_FORMAT_VERSION:
        raise DriftError(
            f"{root} was made by another version of drift (run format {found}, this version reads "
            f"{RUN_FORMAT_VERSION}); start a new run folder or use the matching drift version."
        )
    return manifest


#: The stages whose results each stage is made from. A stage's outputs are stale when one of
#: these was redone (its fingerprint changed) or removed after them.
MADE_FROM: dict[str, tuple[str, ...]] = {
    "train": ("slice",),
    "rank": ("slice", "train"),
    "charts": ("rank",),
}
#: The command that redoes each stage (``{root}``: the run folder).
STAGE_COMMANDS = {
    "slice": "drift slice SOURCE --out {root}",
    "train": "drift train {root}",
    "rank": "drift rank {root}",
    "charts": "drift report {root}",
}
_STAGE_OUTPUTS = {
    "slice": "slices",
    "train": "models",
    "rank": "scores, timeline and terms",
    "charts": "pages",
}


def downstream_of(stage: str) -> list[str]:
    """Every stage made, directly or not, from ``stage``."""
    found: list[str] = []
    for later, sources in MADE_FROM.items():
        if stage in sources or any(s in sources for s in found):
            if later not in found:
                found.append(later)
    return found


def _retire_pages(root: Path) -> None:
    """Remove the HTML pages (made from results that just changed or went away); the shared
    plotly.js copy stays. A page is never left showing numbers the run no longer has."""
    paths = RunPaths(Path(root))
    if not paths.charts_dir.is_dir():
        return
    (paths.charts_dir / "index.html").unlink(missing_ok=True)
    if paths.word_charts_dir.is_dir():
        for page in paths.word_charts_dir.glob("*.html"):
            page.unlink(missing_ok=True)


def _after_change(root: Path, manifest: dict[str, Any], stage: str) -> None:
    """A stage was redone or forgotten: later stages are stale; pages go at once."""
    later = downstream_of(stage)
    if "charts" in later:
        _retire_pages(root)
        manifest["stages"].pop("charts", None)


def record_stage(
    root: Path,
    stage: str,
    params: dict[str, Any],
    inputs: str,
    seconds: float,
    extra: dict[str, Any] | None = None,
    outputs: list[Path] | None = None,
) -> dict[str, Any]:
    """Write one finished stage into run.json (atomically) and return the updated manifest.

    The record holds ``made_from``: the fingerprints of the stages it was made from
    (:data:`MADE_FROM`), and ``files``: a content fingerprint of each of ``outputs``, so that
    readers can tell when a result no longer matches what it was made from (:func:`stale_reason`).
    """
    manifest = read_manifest(root)
    manifest["versions"] = library_versions()
    stages = manifest["stages"]
    fingerprint = fingerprint_params({"params": params, "inputs": inputs})
    changed = stages.get(stage, {}).get("fingerprint") != fingerprint
    stages[stage] = {
        "params": params,
        "fingerprint": fingerprint,
        "inputs": inputs,
        "finished": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "seconds": round(seconds, 3),
        "made_from": {
            source: stages.get(source, {}).get("fingerprint") for source in MADE_FROM.get(stage, ())
        },
        **(extra or {}),
    }
    if outputs:
        stages[stage]["files"] = {
            Path(p).name: content_print(Path(p)) for p in outputs if Path(p).is_file()
        }
    if changed or stage == "rank":  # a rank always rewrites its tables
        _after_change(root, manifest, stage)
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
        _after_change(root, manifest, stage)
        write_json_atomic(RunPaths(Path(root)).manifest, manifest)


def stale_reason(root: Path, stage: str) -> str | None:
    """Why the recorded outputs of ``stage`` no longer match what they were made from, or None.

    Stale when the stage has no record (it never finished), when a stage it was made from was
    redone or removed since, or when one of its recorded output files changed.
    """
    stages = read_manifest(root).get("stages", {})
    record = stages.get(stage)
    if not record:
        return f"the {stage} stage did not finish"
    made_from = record.get("made_from")
    if made_from is None:
        return f"the {stage} stage was recorded by an older drift that kept no fingerprints"
    for source in MADE_FROM.get(stage, ()):
        now = stages.get(source, {}).get("fingerprint")
        if now is None:
            return f"the {source} stage was started again and has not finished"
        if made_from.get(source) != now:
            return (
                f"they were made from earlier {_STAGE_OUTPUTS[source]} ('drift {source}' ran "
                "again since)"
            )
    folder = Path(root)
    for name, recorded in (record.get("files") or {}).items():
        path = next((p for p in (folder / name,) if p.is_file()), None)
        if path is None or content_print(path) != recorded:
            return f"{name} changed after the {stage} stage wrote it"
    return None


def check_current(root: Path, stage: str) -> None:
    """Raise a DriftError naming the command to rerun when ``stage``'s outputs are stale."""
    reason = stale_reason(root, stage)
    if reason is None:
        return
    command = STAGE_COMMANDS[stage].format(root=root)
    raise DriftError(
        f"The {_STAGE_OUTPUTS[stage]} in {root} are out of date: {reason}; rerun '{command}' "
        "to bring them up to date."
    )


def prepare_export_folder(out: Path) -> Path:
    """An export folder: new, empty, or one drift exported into before (it holds export.json)."""
    out = Path(out)
    if not (out / EXPORT_MANIFEST).is_file():
        check_out_folder(out, what="the exported vectors")
    out.mkdir(parents=True, exist_ok=True)
    return out


def record_export(out: Path, root: Path, files: list[Path], params: dict[str, Any]) -> None:
    """Write ``out/export.json``: the run, the fingerprints the vectors were made from, and a
    content fingerprint of each file written."""
    stages = read_manifest(root).get("stages", {})
    write_json_atomic(
        Path(out) / EXPORT_MANIFEST,
        {
            "run": str(Path(root).resolve()),
            "params": params,
            "made_from": {s: stages.get(s, {}).get("fingerprint") for s in ("slice", "train")},
            "files": {Path(p).name: content_print(Path(p)) for p in files},
            "written": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        },
    )


# ------------------------------------------------------------------- folder checks and lock

#: Files that do not make a folder "not empty" (the lock, and what file browsers leave behind).
_IGNORED_IN_EMPTY = {LOCK_NAME, ".DS_Store", "Thumbs.db", "desktop.ini"}


def _listing(root: Path, limit: int = 4) -> str:
    names = sorted(p.name + ("/" if p.is_dir() else "") for p in root.iterdir())
    shown = [n for n in names if n.rstrip("/") not in _IGNORED_IN_EMPTY]
    more = len(shown) - limit
    return ", ".join(shown[:limit]) + (f" and {more} more" if more > 0 else "")


def check_out_folder(root: Path, option: str = "--out", what: str = "the run") -> None:
    """Refuse ``root`` unless it is new, empty, or a drift run folder (it holds run.json).

    Called before anything is written, so a folder of the user's own files is never touched.
    """
    root = Path(root)
    if root.exists() and not root.is_dir():
        raise DriftError(
            f"{option} {root} is a file, not a folder; choose a folder path for {what}."
        )
    if not root.is_dir() or (root / MANIFEST_NAME).is_file():
        return
    if any(p.name not in _IGNORED_IN_EMPTY for p in root.iterdir()):
        raise DriftError(
            f"{option} {root} already holds files that drift did not write ({_listing(root)}); "
            f"choose a new or empty folder for {what}, or one drift wrote before."
        )


def prepare_run_folder(root: Path) -> RunPaths:
    """Create (or reopen) a run folder for writing.

    Refuses a path that is a file, a folder holding other files (see :func:`check_out_folder`)
    and a run folder from an incompatible version; a new folder gets its run.json at once, so it
    is recognised as a run folder even if the first stage fails.
    """
    root = Path(root)
    check_out_folder(root)
    root.mkdir(parents=True, exist_ok=True)
    manifest = RunPaths(root).manifest
    if not manifest.exists():
        write_json_atomic(manifest, new_manifest())
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


#: Locks this process holds (resolved path -> depth), so a stage may call another stage.
_HELD: dict[str, int] = {}


def _lock_owner(handle: Any) -> dict[str, Any]:
    """The host and pid written in an open lock file ({} when empty or unreadable)."""
    try:
        handle.seek(0)
        data = json.loads(handle.read() or "{}")
    except (OSError, ValueError):
        return {}
    if isinstance(data, int):  # a lock file of an earlier drift: a bare pid
        return {"pid": data, "host": platform.node()}
    return data if isinstance(data, dict) else {}


def _lock_refusal(root: Path, owner: dict[str, Any], busy: bool) -> DriftError | None:
    """Why the lock cannot be taken (None when it can)."""
    host, pid = owner.get("host"), owner.get("pid")
    here = platform.node()
    where = f" on host {host}" if host and host != here else ""
    who = f"pid {pid}{where}"
    since = f" since {owner['since']}" if owner.get("since") else ""
    if busy:
        return DriftError(
            f"Run folder {root} is in use by another drift process (pid {pid}){where}{since}; "
            "wait for it to finish or choose another folder."
        )
    if host and host != here:
        # The OS lock is free, yet the record says another machine holds it: that machine may
        # see a lock this one cannot (some shared file systems lock per host), so never take it.
        return DriftError(
            f"Run folder {root} is held by drift {who}{since} (recorded in {root / LOCK_NAME}); "
            "if no drift process runs there any more, delete that file and retry."
        )
    if isinstance(pid, int) and pid != os.getpid() and _pid_alive(pid):
        return DriftError(
            f"Run folder {root} is in use by another drift process (pid {pid}){where}{since}; "
            "wait for it to finish or choose another folder."
        )
    return None


def _os_lock(handle: Any) -> bool:
    """Take an exclusive OS lock on an open file without waiting; False when another holds it."""
    try:
        import fcntl
    except ImportError:  # Windows: lock the first byte instead
        import msvcrt

        try:
            msvcrt.locking(handle.fileno(), msvcrt.LK_NBLCK, 1)
        except OSError:
            return False
        return True
    try:
        fcntl.flock(handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        return False
    return True


def _os_unlock(handle: Any) -> None:
    try:
        import fcntl
    except ImportError:
        import msvcrt

        with contextlib.suppress(OSError):
            handle.seek(0)
            msvcrt.locking(handle.fileno(), msvcrt.LK_UNLCK, 1)
        return
    fcntl.flock(handle.fileno(), fcntl.LOCK_UN)


@contextlib.contextmanager
def run_lock(root: Path) -> Iterator[None]:
    """Hold the run folder for one writer; a second writer is refused with a clear message.

    The lock is an OS lock (``flock``) on ``RUN/.lock``, which records the holder's host, pid and
    start time. The OS releases it when the holder dies, so a killed run never blocks the folder.
    A record naming another host is never overridden (see :func:`_lock_refusal`). The same
    process may take the lock again (re-entrant).
    """
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    lock = root / LOCK_NAME
    key = str(lock.resolve())
    if _HELD.get(key):
        _HELD[key] += 1
        try:
            yield
        finally:
            _HELD[key] -= 1
        return
    for _ in range(5):
        handle = open(lock, "a+", encoding="utf-8")  # noqa: SIM115 - closed below
        if not _os_lock(handle):
            owner = _lock_owner(handle)
            handle.close()
            raise _lock_refusal(root, owner, busy=True)
        try:
            same = lock.exists() and os.fstat(handle.fileno()).st_ino == lock.stat().st_ino
        except OSError:
            same = False
        if not same:  # the holder removed the file while we waited for it: start again
            _os_unlock(handle)
            handle.close()
            continue
        refusal = _lock_refusal(root, _lock_owner(handle), busy=False)
        if refusal is not None:
            _os_unlock(handle)
            handle.close()
            raise refusal
        handle.seek(0)
        handle.truncate()
        handle.write(
            json.dumps(
                {
                    "host": platform.node(),
                    "pid": os.getpid(),
                    "since": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                }
            )
        )
        handle.flush()
        _HELD[key] = 1
        try:
            yield
        finally:
            _HELD.pop(key, None)
            lock.unlink(missing_ok=True)  # while still held: the next writer opens a new file
            _os_unlock(handle)
            handle.close()
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


# ---------------------------------------------------------------------------- tables


@dataclass(frozen=True)
class TableSchema:
    """One table of the run folder: its file (relative to the root), a CSV twin where there is
    one, the stage that writes it, and its columns in order, declared here once.

    ``open_after``: further columns may follow this column (per slice label in counts and terms,
    per ``--meta`` column in the document index); ``None``: exactly :attr:`columns`.
    """

    file: str
    stage: str
    columns: tuple[str, ...]
    csv_twin: str | None = None
    #: columns a CSV table reads as text (a label such as 1990 is not a number)
    text_columns: tuple[str, ...] = ()
    open_after: str | None = None

    def path(self, root: Path | str) -> Path:
        return Path(root) / self.file

    def check(self, frame: Any, where: str = "") -> None:
        """Raise DriftError unless ``frame`` has the declared columns (in order)."""
        names = frame.column_names if hasattr(frame, "column_names") else frame.columns
        columns = [str(c) for c in names]
        missing = [c for c in self.columns if c not in columns]
        if missing:
            raise DriftError(
                f"{where or self.file} lacks the column(s) {', '.join(missing)}; rerun "
                f"'drift {self.stage}' to rewrite it."
            )
        if self.open_after is None and columns != list(self.columns):
            extra = [c for c in columns if c not in self.columns]
            raise DriftError(
                f"{where or self.file} has columns {', '.join(extra) or 'in another order'} that "
                f"drift does not write; rerun 'drift {self.stage}' to rewrite it."
            )


SCORE_COLUMNS = (
    "word", "rank", "score", "displacement", "displacement_sd", "turnover", "turnover_sd",
    "local", "local_sd", "context", "context_z", "count_from", "count_to", "fpm_from", "fpm_to",
    "log_freq_ratio",
    "seed_noise", "own_control", "null_centre", "null_spread", "noise_z", "noise_p", "noise_q",
    "typical", "typical_spread", "drift_z", "drift_p", "drift_q",
    "z", "p", "q", "significant", "significance_note", "change_point", "change_step",
    "gained", "lost",
)
TIMELINE_COLUMNS = (
    "word", "slice", "distance", "distance_sd", "turnover", "count", "fpm", "null_p95", "typical",
)
NEIGHBOUR_COLUMNS = ("word", "slice", "rank", "neighbour", "similarity")
TERM_COLUMNS = ("word", "kind", "count_from", "count_to", "fpm_from", "fpm_to", "ratio",
                "measured")
SUMMARY_COLUMNS = ("label", "start", "end", "documents", "tokens", "types", "dropped")
COMPOSITION_COLUMNS = ("slice", "column", "value", "documents", "tokens", "share")

#: Every table of a run folder (DEVELOPERS.md describes each column).
TABLES: dict[str, TableSchema] = {
    "summary": TableSchema("slices/summary.csv", "slice", SUMMARY_COLUMNS,
                           text_columns=("label", "start", "end")),
    "counts": TableSchema("counts.parquet", "slice", ("word",),
                          open_after="word"),
    "documents": TableSchema("documents.parquet", "slice", ("document", "date"),
                             csv_twin="documents.csv",
                             open_after="date"),
    "composition": TableSchema("composition.parquet", "slice", COMPOSITION_COLUMNS,
                               csv_twin="composition.csv"),
    "scores": TableSchema("scores.parquet", "rank", SCORE_COLUMNS, csv_twin="scores.csv"),
    "timeline": TableSchema("timeline.parquet", "rank", TIMELINE_COLUMNS,
                            csv_twin="timeline.csv"),
    "terms": TableSchema("terms.parquet", "rank", TERM_COLUMNS, csv_twin="terms.csv",
                         open_after="measured"),
    "neighbours": TableSchema("neighbours.parquet", "rank", NEIGHBOUR_COLUMNS),
}
#: Columns the document index always has after the ``--meta`` columns.
DOCUMENT_TAIL = ("slice", "source_row", "source_file", "line", "lines", "tokens")


def write_table(root: Path | str, name: str, frame: Any) -> Path:
    """Write table ``name`` of :data:`TABLES` into ``root`` (and its CSV twin), atomically.

    The columns are checked against the schema first: a stage cannot write a table other code
    would not read. Returns the main file's path.

    >>> import pandas as pd, tempfile
    >>> root = Path(tempfile.mkdtemp())
    >>> frame = pd.DataFrame({"word": ["a"], "slice": ["1990"], "rank": [1], "neighbour": ["b"],
    ...                       "similarity": [0.5]})
    >>> write_table(root, "neighbours", frame).name
    'neighbours.parquet'
    >>> read_table(root, "neighbours")["neighbour"].tolist()
    ['b']
    """
    schema = TABLES[name]
    schema.check(frame, where=f"the {name} table")
    path = schema.path(root)
    path.parent.mkdir(parents=True, exist_ok=True)
    if hasattr(frame, "column_names") and (path.suffix == ".csv" or schema.csv_twin):
        frame = frame.to_pandas()  # a pyarrow Table is written as it is only to Parquet alone
    if path.suffix == ".csv":
        write_text_atomic(path, frame.to_csv(index=False))
    else:
        with atomic_path(path) as tmp:
            _write_parquet(frame, tmp)
    if schema.csv_twin:
        with atomic_path(Path(root) / schema.csv_twin) as tmp:
            frame.to_csv(tmp, index=False)
    return path


def _write_parquet(frame: Any, target: Path) -> None:
    """A pandas DataFrame or a pyarrow Table (counts, written without a pandas copy) as Parquet."""
    if hasattr(frame, "column_names"):
        import pyarrow.parquet as pq

        pq.write_table(frame, target)
    else:
        frame.to_parquet(target, index=False)


def read_table(root: Path | str, name: str, columns: list[str] | None = None) -> Any:
    """Read table ``name`` of :data:`TABLES` from ``root``, its columns checked.

    A missing file is a DriftError naming the command that writes it; in a CSV table the text
    columns stay text (a label such as ``1990`` is not read as a number).
    """
    import pandas as pd

    schema = TABLES[name]
    path = schema.path(root)
    if not path.is_file():
        raise DriftError(
            f"{Path(root)} has no {schema.file}; run 'drift {schema.stage}' on it first."
        )
    try:
        if path.suffix == ".csv":
            frame = pd.read_csv(path, dtype={c: str for c in schema.text_columns})
        else:
            frame = pd.read_parquet(path, columns=columns)
    except (OSError, ValueError) as exc:
        raise DriftError(
            f"{path} cannot be read ({exc.__class__.__name__}); rerun 'drift {schema.stage}' "
            "to rewrite it."
        ) from exc
    if columns is None:
        schema.check(frame, where=str(path))
    return frame


def slice_labels(root: Path | str) -> list[str]:
    """The slice labels of a run in time order: run.json's record, else the slice summary."""
    labels = read_manifest(Path(root)).get("stages", {}).get("slice", {}).get("labels")
    if labels:
        return [str(label) for label in labels]
    return [str(label) for label in read_table(root, "summary")["label"]]
