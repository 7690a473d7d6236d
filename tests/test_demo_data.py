"""The invented demo registry: reproducible, follows its documented rules, recovers its truth."""
from __future__ import annotations

import importlib.util
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from analysis.preparation.demo import (DEMO_COLUMNS, DEMO_CSV, TRUE_PARAMETERS, demo_roles, demo_settings,
                           load_demo)
from analysis.settings import Settings

ROOT = Path(__file__).resolve().parents[1]
SCRIPT = ROOT / "sample_data" / "generate_registry.py"
P = TRUE_PARAMETERS


def _generator_module():
    spec = importlib.util.spec_from_file_location("generate_registry", SCRIPT)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


@pytest.fixture(scope="module")
def demo() -> pd.DataFrame:
    return load_demo()


def test_regeneration_is_byte_identical(tmp_path):
    # brute-force reproducibility: run the script afresh and compare bytes with the shipped file
    out = tmp_path / "registry.csv"
    subprocess.run([sys.executable, str(SCRIPT), "--out", str(out), "--quiet"],
                   check=True, cwd=tmp_path, timeout=120)
    assert out.read_bytes() == DEMO_CSV.read_bytes()
    truth = tmp_path / "registry_truth.csv"
    assert truth.read_bytes() == DEMO_CSV.with_name("kidney_registry_truth.csv").read_bytes()


def test_columns_roles_and_settings_fit_the_file(demo):
    assert tuple(demo.columns) == DEMO_COLUMNS
    assert set(demo_roles().columns()) <= set(demo.columns)
    s = demo_settings()
    assert Settings.from_json(s.to_json()) == s
    assert s.covariate in demo_roles().covariates
    assert demo["recipient_id"].str.fullmatch(r"R\d{5}").all()


def test_time_column_matches_dates_and_window(demo):
    # independent recomputation with pandas date arithmetic (reference library)
    days = (pd.to_datetime(demo["visit_date"]) - pd.to_datetime(demo["tx_date"])).dt.days
    months = days / 30.4375
    np.testing.assert_allclose(demo["months_since_tx"], months, rtol=0, atol=0.005 + 1e-9)
    assert (months > 0).all() and (months <= P["max_followup_months"]).all()
    # administrative censoring: nothing after the data cut
    assert (pd.to_datetime(demo["visit_date"]) <= pd.Timestamp(P["data_cut_date"])).all()
    # one row per visit, sorted by recipient then date, no same-day repeats
    key = demo[["recipient_id", "visit_date"]]
    assert not key.duplicated().any()
    assert key.equals(key.sort_values(["recipient_id", "visit_date"]))


def test_baseline_covariates_constant_within_recipient(demo):
    cols = ["centre", "sex", "age_at_tx", "donor_type", "urine_protein_ratio", "tx_date"]
    nunique = demo.groupby("recipient_id")[cols].nunique(dropna=False)
    assert (nunique == 1).all().all()


def test_no_visit_after_first_subthreshold_egfr(demo):
    # brute force, one recipient at a time (a test may loop; the generator does not)
    thr = P["dropout_threshold"]
    n_dropped = 0
    for _, g in demo.groupby("recipient_id", sort=False):
        below = np.flatnonzero(g["egfr"].to_numpy() < thr)
        if below.size:
            n_dropped += 1
            assert below[0] == len(g) - 1, g["recipient_id"].iloc[0]
    # at least some recipients must exercise the rule, else the check is empty
    assert n_dropped >= 20


def test_documented_shares(demo):
    per = demo.groupby("recipient_id")
    n = per.ngroups
    assert n == P["n_recipients"]
    # missing marker: binomial share, 4 binomial SEs around the documented rate
    miss = per["urine_protein_ratio"].first().isna().mean()
    se = np.sqrt(P["p_marker_missing"] * (1 - P["p_marker_missing"]) / n)
    assert abs(miss - P["p_marker_missing"]) <= 4 * se
    # lost-early recipients (plus early dropouts) give at least the documented share of 1-2 visits
    short = (per.size() <= 2).mean()
    se = np.sqrt(P["p_lost_early"] * (1 - P["p_lost_early"]) / n)
    assert short >= P["p_lost_early"] - 4 * se
    # marker is right-skewed: mean above median (property of a lognormal)
    m = per["urine_protein_ratio"].first().dropna()
    assert m.mean() > m.median()


def test_serial_process_has_exponential_correlation():
    # exact AR(1) simulation of W: compare empirical variance/correlation with sigma^2 and
    # exp(-u/phi) from the model definition (Diggle, Heagerty, Liang & Zeger 2002, ch. 5),
    # random effects, noise and covariate effects switched off.
    gen = _generator_module()
    p = dict(P)
    # (random-effect SDs tiny rather than 0 so that G stays positive definite for Cholesky)
    p.update(sd_b0=1e-9, sd_b1=1e-12, corr_b0_b1=0.0, tau=0.0, beta0=1000.0, beta1=0.0, beta2=0.0,
             beta3=0.0, age_effect=0.0, deceased_effect=0.0, female_effect=0.0,
             centre_intercept_shift=(0.0,) * len(P["centres"]))
    n = 40_000
    base = pd.DataFrame({"centre_idx": np.zeros(n, int), "female": False, "age": 50,
                         "deceased": False, "marker": p["marker_ref"]})
    t = np.tile(np.array([0.0, 3.0, 12.0, 30.0]), (n, 1))
    w = gen.simulate_egfr(np.random.default_rng(1), p, base, t) - 1000.0
    np.testing.assert_allclose(w.var(axis=0), p["sigma_serial"] ** 2, rtol=0.05)
    c = np.corrcoef(w, rowvar=False)
    for j in range(1, 4):
        expected = np.exp(-(t[0, j] - t[0, 0]) / p["phi_months"])
        np.testing.assert_allclose(c[0, j], expected, atol=0.02)


@pytest.mark.slow
def test_mixed_model_recovers_interaction(demo):
    # reference library: statsmodels MixedLM (REML), random intercept + slope,
    # egfr ~ t * log2(marker / ref); the true beta1, beta3 are the generator's inputs.
    # The fixed slope and the interaction are not confounded by donor type (which only
    # shifts the intercept), so both should sit within 3 SE of the truth.
    import statsmodels.formula.api as smf

    d = demo.dropna(subset=["urine_protein_ratio"]).copy()
    d["t"] = d["months_since_tx"]
    d["x"] = np.log2(d["urine_protein_ratio"] / P["marker_ref"])
    fit = smf.mixedlm("egfr ~ t * x", d, groups=d["recipient_id"], re_formula="~t").fit(
        reml=True, method=["lbfgs"])
    for name, true in (("t:x", P["beta3"]), ("t", P["beta1"])):
        est, se = fit.fe_params[name], fit.bse_fe[name]
        assert abs(est - true) <= 3 * se, (name, est, se, true)
    # the interaction must be detectable in this cohort (the demo's point)
    assert abs(fit.fe_params["t:x"]) / fit.bse_fe["t:x"] > 3
