"""The dashboard's cache layer, link state and settings panel, without a browser.

Reference for every "what should be recomputed" check: the stage table in
``analysis.settings.STAGE_FIELDS`` (which settings each stage reads) and, for
the numbers, the same stage computed directly by a fresh ``analysis.pipeline.Workbench``.
"""
from __future__ import annotations

from collections import Counter
from dataclasses import fields
from urllib.parse import parse_qs

import numpy as np
import pandas as pd
import pytest

import analysis.exploration.detrend
import analysis.exploration.lagcorr
import analysis.pipeline
import analysis.exploration.subject_fits
import analysis.exploration.variogram
from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.preparation.loading import Dataset
from analysis.pipeline import Workbench
from analysis.settings import STAGE_FIELDS, Roles, Settings
from app import controls as ctl
from app import ids, urlstate, views
from app.datastore import DEMO_KEY, DataStore
from app.server import create_app

#: what each view calls, in the order app/views.py calls them
VIEW_STAGES = {
    "course": ("cohort",),
    "spread": ("variogram", "cohort"),
    "pairs": ("lag_correlation", "cohort"),
    "lines": ("subject_lines", "cohort"),
    "rate": ("subject_lines", "summaries", "cohort"),
    "follow": ("subject_lines", "summaries", "cohort"),
}
#: the Workbench stage whose settings key each view's redraw (app/views.py)
VIEW_KEY_STAGE = {"course": "cohort", "spread": "variogram", "pairs": "lagcorr",
                  "lines": "cohort", "rate": "summaries", "follow": "summaries"}


@pytest.fixture(scope="module")
def demo_frame() -> pd.DataFrame:
    return load_demo()


@pytest.fixture()
def app_ctx():
    """A fresh app (fresh caches) on the demo registry."""
    return create_app()._cohortlens


@pytest.fixture()
def calls(monkeypatch):
    """Count calls of the analysis functions behind each stage (the expensive parts)."""
    counts: Counter = Counter()

    def counted(module, name, label):
        original = getattr(module, name)

        def wrapper(*args, **kwargs):
            counts[label] += 1
            return original(*args, **kwargs)

        monkeypatch.setattr(module, name, wrapper)

    # the selection stage: its per-subject rules on the cached ordered visits
    counted(analysis.pipeline, "finish_selection", "select")
    counted(analysis.pipeline, "stratify", "stratify")
    counted(analysis.exploration.subject_fits, "fit_subject_lines", "fits")
    counted(analysis.exploration.detrend, "detrend", "detrend")
    counted(analysis.exploration.variogram, "semivariogram", "variogram")
    counted(analysis.exploration.lagcorr, "lag_correlation", "lagcorr")
    return counts


def stores(key=DEMO_KEY, roles: Roles | None = None, settings: Settings | None = None):
    """The three browser stores as the page holds them."""
    return ({"key": key}, {"roles": (roles or demo_roles()).to_dict(), "problems": {}},
            (settings or demo_settings()).to_dict())


def draw_every_view(context, *st) -> dict:
    """Every stage call the six views make (app/views.py), as the page does on a redraw."""
    out = {}
    for stages in VIEW_STAGES.values():
        for name in stages:
            out[name] = views._stage_call(context, name, *st)
    return out


# ------------------------------------------------------------------ what a change recomputes
def test_variogram_bins_recompute_only_the_semivariogram(app_ctx, calls):
    base = demo_settings()
    draw_every_view(app_ctx, *stores())
    before = Counter(calls)
    # every stage ran once on the first drawing
    assert before == Counter(select=1, stratify=1, fits=1, detrend=1, variogram=1, lagcorr=1)

    changed = base.replace(variogram_bins=base.variogram_bins + 7)
    got = draw_every_view(app_ctx, *stores(settings=changed))
    delta = Counter(calls)
    delta.subtract(before)
    # STAGE_FIELDS puts variogram_bins in the variogram stage alone
    assert "variogram_bins" in STAGE_FIELDS["variogram"]
    assert +delta == Counter(variogram=1)
    # reference: the same semivariogram computed by a fresh Workbench
    ref = Workbench().variogram(app_ctx.datasets.get(DEMO_KEY), demo_roles(), changed)
    pd.testing.assert_frame_equal(got["variogram"].bins, ref.bins)
    assert len(got["variogram"].bins) != len(
        Workbench().variogram(app_ctx.datasets.get(DEMO_KEY), demo_roles(), base).bins)


def test_lag_width_recomputes_only_the_lag_correlation(app_ctx, calls):
    base = demo_settings()
    draw_every_view(app_ctx, *stores())
    before = Counter(calls)
    changed = base.replace(lag_width=base.lag_width * 2)
    got = draw_every_view(app_ctx, *stores(settings=changed))
    delta = Counter(calls)
    delta.subtract(before)
    assert STAGE_FIELDS["lagcorr"] == ("lag_width",)
    assert +delta == Counter(lagcorr=1)
    ref = Workbench().lag_correlation(app_ctx.datasets.get(DEMO_KEY), demo_roles(), changed)
    np.testing.assert_allclose(got["lag_correlation"].matrix, ref.matrix, equal_nan=True)
    assert got["lag_correlation"].width == pytest.approx(changed.lag_width)


def test_min_visits_recomputes_everything_downstream(app_ctx, calls):
    base = demo_settings()
    draw_every_view(app_ctx, *stores())
    before = Counter(calls)
    changed = base.replace(min_visits=base.min_visits + 2)
    got = draw_every_view(app_ctx, *stores(settings=changed))
    delta = Counter(calls)
    delta.subtract(before)
    # min_visits is a selection setting: every stage depends on the selection
    assert "min_visits" in STAGE_FIELDS["cohort"]
    assert +delta == Counter(select=1, stratify=1, fits=1, detrend=1, variogram=1, lagcorr=1)
    # reference: pandas count of visits per subject in the analysed cohort
    visits = got["cohort"].frame.groupby("subject").size()
    assert visits.min() >= changed.min_visits


def test_the_same_choices_twice_compute_nothing(app_ctx, calls):
    draw_every_view(app_ctx, *stores())
    before = Counter(calls)
    draw_every_view(app_ctx, *stores())
    assert calls == before and sum(before.values()) == 6


def test_result_cache_is_bounded(demo_frame):
    wb = Workbench(max_entries=5)
    ds = Dataset.from_frame(demo_frame, name="demo")
    for bins in range(3, 12):
        wb.variogram(ds, demo_roles(), demo_settings().replace(variogram_bins=bins))
        assert len(wb._cache) <= 5
    # each of the 9 settings was computed (no stale reuse), the cache kept only 5 entries
    assert wb.compute_counts["variogram"] == 9


def test_data_store_is_bounded_and_keeps_the_pinned_demo(demo_frame):
    store = DataStore(max_uploads=2)
    store.pin(DEMO_KEY, lambda: Dataset(DEMO_KEY, demo_frame, "demo"))
    keys = [store.add(demo_frame.assign(egfr=demo_frame["egfr"] + k), name=f"t{k}").key
            for k in range(3)]
    assert len(set(keys)) == 3
    assert keys[0] not in store and keys[1] in store and keys[2] in store
    assert len(store) == 2
    assert store.get(DEMO_KEY) is not None
    # the same content under another name gives the same key (content hash)
    assert store.add(demo_frame.assign(egfr=demo_frame["egfr"] + 2), name="again").key == keys[2]


def test_two_sessions_with_different_data_never_share_results(app_ctx, demo_frame):
    # session A: the demo; session B: an upload with every eGFR shifted and the
    # worst-followed half of the subjects removed, and other settings
    keep = demo_frame.groupby("recipient_id").size().sort_values().index[600:]
    other = demo_frame[demo_frame["recipient_id"].isin(keep)].assign(
        egfr=lambda d: d["egfr"] * 1.5).reset_index(drop=True)
    ds_b = app_ctx.datasets.add(other, name="other.csv")
    assert ds_b.key != DEMO_KEY
    s_a = demo_settings()
    s_b = demo_settings().replace(n_strata=3, variogram_bins=8)

    a = draw_every_view(app_ctx, *stores(settings=s_a))
    b = draw_every_view(app_ctx, *stores(key=ds_b.key, settings=s_b))
    a_again = draw_every_view(app_ctx, *stores(settings=s_a))

    # references: each session's results computed directly, one fresh Workbench each
    ref_a = Workbench().explore(app_ctx.datasets.get(DEMO_KEY), demo_roles(), s_a)
    ref_b = Workbench().explore(Dataset.from_frame(other), demo_roles(), s_b)
    for got, ref in ((a, ref_a), (b, ref_b), (a_again, ref_a)):
        assert got["cohort"].panel.n_subjects == ref.cohort.panel.n_subjects
        pd.testing.assert_frame_equal(got["variogram"].bins, ref.variogram.bins)
        pd.testing.assert_frame_equal(got["subject_lines"], ref.subject_lines)
    assert a["cohort"].panel.n_subjects != b["cohort"].panel.n_subjects
    assert a_again["variogram"] is a["variogram"]       # served from A's own cache entry
    wb = app_ctx.workbench
    key_a = wb._key("variogram", app_ctx.datasets.get(DEMO_KEY), demo_roles(), s_a)
    key_b = wb._key("variogram", ds_b, demo_roles(), s_b)
    key_b_same_settings = wb._key("variogram", ds_b, demo_roles(), s_a)
    assert key_a != key_b and key_a != key_b_same_settings


# ------------------------------------------------------------------ render keys
def _view_keys(context, settings: Settings) -> dict:
    st = stores(settings=settings)
    return {v: views.render_key(context, VIEW_KEY_STAGE[v], *st) for v in VIEW_KEY_STAGE}


def _views_reading(field: str, settings: Settings) -> set[str]:
    """Reference: the views whose stage reads ``field`` according to STAGE_FIELDS."""
    sel, strata = STAGE_FIELDS["cohort"], STAGE_FIELDS["strata"]
    res = STAGE_FIELDS["residuals"] + (strata if settings.detrend_within_strata else ())
    reads = {"cohort": sel + strata, "summaries": sel + strata + STAGE_FIELDS["summaries"],
             "variogram": sel + res + STAGE_FIELDS["variogram"],
             "lagcorr": sel + res + STAGE_FIELDS["lagcorr"]}
    return {v for v, st in VIEW_KEY_STAGE.items() if field in reads[st]}


CHANGES = [
    ("variogram_bins", 13), ("variogram_max_lag", 30.0), ("lag_width", 3.0),
    ("strata_method", "equal-width"), ("n_strata", 3), ("transform", "log10"),
    ("detrend", "linear"), ("spline_df", 6), ("min_visits", 5), ("time_max", 36.0),
    ("data_cut", "2022-12-31"),
]


@pytest.mark.parametrize("field,value", CHANGES, ids=[c[0] for c in CHANGES])
def test_render_key_changes_only_for_the_views_a_setting_concerns(app_ctx, field, value):
    base = demo_settings()
    before = _view_keys(app_ctx, base)
    after = _view_keys(app_ctx, base.replace(**{field: value}))
    changed = {v for v in before if before[v] != after[v]}
    expected = _views_reading(field, base)
    assert expected, f"{field} concerns no view?"
    assert changed == expected


def test_render_key_follows_strata_when_detrending_within_groups(app_ctx):
    base = demo_settings().replace(detrend_within_strata=True)
    before = _view_keys(app_ctx, base)
    after = _view_keys(app_ctx, base.replace(strata_method="equal-width"))
    changed = {v for v in before if before[v] != after[v]}
    assert changed == _views_reading("strata_method", base) == set(VIEW_KEY_STAGE)


def test_render_key_of_unusable_stores_is_stable_and_does_not_raise(app_ctx):
    k1 = views.render_key(app_ctx, "cohort", {"key": "gone"}, None, None)
    k2 = views.render_key(app_ctx, "cohort", {"key": "gone"}, None, None)
    assert k1 == k2 and k1 != _view_keys(app_ctx, demo_settings())["course"]


# ------------------------------------------------------------------ link state
#: a valid non-default value for every Settings field (custom groups need their breaks)
ALTERNATES = {
    "origin": "first-visit", "unit": "weeks", "time_min": 1.5, "time_max": 48.25,
    "min_visits": 5, "require_covariate": False, "covariate": "age_at_tx",
    "duplicates": "average", "date_order": "day-first",
    "transform": "log10", "center": 2.5, "stratify_by": "centre",
    "strata_method": "custom", "n_strata": 3, "breaks": (1.0, 2.5, 7.125),
    "detrend": "lowess", "spline_df": 6, "lowess_frac": 0.45, "detrend_within_strata": True,
    "variogram_bins": 17, "variogram_max_lag": 30.0, "lag_width": 4.5, "data_cut": "2022-12-31",
}


def test_alternates_cover_every_settings_field():
    assert set(ALTERNATES) == {f.name for f in fields(Settings)}
    for name, value in ALTERNATES.items():
        assert getattr(Settings(), name) != value, name


@pytest.mark.parametrize("name", sorted(ALTERNATES))
def test_each_setting_survives_the_link(name):
    base = Settings()
    change = {name: ALTERNATES[name]}
    if name == "strata_method":
        change["breaks"] = ALTERNATES["breaks"]
    settings = base.replace(**change)
    query = urlstate.encode(data_key=None, roles=None, settings=settings, base=base)
    state = urlstate.decode(query, base=base)
    assert state.settings == settings
    assert state.problems == ()
    # only the changed settings are written
    assert set(parse_qs(query.lstrip("?"))) == {urlstate.param_name(n) for n in change}


def test_everything_changed_at_once_survives_the_link():
    base = demo_settings()
    settings = Settings(**ALTERNATES)
    roles = Roles(subject="Pt #", time="Visit dt", response="eGFR value (mL/min)",
                  covariates=("a&b", "c=d"), event_date="tx day", followup_end="fu end")
    view = {"draw": 12, "seed": 7, "order": "intercept"}
    query = urlstate.encode(data_key="abc123", roles=roles, settings=settings, base=base,
                            view=view, subject="R-0042 / x", stratum="(1.5, 3] mg")
    state = urlstate.decode(query, base=base)
    assert state.settings == settings
    assert state.roles == roles
    assert state.data_key == "abc123"
    assert state.view == view
    assert (state.subject, state.stratum) == ("R-0042 / x", "(1.5, 3] mg")
    assert state.problems == ()
    # at the start-up defaults the link is empty
    assert urlstate.encode(data_key=None, roles=demo_roles(), base_roles=demo_roles(),
                           settings=base, base=base) == ""


TAMPERED = [
    ("?min-visits=abc", "min-visits"),
    ("?unit=fortnights", "unit"),
    ("?lowess-frac=nan", "lowess-frac"),
    ("?lowess-frac=7", "lowess-frac"),
    ("?variogram-bins=0", "variogram-bins"),
    ("?time-min=50&time-max=10", "time-"),
    ("?strata-method=custom", "strata-method"),
    ("?breaks=1,x", "breaks"),
    ("?center=sideways", "center"),
    ("?require-covariate=maybe", "require-covariate"),
    ("?draw=100000", "draw"),
    ("?seed=-3", "seed"),
    ("?order=sideways", "order"),
    ("?col-subject=id", "column roles"),
]


@pytest.mark.parametrize("query,named", TAMPERED, ids=[t[0] for t in TAMPERED])
def test_a_tampered_link_gives_defaults_and_a_message(query, named):
    base = demo_settings()
    state = urlstate.decode(query, base=base, base_roles=demo_roles())
    assert state.problems, "no message for an unusable link"
    assert any(named in p for p in state.problems), state.problems
    d_state, d_base = state.settings.to_dict(), base.to_dict()
    # every setting the link did not name keeps its default
    named_params = set(parse_qs(query.lstrip("?")))
    for f in fields(Settings):
        if urlstate.param_name(f.name) not in named_params:
            assert d_state[f.name] == d_base[f.name], f.name
    assert state.view.keys() == urlstate.VIEW_DEFAULTS.keys()


@pytest.mark.parametrize("query", ["?%ZZ=%%&&==", "?" + "x" * 5000, "?min-visits=", "?\u00e9=\u00e9",
                                   None, "", "?data="])
def test_garbage_links_never_raise(query):
    state = urlstate.decode(query, base=demo_settings(), base_roles=demo_roles(),
                            base_data=DEMO_KEY)
    assert isinstance(state.settings, Settings)
    assert state.data_key == DEMO_KEY


# ------------------------------------------------------------------ settings panel
def test_control_values_round_trip():
    for settings in (Settings(), demo_settings(), Settings(**ALTERNATES)):
        got, problems = ctl.settings_from_controls(ctl.control_values(settings))
        assert problems == {}
        assert got == settings


BAD_CONTROLS = [
    ({"min_visits": "abc"}, "min_visits", "number"),
    ({"min_visits": None}, "min_visits",
     "Fewest visits per subject must be a whole number from 1 to 1000."),
    ({"min_visits": 0}, "min_visits", "from 1 to 1000"),
    ({"n_strata": 2.5}, "n_strata", "whole number"),
    ({"variogram_bins": 0}, "variogram_bins", "from 1 to 200"),
    ({"variogram_bins": 20000000}, "variogram_bins", "from 1 to 200"),
    ({"n_strata": 2000000}, "n_strata", "from 1 to 50"),
    ({"spline_df": 5000}, "spline_df", "from 1 to 20"),
    ({"lowess_frac": 3}, "lowess_frac", "greater than 0 and at most 1"),
    ({"lag_width": -2}, "lag_width", "greater than 0"),
    ({"variogram_max_lag": 0}, "variogram_max_lag", "greater than 0"),
    ({"time_min": 30, "time_max": 10}, "time_min",
     "Window from (30) must be smaller than Window to (10)."),
    ({"strata_method": "custom", "breaks": ""}, "breaks", "break"),
    ({"strata_method": "custom", "breaks": "5, 2"}, "breaks", "increasing"),
    ({"breaks": "1, two"}, "breaks", "'two' is not a number"),
    ({"center": "value", "center_value": None}, "center", "value to centre"),
    ({"data_cut": "30/06/2024"}, "data_cut", "YYYY-MM-DD"),
]


@pytest.mark.parametrize("change,field,words", BAD_CONTROLS,
                         ids=[f"{b[1]}-{i}" for i, b in enumerate(BAD_CONTROLS)])
def test_a_bad_control_gets_its_message_beside_it(change, field, words):
    values = {**ctl.control_values(demo_settings()), **change}
    settings, problems = ctl.settings_from_controls(values, fallback=demo_settings())
    assert settings is None
    assert set(problems) == {field}, problems
    assert words in problems[field]
    # the message speaks the panel's language, not the code's
    assert field not in problems[field]
    assert field in ids.SETTING_MSG


# ------------------------------------------------------------------ page structure and clicks
def _walk(component, inside_loading=False):
    """(component, whether a dcc.Loading encloses it) for every component in a layout."""
    from dash import dcc

    yield component, inside_loading
    here = inside_loading or isinstance(component, dcc.Loading)
    children = getattr(component, "children", None)
    if children is None or isinstance(children, (str, int, float)):
        return
    for child in children if isinstance(children, (list, tuple)) else [children]:
        if hasattr(child, "to_plotly_json"):
            yield from _walk(child, here)


def test_everything_a_slow_step_fills_shows_a_loading_indicator():
    from dash import dcc

    from app.layout import build_layout

    seen = {c.id: loading for c, loading in _walk(build_layout(Settings()))
            if isinstance(getattr(c, "id", None), str)}
    graphs = [c for c, _ in _walk(build_layout(Settings())) if isinstance(c, dcc.Graph)]
    assert len(graphs) >= 8
    # every graph, the attrition table, the subject card and the table preview
    slow = [g.id for g in graphs] + [ids.KEPT_TABLE, ids.LINK_CARD, ids.DATA_PREVIEW]
    assert [i for i in slow if not seen.get(i)] == []


def test_a_click_that_names_no_analysed_subject_is_ignored(app_ctx):
    from app import hub

    data, roles, _ = stores()
    controls = {**ctl.control_values(demo_settings())}
    role_values = ctl.role_values(demo_roles())
    cohort = views._stage_call(app_ctx, "cohort", data, roles, demo_settings().to_dict())
    real = str(cohort.subject_ids[0])
    # reference: the analysed cohort's subject ids (Workbench selection)
    assert hub._analysed_subject(app_ctx, data, role_values, controls, real)
    # a mean curve carries visit counts in customdata, not subject ids
    assert not hub._analysed_subject(app_ctx, data, role_values, controls, "475")
    assert hub.clicked_subject({"points": [{"customdata": [real, 1.5, 2]}]}) == real
    assert hub.clicked_subject({"points": []}) is None


def test_a_filtered_table_is_stored_with_rows_numbered_from_zero(app_ctx, demo_frame):
    # a frame filtered in pandas keeps its old row labels; the store renumbers them so
    # the analysis sees the same table as if it had been read from a file
    keep = demo_frame["recipient_id"].drop_duplicates().iloc[::2]
    filtered = demo_frame[demo_frame["recipient_id"].isin(keep)]
    assert not filtered.index.equals(pd.RangeIndex(len(filtered)))
    ds = app_ctx.datasets.add(filtered, name="filtered")
    got = views._stage_call(app_ctx, "cohort", *stores(key=ds.key))
    # reference: the same rows written to CSV and read back by pandas, analysed directly
    import io

    buf = io.StringIO()
    filtered.to_csv(buf, index=False)
    ref = Workbench().cohort(Dataset.from_frame(pd.read_csv(io.StringIO(buf.getvalue()))),
                             demo_roles(), demo_settings())
    assert (got.panel.n_subjects, got.panel.n_obs) == (ref.panel.n_subjects, ref.panel.n_obs)
    assert got.panel.n_subjects > 0
