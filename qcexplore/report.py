"""The HTML report: one self-contained file with the whole investigation, view by view.

The findings come first, then a table of contents and one section per view. BokehJS is
inlined once from the installed bokeh package (no CDN, no external files, and without the
math-typesetting bundle, which no figure of ours uses), so the report opens on a machine
without a network. Every string that comes from
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
from bokeh.resources import Resources

from qcexplore import views
from qcexplore.caution import caution
from qcexplore.files import write_atomic
from qcexplore.investigation import Investigation, study_for
from qcexplore.investigation_file import open_log
from qcexplore.study import Study
from qcexplore.views.base import Card, View
from qcexplore.views.text import log_html, table_html

_STYLE = """
body { font-family: sans-serif; margin: 2em auto; max-width: 1000px; color: #222; }
h1 { font-weight: normal; } h2 { font-weight: normal; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; margin: 0.5em 0 1em; font-size: 0.9em; }
th, td { padding: 2px 8px; text-align: right; border-bottom: 1px solid #eee; }
.qcx-caution { background: #f6f6f6; padding: 0.6em 1em; border-left: 4px solid #999; }
.qcx-error { color: #b00020; }
.qcx-card { border: 1px solid #ddd; border-radius: 6px; padding: 0.6em 1em; margin: 1em 0; }
.qcx-card-headline { font-size: 1.25em; font-weight: bold; }
.qcx-card-sentence { font-size: 1.1em; }
nav.qcx-contents li { margin: 0.2em 0; }
"""
#: BokehJS without its math-typesetting bundle: our figures use no TeX labels, and the
#: bundle would load its typesetter from a CDN if one ever appeared.
_BOKEHJS = Resources(
    mode="inline", components=["bokeh", "bokeh-gl", "bokeh-widgets", "bokeh-tables"]
)


class _Page:
    """Sections of HTML and the bokeh figures they place (embedded together at the end)."""

    def __init__(self) -> None:
        self.parts: list[str] = []
        self.figures: list[LayoutDOM] = []
        self.contents: list[tuple[str, str]] = []

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
        self.contents.append((key, heading))

    def render(self, title: str, caution_text: str) -> str:
        items = "".join(
            f"<li><a href='#{key}'>{html.escape(heading)}</a></li>"
            for key, heading in self.contents
        )
        contents = f"<nav class='qcx-contents'><h2>Contents</h2><ol>{items}</ol></nav>"
        # The findings first, then the contents; the caution closes the page as its small print
        # (the findings board carries it too).
        footer = f"<footer class='qcx-caution'>{html.escape(caution_text)}</footer>"
        first, rest = self.parts[:1], self.parts[1:]
        body = "".join([*first, contents, *rest, footer])
        script = ""
        if self.figures:
            script, divs = components(self.figures)
            for i, div in enumerate(divs):
                body = body.replace(f"<!--figure {i}-->", div)
        return (
            "<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
            f"<title>{html.escape(title)}</title>{_BOKEHJS.render()}"
            f"<style>{_STYLE}</style></head><body>"
            f"<h1>{html.escape(title)}</h1>{body}{script}</body></html>\n"
        )


def _roles(study: Study) -> str:
    roles = study.roles()
    rows = [
        ("measured value", roles["value"]),
        ("units", roles["units"] or ""),
        ("subgroup", roles["subgroup"] or "none: individual values in time order"),
        ("time", roles["time"] or "none: row order"),
        ("factors", ", ".join(roles["factors"]) or "none"),
        ("measured by (sampling and measurement)", ", ".join(roles["measured_by"]) or "none"),
        ("specification", "none" if roles["spec"] is None else _spec_words(roles["spec"])),
        ("values used", f"{len(study)}"),
        ("subgroups", f"{len(study.subgroups)}"),
        ("rows left out (missing or not finite)", f"{study.dropped}"),
        ("data fingerprint", study.fingerprint),
    ]
    return table_html(pd.DataFrame(rows, columns=["role", "column or value"]), "Roles")


def _spec_words(spec: dict[str, Any]) -> str:
    return ", ".join(f"{k} {v:g}" for k, v in spec.items() if v is not None)


def _card(page: _Page, card: Card) -> str:
    figure = page.figure(card.figure.build()) if card.figure is not None else ""
    return f"<article class='qcx-card'>{card.html}{figure}{card.details}</article>"


def _view_section(page: _Page, study: Study, view: View, state: Investigation) -> str:
    """One view as the report prints it: every choice of the result, then its variants."""
    why_not = view.available(study)
    if why_not:
        return f"<p>{html.escape(why_not)}</p>"
    options = view.options_for(study, state)
    result = view.compute(study, options)
    main = view.show(study, result)
    parts = [_card(page, c) for c in main.cards]
    parts += [page.figure(f.build()) for f in main.figures] + [main.html]
    for choice in view.choices(study, result):
        shown = view.show_choice(study, result, choice)
        parts.append(f"<h3>{html.escape(view.choice_label)} {html.escape(choice)}</h3>")
        parts += [page.figure(f.build()) for f in shown.figures] + [shown.html]
    for heading, variant in view.report_variants(study, options):
        parts.append(f"<h3>{html.escape(heading)}</h3>")
        try:
            shown = view.show(study, view.compute(study, variant))
        except Exception as error:
            parts.append(f"<p class='qcx-error'>{html.escape(str(error))}</p>")
            continue
        parts += [page.figure(f.build()) for f in shown.figures]
    return "".join(parts)


def write_report(
    study: Study,
    path: str | Path,
    *,
    log: Investigation | str | Path | None = None,
    title: str | None = None,
) -> Path:
    """Write one self-contained HTML report of a Study and return its path.

    Sections: one per registered view (``qcexplore.views.VIEWS``: the findings first, with
    the log's options and exclusions, if any, then a table of contents), then the roles and
    the investigation log, and the caution.

    Parameters
    ----------
    study : the Study
    path : the HTML file to write
    log : an investigation, or the path of a saved investigation log (refused when it was
        saved on other data): the report shows what the explorer showed with it (the same
        window, specification, options and exclusions)
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
        log = open_log(log, study, views.VIEWS)
    state = log or Investigation.of(study)
    # The Study the investigation looks at, built as the explorer builds it: the same window,
    # specification, options and exclusions.
    study = study_for(study, state)
    title = title or (f"Investigation of {study.value} ({datetime.now(timezone.utc):%Y-%m-%d})")
    page = _Page()
    for view in views.VIEWS:
        page.section(view.name, view.title, lambda v=view: _view_section(page, study, v, state))
    page.section("roles", "The study", lambda: _roles(study))
    page.section("log", "Investigation log", lambda: log_html(state.exclusions, state.notes))
    content = page.render(title, caution(study.units, study.spec)).encode("utf-8")
    return write_atomic(Path(path), content)
