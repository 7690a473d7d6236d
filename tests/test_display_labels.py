"""Display labels of role columns: carried by Roles, the page's controls, the page address and
the command line, and used in statements; numbers print with a true minus and never "+ −"."""
from __future__ import annotations

from types import SimpleNamespace

import pytest

from analysis.errors import SettingsError
from analysis.models.modelling import _labels
from analysis.settings import Roles, Settings
from app import controls as ctl
from app import urlstate
from app.cli import build_parser, resolve
from app.sections.selection import line_text

ROLES = Roles(subject="id", time="t", response="egfr", covariates=("Baseline Marker", "age"),
              labels={"egfr": "eGFR", "age": "age at entry"})


def test_a_label_defaults_to_the_column_name():
    assert ROLES.label("egfr") == "eGFR" and ROLES.label("t") == "t"
    assert Roles.from_dict(ROLES.to_dict()) == ROLES
    # without labels the roles JSON is as before labels existed
    assert "labels" not in Roles("id", "t", "y").to_dict()
    with pytest.raises(SettingsError):
        Roles("id", "t", "y", labels={"y": 3})


def test_labels_travel_through_the_page_address():
    query = urlstate.encode(data_key="k", roles=ROLES, settings=Settings())
    assert "label=egfr%3DeGFR" in query
    state = urlstate.decode(query)
    assert state.roles == ROLES and state.problems == ()


def test_label_fields_beside_the_roles():
    values = {**ctl.role_values(ROLES), "labels": {"response": "kidney function",
                                                   "covariates": "", "time": "months"}}
    roles, problems = ctl.roles_from_controls(values, known=ROLES)
    assert problems == {}
    assert roles.label("egfr") == "kidney function" and roles.label("t") == "months"
    # the primary covariate's field left blank: its column name; another covariate keeps its own
    assert roles.label("Baseline Marker") == "Baseline Marker"
    assert roles.label("age") == "age at entry"
    assert ctl.label_values(roles)["response"] == "kidney function"


def test_label_flags_on_the_command_line():
    args = build_parser().parse_args(["summarize", "data.csv", "--subject", "id", "--time", "t",
                                      "--response", "egfr", "--label", "egfr=eGFR",
                                      "--label", "t=months since entry", "--json", "-"])
    _, roles, _ = resolve(args)
    assert roles.label("egfr") == "eGFR" and roles.label("t") == "months since entry"
    bad = build_parser().parse_args(["summarize", "data.csv", "--subject", "id", "--time", "t",
                                     "--response", "egfr", "--label", "egfr", "--json", "-"])
    with pytest.raises(SettingsError, match="--label 'egfr'"):
        resolve(bad)


def test_statements_say_baseline_once_and_use_labels():
    cohort = SimpleNamespace(settings=Settings(), roles=ROLES, covariate="Baseline Marker",
                             response_unit="")
    words = _labels(cohort)
    assert words["covariate_label"] == "Baseline Marker"      # not "baseline Baseline Marker"
    assert words["response_label"] == "eGFR"
    plain = SimpleNamespace(settings=Settings(), roles=ROLES, covariate="age", response_unit="")
    assert _labels(plain)["covariate_label"] == "baseline age at entry"


def test_a_line_reads_with_a_true_minus():
    assert line_text(75.2, -0.113) == "75.2 \u2212 0.113 × time"
    assert line_text(75.2, 0.113) == "75.2 + 0.113 × time"
    assert "+ -" not in line_text(-3.0, -1.5) and line_text(-3.0, -1.5).startswith("\u22123")
