"""Tiny task functions for the engine tests, in a module of their own so that spawned worker
processes import only this (and drift.errors), not the test module and its heavy imports."""

from __future__ import annotations

import os

from drift.errors import DriftError


def square(task, report=None):
    """Square ``task["value"]``; a negative value raises a DriftError in the worker."""
    if report is not None:
        report(1, 1)
    if task["value"] < 0:
        raise DriftError(f"negative value {task['value']}")
    return {"key": task["key"], "square": task["value"] ** 2, "pid": os.getpid()}


def die(task, report=None):
    """End the worker process at once, as an out-of-memory kill would."""
    os._exit(3)
