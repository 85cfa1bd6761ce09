"""Errors and warnings raised by tubetrack.

Library code raises :class:`TubetrackError` subclasses for problems a user can fix (bad input,
missing data, a store in use). The CLI catches only these, prints ``Error: <message>`` on stderr
and exits 1. Anything else is a bug and keeps its traceback.

Messages say what went wrong, where (file, line, field), the offending value, and the next step.
"""

from __future__ import annotations


class TubetrackError(Exception):
    """Base class for user-facing errors."""


class InputError(TubetrackError):
    """An input file or argument cannot be used as given."""


class ProfileError(InputError):
    """A layout profile (TOML) is invalid: unknown field, bad unit, bad regular expression."""


class StoreError(TubetrackError):
    """The store cannot be opened or is in an unexpected state."""


class StoreBusyError(StoreError):
    """Another process holds the store's write lock."""


class NotFoundError(TubetrackError):
    """A requested tube, system or result does not exist in the store."""


class AnalysisError(TubetrackError):
    """An analysis cannot run on the data given (too little data, a fit that fails)."""


class TubetrackWarning(UserWarning):
    """A result is usable but weak (little history, extrapolation far past the data)."""
