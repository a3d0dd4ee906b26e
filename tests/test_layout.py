"""The package layout follows the pipeline: no module imports a stage above its own.

Layers, bottom to top: the shared contract (``runfolder``, ``errors``, ``progress``, ``options``,
``cluster``),
then ``ingest``, ``embed``, ``compare``, ``publish``, ``validate``, then ``pipeline`` and ``cli``.
Every import is read from the source (lazy imports inside functions included), and a name taken
from the top-level ``drift`` package counts as an import of the module that defines it.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

import drift

PACKAGE = Path(drift.__file__).resolve().parent
LAYERS = {"base": 0, "ingest": 1, "embed": 2, "compare": 3, "publish": 4, "validate": 5,
          "pipeline": 6, "cli": 6, "__main__": 6}
BASE_MODULES = {"runfolder", "errors", "progress", "options", "cluster", "__init__"}


def layer_of(module: str) -> str:
    """The layer of a dotted module name inside drift ('drift.compare.ranking' -> 'compare')."""
    parts = module.split(".")
    if len(parts) < 2 or parts[1] in BASE_MODULES:
        return "base"
    return parts[1]


def module_name(path: Path) -> str:
    rel = path.relative_to(PACKAGE.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def imported_modules(path: Path) -> set[str]:
    """Every drift module the file imports, lazy imports included."""
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.startswith("drift"))
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            if node.module == "drift":
                for alias in node.names:
                    if alias.name in drift._API:
                        found.add(drift._API[alias.name])
                    elif (PACKAGE / f"{alias.name}.py").exists() or (PACKAGE / alias.name).is_dir():
                        found.add(f"drift.{alias.name}")
                    else:  # a name the package itself defines (DriftError, __version__)
                        found.add("drift")
            elif node.module.startswith("drift"):
                found.add(node.module)
    return found


SOURCES = sorted(PACKAGE.rglob("*.py"))


def test_every_module_sits_in_a_known_layer():
    for path in SOURCES:
        assert layer_of(module_name(path)) in LAYERS, module_name(path)


@pytest.mark.parametrize("path", SOURCES, ids=lambda p: module_name(p))
def test_no_module_imports_a_stage_above_its_own(path):
    own = LAYERS[layer_of(module_name(path))]
    upward = sorted(m for m in imported_modules(path) if LAYERS[layer_of(m)] > own)
    assert not upward, f"{module_name(path)} (layer {own}) imports {upward}"


def test_the_check_sees_an_upward_import(tmp_path):
    """The checker itself finds a lazy upward import (guards against a test that cannot fail)."""
    fake = tmp_path / "mod.py"
    fake.write_text("def f():\n    from drift import build_report\n"
                    "    import drift.embed.training\n")
    assert {"drift.publish.report", "drift.embed.training"} <= imported_modules(fake)


def _prints(path: Path) -> list[str]:
    """Calls in ``path`` that write to the screen: print(), typer.echo(), or a console's print,
    and any use of sys.stdout/sys.stderr (doctest examples are strings, so they do not count)."""
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Call):
            func = node.func
            if isinstance(func, ast.Name) and func.id == "print":
                found.append(f"print() at line {node.lineno}")
            elif isinstance(func, ast.Attribute) and func.attr in ("echo", "secho"):
                found.append(f"{func.attr}() at line {node.lineno}")
            elif (isinstance(func, ast.Attribute) and func.attr == "print"
                  and isinstance(func.value, ast.Name) and "console" in func.value.id):
                found.append(f"{func.value.id}.print() at line {node.lineno}")
        elif (isinstance(node, ast.Attribute) and node.attr in ("stdout", "stderr")
              and isinstance(node.value, ast.Name) and node.value.id == "sys"):
            found.append(f"sys.{node.attr} at line {node.lineno}")
    return found


def test_no_library_module_prints():
    """Only the command line (and the one handler in progress.py that the command line installs)
    writes to the screen; the stages log notes and warnings on the 'drift' logger."""
    offenders = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        name = module_name(path)
        if layer_of(name) in ("cli", "__main__") or name == "drift.progress":
            continue
        if found := _prints(path):
            offenders[name] = found
    assert offenders == {}


def test_library_notes_go_to_the_drift_logger(caplog):
    """A note of the library goes to the 'drift' logger, unless quiet; the command line shows
    the logger's records on stderr (tests/test_cli_slice.py checks a note there)."""
    import logging

    from drift.progress import note, warn

    caplog.set_level(logging.INFO, logger="drift")
    note("a note for the user")
    note("a silenced note", quiet=True)
    warn("a warning for the user")
    assert caplog.record_tuples == [("drift", logging.INFO, "a note for the user"),
                                    ("drift", logging.WARNING, "a warning for the user")]
