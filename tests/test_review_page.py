"""Presentation mode in the page address and settings travel's page helpers (app/urlstate.py,
app/travel.py, app/sections/summary.py), without a browser.

Reference: the address parsed back with the standard library (urllib.parse.parse_qsl) and the
project's own settings-file reader (tested in tests/test_settings_file.py) on what the page
writes; the summary text against the overview numbers formatted independently here.
"""
from __future__ import annotations

import json
from urllib.parse import parse_qsl

import pytest

from analysis.errors import SettingsError
from analysis.output.overview import cohort_overview
from analysis.preparation.demo import demo_roles, demo_settings
from analysis.settings_file import read_settings_document, settings_text
from app import travel, urlstate
from app.sections import summary


@pytest.fixture(scope="module")
def ctx():
    from app.server import create_app

    return create_app()._cohortlens


def _stores(ctx, settings=None):
    return ({"key": ctx.default_key, "name": "demo"}, {"roles": ctx.default_roles.to_dict()},
            (settings or ctx.default_settings).to_dict())


@pytest.mark.parametrize("query, on", [("?present=1", True), ("?present=yes", True),
                                       ("?present=0", False), ("", False), (None, False),
                                       ("?min-visits=4&present=1&focus=R1", True),
                                       ("?present=banana", False)])
def test_present_flag(query, on):
    assert urlstate.present_flag(query) is on


def test_with_present_keeps_every_other_part_in_order():
    query = "?min-visits=4&focus=R00001&stratum=1.0+%E2%80%93+10.7"
    on = urlstate.with_present(query, True)
    assert parse_qsl(on.lstrip("?")) == parse_qsl(query.lstrip("?")) + [("present", "1")]
    assert urlstate.with_present(on, False) == query               # off again: as before
    assert urlstate.with_present("?present=1", False) == ""
    # encode writes it, decode reads it, and the rest of the state is untouched
    base = demo_settings()
    q = urlstate.encode(data_key=None, roles=None, settings=base.replace(min_visits=4),
                        base=base, present=True)
    state = urlstate.decode(q, base=base)
    assert state.present and state.settings.min_visits == 4 and not state.problems
    assert not urlstate.decode(urlstate.encode(data_key=None, roles=None, settings=base,
                                               base=base), base=base).present


def test_export_text_is_a_settings_file_with_the_page_choices(ctx):
    settings = ctx.default_settings.replace(min_visits=5, variogram_bins=7)
    data, roles, s = _stores(ctx, settings)
    name, text, note = travel.export_text(
        ctx, data, roles, s, dict(structures=["intercept"], correlation="gaussian",
                                  method="ml", confounders=[], spline_df=None))
    doc = read_settings_document(text)
    assert name.endswith(".json") and note.startswith("Saved")
    assert doc.full_settings() == settings and doc.roles == demo_roles()
    assert doc.models.structures == ("intercept",) and doc.models.method == "ml"
    # model controls that make no valid set: the file still goes, without them, and says so
    _, text, note = travel.export_text(ctx, data, roles, s, dict(
        structures=[], correlation="exponential", method="reml", confounders=[], spline_df=None))
    assert "models" not in json.loads(text) and "Model choices left out" in note


def test_import_query_writes_the_files_choices_into_the_address(ctx):
    settings = ctx.default_settings.replace(min_visits=6, n_strata=3)
    data, roles, _ = _stores(ctx)
    raw = settings_text(settings, demo_roles()).encode()
    query, models, note = travel.import_query(ctx, raw, "mine.json", data, roles, "?present=1")
    state = urlstate.decode(query, base=ctx.default_settings, base_roles=ctx.default_roles,
                            base_data=ctx.default_key)
    assert state.settings == settings and state.present and not state.problems
    assert models is None and "mine.json" in note


def test_import_query_refuses_roles_the_table_does_not_have(ctx):
    data, roles, _ = _stores(ctx)
    wrong = demo_roles().to_dict() | {"response": "no_such_column"}
    raw = json.dumps({"settings": {}, "roles": wrong}).encode()
    with pytest.raises(SettingsError) as info:
        travel.import_query(ctx, raw, "mine.json", data, roles, "")
    assert "'roles.response'" in str(info.value) and "no_such_column" in str(info.value)


def test_summary_items_say_the_overview_numbers(ctx):
    from app.views import stage_call

    data, roles, s = _stores(ctx)
    cohort = stage_call(ctx, "cohort", data, roles, s)
    ov = cohort_overview(cohort)
    first, groups = summary.cohort_items(ov)
    text = _text(first)
    # formatted here independently: thousands separators and the subject/visit counts
    assert f"{ov.subjects:,} subjects" in text and f"{ov.visits:,} visits" in text
    assert first.href == "#section-kept" and groups.href == "#section-course"
    assert f"{len(ov.group_sizes)} groups" in _text(groups)


def _text(component) -> str:
    if isinstance(component, str):
        return component
    children = getattr(component, "children", None)
    if children is None:
        return ""
    if not isinstance(children, (list, tuple)):
        children = [children]
    return "".join(_text(c) for c in children)


def test_a_wrong_key_is_said_with_its_controls_label():
    with pytest.raises(SettingsError) as info:
        read_settings_document('{"settings": {"min_visits": 0}}', name="mine.json")
    text = travel.page_message(str(info.value))
    # the label is the setting's own declaration (analysis.settings DECLARED)
    from analysis.settings import DECLARED

    label = DECLARED["min_visits"].label
    assert text.startswith("mine.json: key 'settings.min_visits'")
    # the control's label is said exactly once (in the file's key prefix or the message)
    assert "min_visits ==" not in text and text.lower().count(label.lower()) == 1
