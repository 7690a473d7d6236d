"""The summarised per-subject figures (app/digest_figures.py): their size does not grow with the
cohort, and what a click carries or lists is what the full data say.

References: numpy.percentile and numpy.histogram2d on the synthetic subject lines made here, and
a brute-force count in the test.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from app import digest_figures as dfg
from app import palette
from app.figures import CohortLook

LABELS = ("low", "mid", "high")


def synthetic_lines(n: int, seed: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    g = rng.integers(0, 3, n)
    slope = rng.normal(-0.1 * g, 0.3)
    half = np.abs(rng.normal(0.25, 0.05, n))
    has = rng.random(n) > 0.1
    return pd.DataFrame({
        "subject": [f"S{i:06d}" for i in range(n)], "n": rng.integers(2, 12, n),
        "intercept": rng.normal(50, 10, n), "slope": slope,
        "slope_lo": np.where(has, slope - half, np.nan),
        "slope_hi": np.where(has, slope + half, np.nan), "has_interval": has,
        "stratum_label": np.asarray(LABELS, dtype=object)[g],
        "covariate": np.exp(rng.normal(3, 0.8, n))})


def look() -> CohortLook:
    return CohortLook(strata=LABELS, colours=dict(palette.stratum_colours(list(LABELS))),
                      time_unit="months", response="y", covariate="marker", transform="log2")


def _size(fig) -> int:
    return len(fig.to_json())


def test_summary_figures_keep_their_size_whatever_the_cohort():
    small, large = synthetic_lines(5_000, 1), synthetic_lines(50_000, 2)
    smooth = pd.DataFrame({"covariate": [1.0, 100.0], "slope_smooth": [0.0, -0.1]})
    for make in (lambda d: dfg.bands_figure(d, look=look(), highlight_subject="S000007"),
                 lambda d: dfg.box_figure(d, look=look(), highlight_subject="S000007"),
                 lambda d: dfg.density_figure(d, smooth, look=look(),
                                              highlight_subject="S000007")):
        a, b = _size(make(small)), _size(make(large))
        assert a < 300_000 and b < 300_000
        assert b < 1.25 * a          # ten times the subjects, about the same bytes


def test_each_band_point_carries_a_subject_of_its_band():
    lines = synthetic_lines(8_000, 3)
    fig = dfg.bands_figure(lines, look=look())
    bands = [t for t in fig.data if t.customdata is not None and len(t.customdata[0]) == 4
             and str(t.customdata[0][1]) in LABELS]
    assert len(bands) == 3
    for t in bands:
        lab = str(t.customdata[0][1])
        s = lines.loc[lines["stratum_label"] == lab, ["subject", "slope"]]
        for sid, _, lo_p, hi_p in t.customdata[::17]:
            # reference: numpy.percentile of the group's slopes at the band's ends
            lo, hi = np.percentile(s["slope"], [float(lo_p), float(hi_p)])
            mine = float(s.loc[s["subject"] == sid, "slope"].iloc[0])
            assert lo - 1e-12 <= mine <= hi + 1e-12


def test_density_cells_count_like_histogram2d_and_list_their_subjects():
    lines = synthetic_lines(6_000, 4)
    fig = dfg.density_figure(lines, None, look=look())
    heat = fig.data[0]
    z = np.nan_to_num(np.asarray(heat.z, dtype=float))
    _, cov, slope, grid = dfg.covariate_grid(lines, look())
    # reference: numpy.histogram2d of log10(covariate) and slope on the figure's edges
    ref, _, _ = np.histogram2d(np.log10(cov), slope, bins=[grid.x_edges, grid.y_edges])
    np.testing.assert_array_equal(z, ref.T)
    j, i = np.unravel_index(np.argmax(z), z.shape)
    got = dfg.cell_click_members(lines, look(), {"points": [{"pointNumber": [int(j), int(i)]}]})
    members, subjects, (x0, x1, y0, y1) = got
    assert members.total == int(z[j, i])
    picked = lines.set_index("subject").loc[list(subjects)]
    assert ((picked["covariate"] >= x0 * (1 - 1e-9)) & (picked["covariate"] <= x1 * (1 + 1e-9))
            & (picked["slope"] >= y0) & (picked["slope"] <= y1)).all()
    # the cell's own subject (what a click selects) lies in the cell, checked brute force
    own = lines.set_index("subject").loc[heat.customdata[j][i]]
    assert x0 * (1 - 1e-9) <= own["covariate"] <= x1 * (1 + 1e-9) and y0 <= own["slope"] <= y1


def test_course_sample_from_panel_rows_equals_searching_every_visit():
    """Reference: the sample drawn from ``frame.drop_duplicates`` and the rows found by
    ``frame.isin`` over every visit (the way the view found them before keeping them)."""
    from analysis.pipeline import Workbench
    from analysis.preparation.demo import demo_roles, demo_settings, load_demo
    from analysis.preparation.loading import Dataset
    from app.sections.courses import sample_subjects, subject_rows

    coh = Workbench().cohort(Dataset.from_frame(load_demo()), demo_roles(), demo_settings())
    frame = coh.frame
    frame["subject"] = frame["subject"].astype(str)
    firsts = pd.DataFrame({"subject": frame["subject"].to_numpy()[coh.panel.starts],
                           "stratum": np.asarray(coh.strata.codes)})
    for seed, keep in ((1, None), (2, "R00017"), (7, None)):
        a = sample_subjects(frame, per_stratum=40, seed=seed, keep=keep)
        b = sample_subjects(frame, per_stratum=40, seed=seed, keep=keep, firsts=firsts)
        assert list(a[0]) == list(b[0]) and a[1:] == b[1:]
        pd.testing.assert_frame_equal(frame.iloc[subject_rows(coh, b[0])],
                                      frame[frame["subject"].isin(set(a[0]))])
