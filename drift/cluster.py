"""Dask connections shared by the stages that run on a cluster (slicing and training).

Dask is optional: :func:`import_distributed` says how to install it. :func:`connect_dask` reaches
a scheduler or says plainly why not; :func:`main_module_kept_from_workers` keeps a caller's
script from being run again in every worker process that starts.
"""

from __future__ import annotations

import contextlib
import sys
from collections.abc import Callable, Iterator
from typing import Any

from drift.errors import DriftError

#: Seconds to wait for a Dask scheduler before giving up with a message.
CONNECT_TIMEOUT_S = 5.0


def import_distributed() -> Any:
    """The ``distributed`` package, or a DriftError saying how to install it."""
    try:
        import distributed
    except ImportError:
        raise DriftError(
            "--engine dask needs Dask's distributed scheduler; install it with "
            "pip install 'lexical-drift[dask]' or use --engine local."
        ) from None
    return distributed


def connect_dask(address: str, timeout_s: float = CONNECT_TIMEOUT_S) -> Any:
    """A Dask client for the scheduler at ``address``, or a DriftError naming the address."""
    distributed = import_distributed()
    try:
        return distributed.Client(address, timeout=timeout_s, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        reason = str(exc).split("\n")[0][:160] or exc.__class__.__name__
        raise DriftError(
            f"Could not reach the Dask scheduler at {address} within {timeout_s:g} s ({reason}); "
            "check the address and that the scheduler is running (nothing was written)."
        ) from None


@contextlib.contextmanager
def main_module_kept_from_workers(function: Callable[..., Any] | None = None) -> Iterator[None]:
    """While worker processes start, hide the caller's main script from them.

    Spawned and fork-server workers (a process pool's, a LocalCluster's) normally import the
    parent's ``__main__`` file again (as ``__mp_main__``), which runs every top-level line of a
    script written without an ``if __name__ == "__main__":`` guard: the script would start a
    second run inside each worker. drift's task functions live in drift's own modules, so the
    workers do not need the script; ``multiprocessing`` skips it when ``__main__`` has no
    ``__file__`` and no ``__spec__``. A task ``function`` defined in the script itself still gets
    the script.
    """
    main = sys.modules.get("__main__")
    if main is None or getattr(function, "__module__", None) == "__main__":
        yield
        return
    names = ("__file__", "__spec__")
    saved = {name: main.__dict__[name] for name in names if name in main.__dict__}
    main.__dict__.pop("__file__", None)
    main.__dict__["__spec__"] = None
    try:
        yield
    finally:
        main.__dict__.pop("__spec__", None)
        main.__dict__.update(saved)
