# ruff: noqa: I001  (command modules are imported in the order the help lists them)
"""Command line: parses options and calls the library. One module per command group.

Every command module registers its commands on :data:`drift.cli.app.app`. ``main`` turns a
:class:`~drift.errors.DriftError` into one plain sentence on stderr and exit code 2, and any other
exception into exit code 1 (set ``DRIFT_DEBUG=1`` to see the traceback).
"""

from __future__ import annotations

import os
import sys

# The command modules register their commands on import, in the order `drift --help` lists them.
from drift.cli import cmd_slice  # noqa: F401
from drift.cli import cmd_train  # noqa: F401
from drift.cli import cmd_rank  # noqa: F401
from drift.cli import cmd_chart  # noqa: F401
from drift.cli import cmd_evidence  # noqa: F401
from drift.cli import cmd_pipeline  # noqa: F401
from drift.cli.app import app
from drift.errors import DriftError

EXIT_UNEXPECTED = 1
EXIT_BAD_INPUT = 2


def main(argv: list[str] | None = None) -> None:
    """Entry point of the ``drift`` console script."""
    try:
        app(args=argv, prog_name="drift", standalone_mode=True)
    except DriftError as exc:
        print(f"drift: {exc}", file=sys.stderr)
        sys.exit(EXIT_BAD_INPUT)
    except KeyboardInterrupt:
        print("drift: interrupted; finished stages are kept and a rerun resumes.", file=sys.stderr)
        sys.exit(130)
    except Exception as exc:  # noqa: BLE001 - the last line of defence for the user
        if os.environ.get("DRIFT_DEBUG"):
            raise
        print(
            f"drift: unexpected failure ({exc.__class__.__name__}: {exc}); "
            "rerun with DRIFT_DEBUG=1 for details and report it.",
            file=sys.stderr,
        )
        sys.exit(EXIT_UNEXPECTED)
