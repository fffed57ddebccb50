"""qcexplore: find out why a measured characteristic varies.

The public names of the package; everything else is internal. Statistics-only
use does not import bokeh or ipywidgets: the names that need them load lazily.
"""

from __future__ import annotations

from importlib import import_module
from importlib.util import find_spec
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


def _show_results_in_notebooks() -> None:
    """In a notebook, a result as a cell's last line shows its figure and a compact table."""
    try:
        from IPython import get_ipython
    except ImportError:
        return
    shell = get_ipython()
    if shell is None or getattr(shell, "kernel", None) is None or find_spec("bokeh") is None:
        return  # without bokeh (no "explore" extra) results show as text

    def bundle(result: Any, include: Any = None, exclude: Any = None) -> dict[str, str]:
        # bokeh is imported when the first result is shown, not with the package.
        return import_module("qcexplore.app.display").bundle(result)

    formatter = shell.display_formatter.mimebundle_formatter
    for name in ("ChartResult", "VariationResult", "TimeResult", "CapabilityResult"):
        formatter.for_type_by_name("qcexplore.stats.results", name, bundle)


_show_results_in_notebooks()


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
