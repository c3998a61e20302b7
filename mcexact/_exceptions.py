"""Exception classes of mcexact.

Every error that mcexact raises on purpose derives from :class:`McexactError`, so that
callers can catch the package's own complaints apart from programming errors.
"""

from __future__ import annotations

__all__ = ["McexactError", "DataError", "BudgetExceeded", "FileFormatError"]


class McexactError(Exception):
    """Base class of every error raised by mcexact on purpose."""


class DataError(McexactError, ValueError):
    """The data or the model specification cannot be analysed as given.

    Attributes
    ----------
    column : str or None
        The offending column, where one can be named.
    row : object or None
        The label (index value) of the first offending row, where one can be named.
    """

    def __init__(self, message: str, *, column: str | None = None, row: object = None):
        super().__init__(message)
        self.column = column
        self.row = row


class BudgetExceeded(McexactError):
    """An exact computation would need more network nodes than allowed.

    Attributes
    ----------
    what : str
        Which network overflowed (``"nuisance"`` or ``"full"``) or which limit was hit.
    reached : int
        The number of nodes (or arcs) reached when the computation stopped.
    limit : int
        The budget in force.
    stage : int or None
        The stage at which the budget was exceeded.
    """

    def __init__(self, message: str, *, what: str, reached: int, limit: int,
                 stage: int | None = None):
        super().__init__(message)
        self.what = what
        self.reached = int(reached)
        self.limit = int(limit)
        self.stage = stage


class FileFormatError(McexactError):
    """A file handed to mcexact is not one it wrote, or is damaged or of an unknown version."""
