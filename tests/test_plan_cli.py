"""`cohortlens plan` and `report --plan`: JSON schema, numbers equal plan_study called directly."""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from analysis.preparation.demo import DEMO_CSV, demo_roles, demo_settings
from analysis.preparation.loading import Dataset, read_table
from analysis.pipeline import Workbench
from analysis.models.plan_defaults import cohort_covariate
from analysis.models.planning import CovarianceModel, PlanInputs, plan_study
from app.cli import main

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def plan_json(tmp_path_factory):
    out = tmp_path_factory.mktemp("plan") / "plan.json"
    proc = subprocess.run([sys.executable, "-m", "app.cli", "plan", "demo", "--models",
                           "intercept,intercept+slope", "--power", "0.9", "--json", str(out)],
                          cwd=ROOT, capture_output=True, text=True, timeout=600,
                          env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"})
    assert proc.returncode == 0, proc.stderr
    return json.loads(out.read_text())


def test_plan_json_has_the_documented_keys(plan_json):
    d = plan_json
    assert isinstance(d["subjects_needed"], int) and d["subjects_needed"] > 0
    assert all(set(p) >= {"subjects", "power"} for p in d["power_curve"])
    assert [r["name"] for r in d["per_model"]] == ["intercept (REML)", "intercept+slope (REML)"]
    assert all(isinstance(r["subjects_needed"], int) for r in d["per_model"])
    a = d["assumptions"]
    for key in ("design", "effect", "alpha", "power", "schedule", "dropout_rate", "covariate",
                "covariance", "model", "sources", "approximation"):
        assert key in a, key
    assert a["power"] == 0.9 and a["model"] in [r["name"] for r in d["per_model"]]
    assert "intercept_var" in a["covariance"]["variance"]
    assert "simulation" not in d and len(d["cautions"]) >= 3


def test_plan_json_equals_plan_study_called_directly(plan_json):
    a = plan_json["assumptions"]
    ds = Dataset.from_frame(read_table(DEMO_CSV), name="demo")
    cohort = Workbench().cohort(ds, demo_roles(), demo_settings())
    # reference: the analysis function itself, given the JSON's stated inputs
    direct = plan_study(PlanInputs(CovarianceModel.from_json(a["covariance"]), a["effect"],
                                   a["schedule"], covariate=cohort_covariate(cohort),
                                   alpha=a["alpha"], power=a["power"],
                                   dropout_rate=a["dropout_rate"]))
    assert plan_json["subjects_needed"] == direct.subjects_needed
    assert [(p["subjects"], p["power"]) for p in plan_json["power_curve"]] == \
        [(n, pytest.approx(p, rel=1e-12)) for n, p in direct.power_curve]
    assert a["covariate"]["variance"] == pytest.approx(np.var(cohort_covariate(cohort)))  # numpy


def test_plan_simulation_and_bad_input(tmp_path, capsys):
    out = tmp_path / "p.json"
    assert main(["plan", "demo", "--models", "intercept", "--effect", "-0.05", "--design",
                 "two-groups", "--schedule", "0,12,24", "--simulate", "5", "--json",
                 str(out)]) == 0
    d = json.loads(out.read_text())
    sim = d["simulation"]
    assert sim["reps"] <= 5 and 0 <= sim["power"] <= 1
    # Monte-Carlo SE of a proportion, sqrt(p(1-p)/reps) (common practice)
    assert sim["mc_se"] == pytest.approx(np.sqrt(sim["power"] * (1 - sim["power"]) / sim["reps"]))
    assert d["subjects_needed"] == 2 * d["per_group"]
    assert main(["plan", "demo", "--schedule", "0,six", "--json", str(out)]) == 2
    assert "'six' is not a number" in capsys.readouterr().err
    assert main(["plan", "demo", "--simulate", "0", "--json", str(out)]) == 2
    assert "--simulate 0" in capsys.readouterr().err
    assert main(["plan", "demo", "--models", "intercept", "--model", "nope", "--json",
                 str(out)]) == 2
    assert "not one of the fitted models" in capsys.readouterr().err


def test_report_with_plan_has_the_plan_section(tmp_path):
    out = tmp_path / "r.html"
    assert main(["report", "demo", "--models", "intercept", "--plan", "--out", str(out)]) == 0
    text = out.read_text(encoding="utf-8")
    assert "Plan of the next study" in text and "Subjects needed under each fitted" in text
    assert "Power of the next study against its size" in text      # the embedded figure
