"""qcexplore: find out why a measured characteristic varies.

The public names of the package; everything else is internal. Statistics-only
use does not import bokeh or ipywidgets: the names that need them load lazily.
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

from qcexplore import demo
from qcexplore.data.io import read
from qcexplore.data.reshape import to_long
from qcexplore.errors import QCDataError
from qcexplore.spec import Spec
from qcexplore.study import Study

__version__ = "0.1.0"

_LAZY = {
    "constants": "qcexplore.stats.constants",
    "arl": "qcexplore.stats.arl",
    "arl_detail": "qcexplore.stats.arl",
    "gauge_study": "qcexplore.stats.gauge",
    "Finding": "qcexplore.stats.results",
}


def explore(frame: Any, **study_arguments: Any) -> Any:
    """``qx.Study(frame, **study_arguments).explore()``: the interactive explorer."""
    return Study(frame, **study_arguments).explore()


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        return getattr(import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'qcexplore' has no attribute {name!r}")


__all__ = [
    "QCDataError",
    "Spec",
    "Study",
    "arl",
    "arl_detail",
    "constants",
    "demo",
    "explore",
    "gauge_study",
    "read",
    "to_long",
    "Finding",
]
