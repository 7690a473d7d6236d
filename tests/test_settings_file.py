"""The settings file (analysis/settings_file.py): what the page exports, the page imports and
``cohortlens ... --settings FILE.json`` reads.

Reference for the round trip: the same analysis run directly through
``analysis.pipeline.explore`` with the settings object the file was written from (the page's
route through the Workbench), compared field by field with the CLI's JSON output.
"""
from __future__ import annotations

import json

import pytest

from analysis.errors import SettingsError
from analysis.models.modelstage import ModelChoices
from analysis.pipeline import explore
from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.settings import Settings
from analysis.settings_file import read_settings_document, settings_document, settings_text
from app.cli import _model_choices, build_parser, main


def _page_choices():
    """Settings as a user might leave them on the page (several changed from the demo's)."""
    settings = demo_settings().replace(n_strata=3, variogram_bins=8, min_visits=4,
                                       detrend="linear", time_max=48.0)
    choices = ModelChoices(structures=("intercept", "intercept+slope"), correlation="gaussian",
                           method="ml", time_spline_df=3)
    return settings, demo_roles(), choices


def test_document_round_trip_keeps_every_choice():
    settings, roles, choices = _page_choices()
    doc = read_settings_document(settings_text(settings, roles, choices))
    assert doc.full_settings() == settings
    assert doc.roles == roles and doc.models == choices
    # a flat object of settings (an older file) is read as the "settings" part
    flat = read_settings_document(json.dumps({"min_visits": 5}))
    assert flat.full_settings().min_visits == 5 and flat.roles is None and flat.models is None


@pytest.mark.parametrize("payload, key", [
    ("{not json", "not valid JSON"),
    ("[1, 2]", "found a list"),
    ('{"settings": {"min_visit": 3}}', "'settings.min_visit'"),
    ('{"settings": {"min_visits": 0}}', "'settings.min_visits'"),
    ('{"settings": {"transform": "sqrt"}}', "'settings.transform'"),
    ('{"settings": {"time_min": 70, "time_max": 60}}', "'settings.time_min'"),
    ('{"settings": 3}', "key 'settings' must be a JSON object"),
    ('{"settings": {}, "roles": {"time": "t", "response": "y"}}', "'roles.subject'"),
    ('{"settings": {}, "roles": {"subject": "s", "time": "t", "response": "y", '
     '"covariates": "x"}}', "'roles.covariates'"),
    ('{"settings": {}, "roles": {"subject": "s", "time": "t", "response": "y", "colour": "x"}}',
     "'roles.colour'"),
    ('{"settings": {}, "models": {"correlation": "wavy"}}', "'models.correlation'"),
    ('{"settings": {}, "models": {"structures": ["no-such"]}}', "'models.structures'"),
    ('{"settings": {}, "models": {"time_spline_df": "three"}}', "'models.time_spline_df'"),
    ('{"settings": {}, "models": {"shape": 1}}', "'models.shape'"),
])
def test_a_bad_file_names_the_key_that_is_wrong(payload, key):
    with pytest.raises(SettingsError) as info:
        read_settings_document(payload, name="mine.json")
    text = str(info.value)
    assert text.startswith("mine.json: ") and key in text, text
    assert "Traceback" not in text


def test_cli_summarize_with_the_exported_file_gives_the_page_numbers(tmp_path):
    settings, roles, choices = _page_choices()
    path = tmp_path / "exported.json"
    path.write_text(settings_text(settings, roles, choices), encoding="utf-8")
    out = tmp_path / "summary.json"
    assert main(["summarize", "demo", "--settings", str(path), "--json", str(out)]) == 0
    cli = json.loads(out.read_text(encoding="utf-8"))
    # reference: the same analysis straight through analysis.pipeline.explore
    page = json.loads(json.dumps(explore(load_demo(), roles, settings).to_json()))
    assert cli["settings"] == settings.to_dict()
    for part in ("cohort", "attrition", "subjects", "semivariogram", "lag_correlation",
                 "strata", "strata_definition", "slope_vs_covariate", "dropout"):
        assert cli[part] == page[part], part
    assert cli["cohort"]["subjects"] == page["cohort"]["subjects"] > 0


def _exported_file(tmp_path):
    """(path, model choices) of the page's settings file as the page exports it."""
    settings, roles, choices = _page_choices()
    path = tmp_path / "exported.json"
    path.write_text(settings_text(settings, roles, choices), encoding="utf-8")
    return path, choices


def test_cli_model_flags_start_from_the_files_model_choices(tmp_path):
    path, choices = _exported_file(tmp_path)
    parser = build_parser()
    args = parser.parse_args(["fit", "demo", "--settings", str(path), "--json", "-"])
    assert _model_choices(args) == choices
    # a flag given on the command line wins over the file
    args = parser.parse_args(["fit", "demo", "--settings", str(path), "--correlation",
                              "exponential", "--json", "-"])
    assert _model_choices(args) == ModelChoices.from_dict({**choices.to_dict(),
                                                           "correlation": "exponential"})
    # without a file, the declared defaults (ModelChoices())
    args = parser.parse_args(["fit", "demo", "--json", "-"])
    assert _model_choices(args) == ModelChoices()


def test_cli_refuses_a_file_with_a_bad_model_choice(tmp_path, capsys):
    path = tmp_path / "bad.json"
    path.write_text(json.dumps({"settings": {}, "models": {"method": "bayes"}}),
                    encoding="utf-8")
    assert main(["fit", "demo", "--settings", str(path), "--json", "-"]) == 2
    err = capsys.readouterr().err
    assert "'models.method'" in err and str(path) in err


def test_settings_document_leaves_out_what_is_not_given():
    doc = settings_document(Settings())
    assert set(doc) == {"settings"} and doc["settings"] == Settings().to_dict()


def test_plan_reads_its_model_flags_and_the_file_like_fit(tmp_path):
    path, choices = _exported_file(tmp_path)
    parser = build_parser()
    args = parser.parse_args(["plan", "demo", "--settings", str(path), "--json", "-"])
    assert _model_choices(args) == choices
    args = parser.parse_args(["plan", "demo", "--ml", "--models", "intercept", "--json", "-"])
    got = _model_choices(args)
    assert got.method == "ml" and got.structures == ("intercept",)
