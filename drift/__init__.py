"""drift: find which words changed meaning across a dated text archive, when, and how.

Each pipeline stage is a library function that reads the previous stage's files in a run folder
and writes its own (see DEVELOPERS.md). The command line is a thin layer over these functions.
"""

from drift.errors import DriftError
from drift.runfolder import RunPaths, package_version

__version__ = package_version()

__all__ = ["DriftError", "RunPaths", "__version__"]
