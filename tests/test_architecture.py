"""The package's shape: imports flow one way through the layers, and the views are the one
description of each analysis that the explorer and the report both show."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest
from bokeh.plotting import figure

import qcexplore
from qcexplore import views
from qcexplore.app.explorer import Explorer
from qcexplore.demo import ROLES, filling_line
from qcexplore.study import Study
from qcexplore.views.base import Figure, Shown, View

PACKAGE = Path(qcexplore.__file__).parent

#: data -> stats -> options -> findings / draw -> study -> views -> app / report -> cli. Findings
#: and draw read results only, so they sit below the Study that hands them out. A module may
#: import its own package and the layers below; members that share a rank (findings and
#: draw, app and report) may not import each other.
LAYERS: list[tuple[str, ...]] = [
    ("qcexplore.errors",),
    ("qcexplore.words", "qcexplore.files"),
    ("qcexplore.caution", "qcexplore.demo"),
    ("qcexplore.data",),
    ("qcexplore.spec",),
    ("qcexplore.stats",),
    ("qcexplore.options",),
    ("qcexplore.story",),
    ("qcexplore.findings", "qcexplore.draw"),
    ("qcexplore.study",),
    ("qcexplore.investigation",),
    ("qcexplore.investigation_file",),
    ("qcexplore.views",),
    ("qcexplore.app", "qcexplore.report"),
    ("qcexplore.cli",),
    ("qcexplore.__main__",),
]
#: The only imports that go up the layers: the Study's two lazy one-line delegations of
#: API.md (``Study.explore()`` and ``Study.report()``).
ALLOWED_UPWARD = {
    ("qcexplore.study", "explore", "qcexplore.app.explorer"),
    ("qcexplore.study", "report", "qcexplore.report"),
}


def _module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _unit(module: str) -> tuple[int, str]:
    """The layer rank and the package (layer member) a module belongs to."""
    for rank, members in enumerate(LAYERS):
        for member in members:
            if module == member or module.startswith(member + "."):
                return rank, member
    raise AssertionError(f"{module} is in no layer: add it to LAYERS")


def _imports(path: Path) -> list[tuple[str, str]]:
    """(enclosing function or '', imported qcexplore module) for every import in a file."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    module = _module_name(path)
    package = module if path.name == "__init__.py" else module.rsplit(".", 1)[0]
    found: list[tuple[str, str]] = []

    def visit(node: ast.AST, function: str) -> None:
        for child in ast.iter_child_nodes(node):
            inner = function
            if isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef)):
                inner = child.name
            if isinstance(child, ast.Import):
                found.extend((inner, a.name) for a in child.names if a.name.startswith("qcexplore"))
            elif isinstance(child, ast.ImportFrom):
                base = child.module or ""
                if child.level:
                    anchor = package.split(".")[: len(package.split(".")) - child.level + 1]
                    base = ".".join([*anchor, base] if base else anchor)
                if base.startswith("qcexplore"):
                    # ``from qcexplore import draw`` imports the module qcexplore.draw.
                    for alias in child.names:
                        name = f"{base}.{alias.name}"
                        is_module = (PACKAGE.parent / name.replace(".", "/")).with_suffix(".py")
                        is_package = PACKAGE.parent / name.replace(".", "/") / "__init__.py"
                        named = is_module.exists() or is_package.exists()
                        found.append((inner, name if named else base))
            visit(child, inner)

    visit(tree, "")
    return found


def test_imports_follow_the_layers_and_make_no_loop() -> None:
    wrong = []
    graph: dict[str, set[str]] = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        module = _module_name(path)
        if module == "qcexplore":  # the public names: the one module above every layer
            continue
        rank, unit = _unit(module)
        for function, target in _imports(path):
            if target == "qcexplore":
                wrong.append(f"{module} imports the package root")
                continue
            target_rank, target_unit = _unit(target)
            graph.setdefault(unit, set()).add(target_unit)
            upward = target_rank > rank or (target_rank == rank and target_unit != unit)
            if upward and (module, function, target) not in ALLOWED_UPWARD:
                wrong.append(f"{module} ({function or 'top level'}) imports {target}")
    assert not wrong, "imports against the layer order:\n" + "\n".join(wrong)
    # No loop between layer members once the two named delegations are set aside.
    graph["qcexplore.study"] -= {"qcexplore.app", "qcexplore.report"}
    seen: dict[str, int] = {}

    def walk(unit: str, trail: tuple[str, ...]) -> None:
        if seen.get(unit) == 2:
            return
        assert seen.get(unit) != 1, f"import loop: {' -> '.join((*trail, unit))}"
        seen[unit] = 1
        for nxt in graph.get(unit, ()):
            if nxt != unit:
                walk(nxt, (*trail, unit))
        seen[unit] = 2

    for unit in list(graph):
        walk(unit, ())


def test_the_contract_test_sees_an_upward_import(tmp_path: Path) -> None:
    # A check that cannot fail is no check: an import of draw from stats must be caught.
    path = PACKAGE / "stats" / "_contract_probe.py"
    path.write_text("from qcexplore.draw import chart_figure\n", encoding="utf-8")
    try:
        with pytest.raises(AssertionError, match="qcexplore.stats._contract_probe"):
            test_imports_follow_the_layers_and_make_no_loop()
    finally:
        path.unlink()


class _CountView(View):
    """A view no module knows about: the number of values per subgroup, as a bar chart."""

    name = "counts"
    title = "Values per subgroup"

    def compute(self, study, options):
        return study.data.groupby(study.subgroup, observed=True).size().rename("n")

    def show(self, study, result):
        def build():
            fig = figure(title="Values per subgroup", name="counts_figure")
            fig.vbar(x=list(range(len(result))), top=result.tolist(), width=0.8)
            return fig

        return Shown(
            figures=(Figure("counts", build, result),),
            html="<p class='qcx-counts'>counts of values per subgroup</p>",
            summary=f"{len(result)} subgroups",
        )


@pytest.fixture
def counts_view():
    view = views.register(_CountView())
    yield view
    views.unregister(view.name)


def test_a_registered_view_appears_in_the_explorer_and_the_report(
    counts_view: View, tmp_path: Path
) -> None:
    study = Study(filling_line(days=2)[0], **ROLES)
    ex = Explorer(study)
    assert counts_view.title in ex.tabs.titles
    ex.tabs.selected_index = list(ex.tabs.titles).index(counts_view.title)
    assert "qcx-counts" in ex.texts["counts"].value
    assert ex.slots["counts"].layout.name == "counts_figure"
    assert "Values per subgroup: 48 subgroups" in ex.status.value
    page = study.report(tmp_path / "r.html").read_text(encoding="utf-8")
    assert "<section id='counts'><h2>Values per subgroup</h2>" in page
    assert "qcx-counts" in page and "counts_figure" in page


def test_every_choice_has_words_and_every_word_a_choice() -> None:
    from qcexplore.options import KIND_LABELS, LIMIT_LABELS, SIGMA_LABELS
    from qcexplore.stats.charts import AUTO, LIMIT_MODES, SIGMA_METHODS, chart_kinds

    assert tuple(KIND_LABELS) == (AUTO, *chart_kinds())
    assert tuple(LIMIT_LABELS) == LIMIT_MODES
    assert tuple(SIGMA_LABELS) == SIGMA_METHODS


def test_a_chart_option_is_refused_in_the_same_words_everywhere() -> None:
    from qcexplore.errors import QCDataError
    from qcexplore.options import ChartOptions

    study = Study(filling_line(days=2)[0], **ROLES)
    messages = set()
    for attempt in (
        lambda: ChartOptions(lam=0),
        lambda: study.chart(lam=0),
        lambda: ChartOptions.from_dict({"lam": 0}),
    ):
        with pytest.raises(QCDataError) as error:
            attempt()
        messages.add(str(error.value))
    assert len(messages) == 1 and "lam" in messages.pop()


#: The hosts: they build Studies only through ``qcexplore.investigation`` (``study_for`` for an
#: investigation, ``open_study`` for a table as given), so the report, the command line and the
#: explorer cannot disagree about what an investigation looks at.
HOSTS = ("views", "app", "report.py", "cli.py")


def test_hosts_build_studies_only_through_the_investigation() -> None:
    found = []
    for host in HOSTS:
        place = PACKAGE / host
        for path in sorted(place.rglob("*.py") if place.is_dir() else [place]):
            for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
                called = getattr(node, "func", None)
                name = getattr(called, "id", None) or getattr(called, "attr", None)
                if isinstance(node, ast.Call) and name in ("Study", "restrict"):
                    found.append(f"{path.relative_to(PACKAGE)}:{node.lineno} calls {name}")
    assert not found, "\n".join(found)


def test_findings_read_results_only() -> None:
    """Findings are worded from the evidence bundle: no data table, no Study, no tests of their
    own (the sample sizes of a next step come from stats.plans)."""
    allowed = (
        "qcexplore.stats.results", "qcexplore.stats.shape", "qcexplore.stats.plans",
        "qcexplore.story",
        "qcexplore.errors", "qcexplore.words", "qcexplore.caution", "qcexplore.data.coding",
    )  # fmt: skip
    for path in (PACKAGE / "findings.py", PACKAGE / "story.py"):
        for _function, target in _imports(path):
            assert target.startswith(allowed), f"{path.name} imports {target}"


def test_a_new_chart_kind_is_one_family_and_one_registry_entry(tmp_path: Path) -> None:
    """Registered once, a kind is offered by the options and the explorer's control, computed
    by the Study, drawn with its words and printed by the report."""
    import dataclasses

    from qcexplore.investigation import Investigation
    from qcexplore.options import KIND_LABELS, ChartOptions
    from qcexplore.stats.charts import ChartKind, register_kind, unregister_kind
    from qcexplore.stats.charts.variables import variables_chart

    def doubled_means(request):  # a family of its own: the X-bar/R chart under another name
        chart = variables_chart(dataclasses.replace(request, kind="xbar_r"))
        return dataclasses.replace(chart, kind="doubled")

    register_kind(
        ChartKind("doubled", "means, once more", "Means once more (test kind)", "Mean again",
                  doubled_means, secondary="r")
    )  # fmt: skip
    try:
        assert KIND_LABELS["doubled"] == "means, once more"
        study = Study(filling_line(days=2)[0], **ROLES)
        assert study.chart("doubled").kind == "doubled"
        explorer = Explorer(study)
        explorer.set(kind="doubled")
        explorer.show_view("chart")
        assert "means, once more" in explorer.panels["chart"].controls.widgets["kind"].options[-1]
        chart = explorer.slots["chart"].layout
        assert chart.select_one({"name": "chart"}).yaxis[0].axis_label == "Mean again"
        state = Investigation.of(study).with_options("chart", ChartOptions(kind="doubled"))
        page = study.report(tmp_path / "r.html", log=state).read_text(encoding="utf-8")
        assert "Mean again" in page
    finally:
        unregister_kind("doubled")
    assert "doubled" not in KIND_LABELS
