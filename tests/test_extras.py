"""The statistics need only the required dependencies; drawing libraries are an extra.

``pip install qcexplore`` gives numpy, pandas, scipy and threadpoolctl; bokeh, ipywidgets and
jupyter_bokeh come with the ``explore`` extra, and statsmodels is a reference library of the
tests only (pyproject.toml). A fresh Python with those libraries made unimportable runs the
statistics on the demo, and the explorer and the report say which extra to install.
"""

from __future__ import annotations

import ast
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import qcexplore
from qcexplore.errors import EXPLORE_MODULES

PACKAGE = Path(qcexplore.__file__).parent
#: Not required by the package: the drawing extra and the tests' reference library.
BLOCKED = (*EXPLORE_MODULES, "statsmodels")

_WITHOUT_EXTRAS = textwrap.dedent(
    """
    import sys
    from importlib.abc import MetaPathFinder

    BLOCKED = {blocked!r}


    class NotInstalled(MetaPathFinder):
        # First on sys.meta_path: these modules import as if they were not installed.
        def find_spec(self, name, path=None, target=None):
            if name.split(".")[0] in BLOCKED:
                raise ModuleNotFoundError(f"No module named {{name!r}}", name=name)
            return None


    sys.meta_path.insert(0, NotInstalled())

    import qcexplore as qx

    frame, truth = qx.demo.filling_line(days=10)
    s = qx.Study(frame, **qx.demo.ROLES)
    results = [
        s.chart(), s.variation(), s.time_structure(), s.capability(), s.findings(),
        qx.arl("xbar_r", shift=1.0, n=5), qx.constants(5),
    ]
    for result in results:
        repr(result)
        getattr(result, "_repr_html_", lambda: "")()
    print("statistics ran")
    for name, call in (("explore", s.explore), ("report", lambda: s.report("unused.html"))):
        try:
            call()
        except ModuleNotFoundError as error:
            print(name, "refused:", error)
        else:
            print(name, "ran without the extra")
    print("imported:", sorted(m for m in sys.modules if m.split(".")[0] in BLOCKED))
    """
)


def test_statistics_run_without_the_drawing_extra_and_statsmodels(tmp_path: Path) -> None:
    script = _WITHOUT_EXTRAS.format(blocked=BLOCKED)
    run = subprocess.run(
        [sys.executable, "-c", script],
        cwd=tmp_path,
        env={**os.environ, "PYTHONPATH": str(PACKAGE.parent)},
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert run.returncode == 0, run.stderr
    lines = run.stdout.splitlines()
    assert "statistics ran" in lines
    extra = 'which the statistics alone do not: install it with pip install "qcexplore[explore]".'
    assert [line for line in lines if line.startswith(("explore", "report"))] == [
        f"explore refused: The explorer needs ipywidgets, {extra}",
        f"report refused: The report needs bokeh, {extra}",
    ]
    assert lines[-1] == "imported: []"


def test_the_package_never_imports_statsmodels() -> None:
    # statsmodels checks the statistics in the tests; the package computes without it.
    importers = []
    for path in PACKAGE.rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            names = [a.name for a in node.names] if isinstance(node, ast.Import) else []
            if isinstance(node, ast.ImportFrom) and not node.level:
                names = [node.module or ""]
            if any(n.split(".")[0] == "statsmodels" for n in names):
                importers.append(f"{path.relative_to(PACKAGE)}:{node.lineno}")
    assert importers == []
