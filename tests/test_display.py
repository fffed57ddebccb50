"""Results as a notebook cell's last line: the figure and a compact table; findings as cards."""

from __future__ import annotations

import html

import pytest
from IPython.core.interactiveshell import InteractiveShell

import qcexplore
from qcexplore.demo import ROLES, filling_line
from qcexplore.study import Study


@pytest.fixture(scope="module")
def study() -> Study:
    return Study(filling_line(days=7)[0], **ROLES)


def test_results_show_their_figure_and_table_in_a_kernel(study: Study) -> None:
    shell = InteractiveShell.instance()
    shell.kernel = object()  # what a Jupyter kernel's shell has and a plain IPython lacks
    try:
        qcexplore._show_results_in_notebooks()
        formatter = shell.display_formatter.mimebundle_formatter
        for result, figure in (
            (study.chart(), "chart_layout"),
            (study.variation(), "components"),
            (study.time_structure(), "acf"),
            (study.capability(), "capability"),
        ):
            shown = formatter(result)  # IPython hands back (data, metadata)
            assert shown and shown[0], type(result).__name__
            page = shown[0]["text/html"]
            assert "<div" in page and "Bokeh" in page and figure in page
            assert "qcexplore-result" in page  # the compact table after the figure
    finally:
        del shell.kernel
        InteractiveShell.clear_instance()


def test_findings_show_as_cards(study: Study) -> None:
    found = study.findings()
    page = found._repr_html_()
    assert page.count("class='qcexplore-finding'") == len(found) > 0
    for finding in found:
        assert html.escape(finding.title) in page and html.escape(finding.sentence) in page
    assert isinstance(found, list)  # API.md: a list of Finding
