"""Results carry the settings they were computed with, never a cache neighbour's.

Reference: the same request answered by a fresh ``Workbench`` (nothing cached, so nothing
borrowed) and the request's own ``Settings`` object. One shared Workbench answers every
transform × centring combination in sequence (as one server does for several sessions).
"""
from __future__ import annotations

import itertools
import re
from datetime import datetime, timezone

import pytest

from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.preparation.loading import Dataset
from analysis.models.modelstage import ModelChoices
from analysis.options import CENTER_WORDS, TRANSFORMS
from analysis.pipeline import Workbench
from analysis.output.report import build_report, x_description

CENTRINGS = (*CENTER_WORDS, 2.0)
COMBOS = list(itertools.product(TRANSFORMS, CENTRINGS))
CHOICES = ModelChoices(structures=("intercept",), gee=())   # one quick fit per combination
STAMP = datetime(2026, 1, 1, tzinfo=timezone.utc)


@pytest.fixture(scope="module")
def dataset():
    df = load_demo()
    keep = df["recipient_id"].unique()[:200]
    return Dataset.from_frame(df[df["recipient_id"].isin(keep)].reset_index(drop=True),
                              name="subset.csv")


def _answers(wb: Workbench, dataset, settings):
    roles = demo_roles()
    exploration = wb.explore(dataset, roles, settings)
    models = wb.models(dataset, roles, settings, CHOICES)
    report = build_report(exploration.cohort, exploration, models, data_name=dataset.name,
                          data_key=dataset.key, choices=CHOICES, created=STAMP)
    return {
        "statement": models.effect.statement,
        "x": x_description(exploration.cohort),
        "report": report,
        "json_settings": exploration.to_json()["settings"],
    }


def _settings_table(report: str) -> dict[str, str]:
    part = report.split("<h3>Settings</h3>", 1)[1].split("</table>", 1)[0]
    cells = re.findall(r"<t[dh][^>]*>(.*?)</t[dh]>", part)
    return dict(zip(cells[2::2], cells[3::2]))


def test_every_transform_and_centring_in_sequence_matches_a_fresh_workbench(dataset):
    shared = Workbench()
    base = demo_settings()
    # ask in both orders so every combination has a cached neighbour before it
    for transform, center in COMBOS + COMBOS[::-1]:
        s = base.replace(transform=transform, center=center)
        got = _answers(shared, dataset, s)
        ref = _answers(Workbench(), dataset, s)
        label = f"{transform} / {center}"
        assert got["statement"] == ref["statement"], label
        assert got["x"] == ref["x"], label
        assert got["report"] == ref["report"], label
        # the request's own settings object is the reference for the JSON and the table
        assert got["json_settings"] == s.to_dict(), label
        table = _settings_table(got["report"])
        assert table["transform"] == transform, label
        assert table["center"] == str(center), label
        if center == "none":
            assert "not centred" in got["x"], label


def test_other_choices_of_an_earlier_request_do_not_leak(dataset):
    """Settings outside a stage's key (detrending, bins) are the request's own in the outputs."""
    shared = Workbench()
    roles = demo_roles()
    first = demo_settings().replace(detrend="lowess", variogram_bins=7)
    second = demo_settings()
    shared.explore(dataset, roles, first)
    out = shared.explore(dataset, roles, second)
    assert out.to_json()["settings"] == second.to_dict()   # reference: the request itself
    report = build_report(out.cohort, out, None, created=STAMP)
    table = _settings_table(report)
    assert table["detrend"] == second.detrend and table["variogram_bins"] == str(second.variogram_bins)
