"""Errors a user can act on.

Every message names the file (or row) at fault and says what to do. The command line prints the
message on one line and exits with code 2; no traceback is shown for these.
"""

from __future__ import annotations


class TopoclassError(Exception):
    """Base class: a problem with the user's input, settings or files, not a bug."""


class ImageReadError(TopoclassError):
    """A micrograph file cannot be read or holds no usable image."""


class PatternError(TopoclassError):
    """An image was read but holds no usable lattice pattern (for example too few sites)."""


class LabelSheetError(TopoclassError):
    """A label sheet (CSV or class folders) is malformed; the message lists every problem."""


class ModelFileError(TopoclassError):
    """A model folder is missing, altered, untrusted or written by an incompatible version."""


class ClusterError(TopoclassError):
    """A Dask scheduler cannot be reached or was lost mid-run; the message says what to do."""


class StoreError(TopoclassError):
    """A results store cannot be reached, opened or written; the message names it (and host)."""
