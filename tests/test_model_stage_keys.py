"""The models stage is keyed by exactly what a fit reads; one route fits a model set.

References: the Workbench's own compute counters (which stage ran) and an independent
refit on a fresh Workbench (nothing cached); the interpreter's module table
(``sys.modules``) in a fresh subprocess for the report's import chain.
"""
from __future__ import annotations

import subprocess
import sys
from dataclasses import fields

import pytest

from analysis.models import modelstage
from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.errors import ModelError
from analysis.preparation.loading import Dataset
from analysis.models.modelstage import ModelChoices
from analysis.pipeline import Workbench
from analysis.settings import Settings

#: a valid non-default value of every Settings field on the demo registry
ALTERNATES = {
    "origin": "first-visit", "unit": "weeks", "time_min": 1.5, "time_max": 48.0,
    "min_visits": 4, "require_covariate": False, "covariate": "age_at_tx",
    "duplicates": "average", "date_order": "month-first",
    "transform": "log10", "center": 2.5, "stratify_by": "centre",
    "strata_method": "equal-width", "n_strata": 3, "breaks": (1.0, 2.5, 7.125),
    "detrend": "lowess", "spline_df": 6, "lowess_frac": 0.45, "detrend_within_strata": True,
    "variogram_bins": 17, "variogram_max_lag": 30.0, "lag_width": 4.5, "data_cut": "2022-12-31",
}
#: what a fit reads (written out here, not taken from the code): the cohort selection —
#: time origin, unit, window, visit count, covariate, duplicates, dates — and the
#: transform and centring of the primary covariate (column x). Never the strata.
READ_BY_FIT = {"origin", "unit", "time_min", "time_max", "min_visits", "require_covariate",
               "covariate", "duplicates", "date_order", "transform", "center"}
#: a non-default value of every model choice
CHOICE_ALTERNATES = {"structures": ("intercept", "serial"), "correlation": "gaussian",
                     "method": "ml", "confounders": ("sex",), "time_spline_df": 3,
                     "gee": ("exchangeable",)}


@pytest.fixture(scope="module")
def dataset():
    df = load_demo()
    keep = df["recipient_id"].unique()[:120]
    return Dataset.from_frame(df[df["recipient_id"].isin(keep)].reset_index(drop=True),
                              name="subset.csv")


@pytest.fixture
def stub_fit(monkeypatch):
    """Count fits without fitting (the key, not the fit, is under test here)."""
    calls = []

    def fake(cohort, choices):
        calls.append(choices)
        return object()

    monkeypatch.setattr(modelstage, "fit_models", fake)
    return calls


def _change(base: Settings, name: str) -> Settings:
    change = {name: ALTERNATES[name]}
    if name == "strata_method":
        change = {"strata_method": "custom", "breaks": ALTERNATES["breaks"]}
    if name == "breaks":
        change["strata_method"] = "custom"
    if name == "spline_df":
        change["detrend"] = "spline"
    if name == "lowess_frac":
        change["detrend"] = "lowess"
    return base.replace(**change)


def test_alternates_cover_every_field():
    assert set(ALTERNATES) == {f.name for f in fields(Settings)}
    assert set(CHOICE_ALTERNATES) == {f.name for f in fields(ModelChoices)}


@pytest.mark.parametrize("name", sorted(ALTERNATES))
def test_models_recompute_only_for_the_settings_a_fit_reads(dataset, stub_fit, name):
    wb, roles, base = Workbench(), demo_roles(), demo_settings()
    wb.models(dataset, roles, base, ModelChoices())
    before = dict(wb.compute_counts)
    changed = _change(base, name)
    assert changed != base
    wb.models(dataset, roles, changed, ModelChoices())
    ran = {k for k, v in wb.compute_counts.items() if v != before.get(k, 0)}
    expected_models = any(getattr(changed, f) != getattr(base, f) for f in READ_BY_FIT)
    assert ("models" in ran) == expected_models, (name, ran)
    assert len(stub_fit) == 1 + expected_models


@pytest.mark.parametrize("name", sorted(CHOICE_ALTERNATES))
def test_a_model_choice_recomputes_only_the_models(dataset, stub_fit, name):
    wb, roles, base = Workbench(), demo_roles(), demo_settings()
    wb.explore(dataset, roles, base)
    wb.models(dataset, roles, base, ModelChoices())
    before = dict(wb.compute_counts)
    wb.models(dataset, roles, base, ModelChoices(**{name: CHOICE_ALTERNATES[name]}))
    ran = {k for k, v in wb.compute_counts.items() if v != before.get(k, 0)}
    assert ran == {"models"}, (name, ran)


def test_the_number_of_groups_does_not_change_a_fit(dataset):
    """The key leaves the strata out because the fit never reads them: two fresh
    Workbenches (nothing shared) give the same JSON for 4 and for 2 equal-width groups."""
    roles = demo_roles()
    choices = ModelChoices(structures=("intercept",), gee=())
    a = Workbench().models(dataset, roles, demo_settings(), choices)
    b = Workbench().models(dataset, roles, demo_settings().replace(
        strata_method="equal-width", n_strata=2, stratify_by="sex"), choices)
    assert a.to_json() == b.to_json()


def test_every_route_checks_the_confounders(dataset, tmp_path):
    from app import cli

    out = tmp_path / "fit.json"
    # CLI fit (used to skip the check): the primary covariate is not a confounder
    code = cli.main(["fit", "demo", "--json", str(out), "--models", "intercept", "--no-gee",
                     "--confounders", "urine_protein_ratio"])
    assert code == 2 and not out.exists()
    with pytest.raises(ModelError, match="primary covariate"):
        Workbench().models(dataset, demo_roles(), demo_settings(),
                           ModelChoices(confounders=("urine_protein_ratio",)))


REPORT_SCRIPT = r"""
import sys
from app import cli
code = cli.main(["report", "demo", "--out", sys.argv[1], "--models", "intercept", "--no-gee"])
print(code, ",".join(sorted({m.split('.')[0] for m in sys.modules} & {"dash", "flask"})))
"""


def test_cli_report_loads_no_web_framework(tmp_path):
    out = tmp_path / "r.html"
    res = subprocess.run([sys.executable, "-c", REPORT_SCRIPT, str(out)], capture_output=True,
                         text=True, check=True)
    code, *bad = res.stdout.split()
    assert code == "0" and out.stat().st_size > 0
    assert bad == [], f"the CLI report imported {bad}"
