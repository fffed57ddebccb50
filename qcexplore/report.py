"""The HTML report: one self-contained file with the whole investigation.

BokehJS is inlined from the installed bokeh package (no CDN, no external files),
so the report opens on a machine without a network. Every string that comes from
the data or the user is escaped. A section whose computation fails shows the
error message in its place; the rest of the report is still written.
"""

from __future__ import annotations

import html
from collections.abc import Callable
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import pandas as pd
from bokeh.embed import components
from bokeh.models import LayoutDOM
from bokeh.resources import INLINE

from qcexplore import draw
from qcexplore.app.state import ExplorerState, chart_arguments, fingerprint, load_log
from qcexplore.app.text import CAUTION, findings_html, log_html, notes_html, table_html

#: A factor gets its own split chart in the report when it has at most this many levels.
SPLIT_LEVELS = 12

_STYLE = """
body { font-family: sans-serif; margin: 2em auto; max-width: 1000px; color: #222; }
h1 { font-weight: normal; } h2 { font-weight: normal; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; margin: 0.5em 0 1em; font-size: 0.9em; }
th, td { padding: 2px 8px; text-align: right; border-bottom: 1px solid #eee; }
.qcx-caution { background: #f6f6f6; padding: 0.6em 1em; border-left: 4px solid #999; }
.qcx-error { color: #b00020; }
"""


class _Page:
    """Sections of HTML and the bokeh figures they place (embedded together at the end)."""

    def __init__(self) -> None:
        self.parts: list[str] = []
        self.figures: list[LayoutDOM] = []

    def figure(self, layout: LayoutDOM) -> str:
        self.figures.append(layout)
        return f"<!--figure {len(self.figures) - 1}-->"

    def section(self, key: str, heading: str, body: Callable[[], str]) -> None:
        placed = len(self.figures)
        try:
            content = body()
        except Exception as error:  # one failing section must not break the report
            del self.figures[placed:]
            kind = "" if isinstance(error, ValueError) else f"{type(error).__name__}: "
            content = (
                f"<p class='qcx-error'>This section could not be computed: "
                f"{html.escape(kind + str(error))}</p>"
            )
        self.parts.append(f"<section id='{key}'><h2>{html.escape(heading)}</h2>{content}</section>")

    def render(self, title: str) -> str:
        body = "".join(self.parts)
        script = ""
        if self.figures:
            script, divs = components(self.figures)
            for i, div in enumerate(divs):
                body = body.replace(f"<!--figure {i}-->", div)
        return (
            "<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
            f"<title>{html.escape(title)}</title>{INLINE.render()}"
            f"<style>{_STYLE}</style></head><body>"
            f"<h1>{html.escape(title)}</h1>{body}{script}</body></html>\n"
        )


def _roles(study: Any) -> str:
    roles = study.roles()
    rows = [
        ("measured value", roles["value"]),
        ("units", roles["units"] or ""),
        ("subgroup", roles["subgroup"] or "none: individual values in time order"),
        ("time", roles["time"] or "none: row order"),
        ("factors", ", ".join(roles["factors"]) or "none"),
        ("measured by (sampling and measurement)", ", ".join(roles["measured_by"]) or "none"),
        ("specification", "none" if roles["spec"] is None else _spec_words(roles["spec"])),
        ("values used", f"{len(study.frame)}"),
        ("subgroups", f"{len(study.subgroups)}"),
        ("rows left out (missing or not finite)", f"{study.dropped}"),
        ("data fingerprint", fingerprint(study.frame, roles)),
    ]
    return table_html(pd.DataFrame(rows, columns=["role", "column or value"]), "Roles")


def _spec_words(spec: dict[str, Any]) -> str:
    return ", ".join(f"{k} {v:g}" for k, v in spec.items() if v is not None)


def _chart(page: _Page, study: Any, state: ExplorerState) -> str:
    result = study.chart(**chart_arguments(state, study))
    limits = result.limits
    return (
        page.figure(draw.chart_figure(result))
        + table_html(limits, "Limits")
        + table_html(result.points[result.points["signal"]], "Signals", rows=30)
        + notes_html(result.notes)
    )


def _split_charts(page: _Page, study: Any, state: ExplorerState) -> str:
    parts = []
    for factor in study.factors:
        levels = study.frame[factor].cat.categories
        if len(levels) > SPLIT_LEVELS:
            parts.append(
                f"<p>{html.escape(factor)}: {len(levels)} levels, too many for one chart.</p>"
            )
            continue
        arguments = chart_arguments(state.replace(by=factor), study)
        try:
            result = study.chart(**arguments)
        except Exception as error:
            parts.append(
                f"<p class='qcx-error'>Split by {html.escape(factor)}: "
                f"{html.escape(str(error))}</p>"
            )
            continue
        parts.append(f"<h3>Split by {html.escape(factor)}</h3>")
        parts.append(page.figure(draw.chart_figure(result)))
    return "".join(parts) or "<p>The study has no factors to split by.</p>"


def _variation(page: _Page, study: Any) -> str:
    result = study.variation()
    parts = [
        table_html(result.structure, "How the factors relate to the subgroups"),
        table_html(result.anova, "Analysis of variance (with the error term each test uses)"),
        table_html(result.components, "Variance components"),
        page.figure(draw.components_figure(result)),
        page.figure(draw.multivari_figure(result)),
    ]
    if len(result.offsets):
        parts.append(table_html(result.offsets, "Sampling and measurement offsets"))
    for factor, table in result.comparisons.items():
        parts.append(page.figure(draw.anom_figure(result, factor)))
        parts.append(table_html(table, f"Comparisons of the levels of {factor}", rows=40))
    if len(result.spread):
        parts.append(table_html(result.spread, "Equal spread between levels?"))
    return "".join(parts) + notes_html(result.notes)


def _time(page: _Page, study: Any) -> str:
    result = study.time_structure()
    return (
        page.figure(draw.acf_figure(result))
        + page.figure(draw.shifts_figure(result))
        + table_html(result.ljung_box, "Ljung-Box tests of autocorrelation")
        + table_html(pd.DataFrame([result.ar1]), "First-order autoregressive fit")
        + table_html(result.shifts, "Step changes")
        + notes_html(result.notes)
    )


def _capability(page: _Page, study: Any) -> str:
    if study.spec is None:
        return "<p>No specification was given, so capability is not computed.</p>"
    result = study.capability()
    return (
        page.figure(draw.capability_figure(result))
        + table_html(result.indices, "Capability indices")
        + table_html(result.ppm, "Parts per million outside the specification")
        + table_html(result.normality, "Normality")
        + notes_html(result.warnings)
    )


def write_report(
    study: Any,
    path: str | Path,
    *,
    log: ExplorerState | str | Path | None = None,
    title: str | None = None,
) -> Path:
    """Write one self-contained HTML report of a Study and return its path.

    Sections: the roles, the control chart (with the log's settings and
    exclusions, if any) and the chart split by each factor, the sources of
    variation, the time structure, capability (when the study has a
    specification), the findings, the investigation log and the caution.

    Parameters
    ----------
    study : the Study
    path : the HTML file to write
    log : an explorer state, or the path of a saved investigation log (refused when
        it was saved on other data)
    title : the report's title (default: the value and the date)

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from qcexplore.demo import filling_line
    >>> from qcexplore.study import Study
    >>> s = Study(filling_line(days=2)[0], value="net_g", subgroup="round")
    >>> out = write_report(s, pathlib.Path(tempfile.mkdtemp()) / "r.html")
    >>> out.suffix
    '.html'
    """
    if isinstance(log, (str, Path)):
        log = load_log(log, data_id=fingerprint(study.frame, study.roles()))
    state = log or ExplorerState(value=study.value, subgroup=study.subgroup, time=study.time)
    title = title or (f"Investigation of {study.value} ({datetime.now(timezone.utc):%Y-%m-%d})")
    page = _Page()
    page.parts.append(f"<p class='qcx-caution'>{html.escape(CAUTION)}</p>")
    page.section("roles", "The study", lambda: _roles(study))
    page.section("chart", "Chart", lambda: _chart(page, study, state))
    page.section("split", "Chart split by each factor", lambda: _split_charts(page, study, state))
    page.section("variation", "Where the variation comes from", lambda: _variation(page, study))
    page.section("time", "Over time", lambda: _time(page, study))
    page.section("capability", "Against the specification", lambda: _capability(page, study))
    page.section("findings", "What the data say", lambda: findings_html(study.findings()))
    page.section("log", "Investigation log", lambda: log_html(state.exclusions, state.notes))
    path = Path(path)
    path.write_text(page.render(title), encoding="utf-8")
    return path
