"""The one error that bad input raises."""

from __future__ import annotations


class QCDataError(ValueError):
    """Raised for data or arguments that qcexplore cannot use.

    The message names the column(s), the first offending rows and what to do
    about it, so that a user can fix the source file without reading a traceback.
    """
