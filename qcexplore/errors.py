"""The one error that bad input raises, and the one message for a missing optional extra."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager


class QCDataError(ValueError):
    """Raised for data or arguments that qcexplore cannot use.

    The message names the column(s), the first offending rows and what to do
    about it, so that a user can fix the source file without reading a traceback.
    """


#: What ``pip install "qcexplore[explore]"`` adds (pyproject.toml): the explorer and the
#: report draw with these; the statistics never import them.
EXPLORE_MODULES = ("bokeh", "ipywidgets", "jupyter_bokeh")


@contextmanager
def explore_extra(what: str) -> Iterator[None]:
    """Imports in the block that miss a drawing library fail with the extra to install.

    Examples
    --------
    >>> with explore_extra("The explorer"):
    ...     raise ModuleNotFoundError("No module named 'bokeh'", name="bokeh")
    Traceback (most recent call last):
    ...
    ModuleNotFoundError: The explorer needs bokeh, which the statistics alone do not: \
install it with pip install "qcexplore[explore]".
    """
    try:
        yield
    except ModuleNotFoundError as error:
        missing = error.name or ""
        if missing.split(".")[0] not in EXPLORE_MODULES:
            raise
        raise ModuleNotFoundError(
            f"{what} needs {missing}, which the statistics alone do not: install it with "
            'pip install "qcexplore[explore]".',
            name=missing,
        ) from error
