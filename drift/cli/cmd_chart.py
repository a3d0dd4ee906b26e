"""Commands of the chart stage (filled in as the stage is built)."""

from drift.cli.app import app  # noqa: F401
