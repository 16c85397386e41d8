"""Run archives: one zarr v3 group per run, arrays growing along a time axis.

Layout: :mod:`penumbra_server.archive._layout` (documented in the README). Writing:
:class:`ArchiveWriter` (synchronous; the server runs it on a worker thread). Reading:
:func:`open_archive`, :func:`list_archives`.
"""

from ._layout import (
    ARCHIVE_FORMAT_VERSION,
    METHOD_CODES,
    SLICE_COLUMNS,
    SLICE_OUTCOME_FAILED,
    SLICE_OUTCOME_PROCESSED,
    SLICE_OUTCOME_SKIPPED,
    UNITS,
    archive_path,
    surface_columns,
    surface_group,
)
from .displacement import ArchivedDisplacement, displacement_from_row, displacement_row
from .reader import ArchiveSummary, ArchiveView, list_archives, open_archive
from .writer import ArchiveError, ArchiveWriter, FoldPolicy

__all__ = [
    "ARCHIVE_FORMAT_VERSION",
    "METHOD_CODES",
    "SLICE_COLUMNS",
    "SLICE_OUTCOME_FAILED",
    "SLICE_OUTCOME_PROCESSED",
    "SLICE_OUTCOME_SKIPPED",
    "UNITS",
    "ArchiveError",
    "ArchivedDisplacement",
    "displacement_from_row",
    "displacement_row",
    "ArchiveSummary",
    "ArchiveView",
    "ArchiveWriter",
    "FoldPolicy",
    "archive_path",
    "list_archives",
    "open_archive",
    "surface_columns",
    "surface_group",
]
