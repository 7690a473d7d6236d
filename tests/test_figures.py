"""Dashboard figures drawn from real results, checked against independent computations.

The results come from 150 subjects of the demo registry run through the
Workbench; every check on what a figure shows names the outside reference it is
compared with (pandas, scipy, statsmodels or a brute-force loop in the test).
"""
from __future__ import annotations

import dataclasses
import re

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import pytest
from scipy import stats
from statsmodels.nonparametric.smoothers_lowess import lowess

from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.preparation.loading import Dataset
from analysis.pipeline import Workbench
from analysis.exploration import summaries
from app import figures, palette
from app.sections import courses, followup, lagcorr, rate
from app.sections import lines as lines_view

N_SUBJECTS = 150


def _run(settings):
    df = load_demo()
    ids = np.sort(df["recipient_id"].unique())[:N_SUBJECTS]
    ds = Dataset.from_frame(df[df["recipient_id"].isin(ids)].reset_index(drop=True))
    wb, roles = Workbench(), demo_roles()
    cohort = wb.cohort(ds, roles, settings)
    frame = cohort.frame
    frame["subject"] = frame["subject"].astype(str)
    return {
        "wb": wb, "ds": ds, "roles": roles, "settings": settings, "cohort": cohort,
        "frame": frame, "lines": wb.subject_lines(ds, roles, settings),
        "vg": wb.variogram(ds, roles, settings), "lc": wb.lag_correlation(ds, roles, settings),
        "summ": wb.summaries(ds, roles, settings),
        "resid": wb.residual_panel(ds, roles, settings),
    }


@pytest.fixture(scope="module")
def res():
    return _run(demo_settings())


@pytest.fixture(scope="module")
def loose():
    """Two-visit subjects kept and subjects without the covariate kept ("No value" group)."""
    return _run(dataclasses.replace(demo_settings(), min_visits=2, require_covariate=False))


def _shown(r, per=15, keep=None):
    chosen, _, _ = courses.sample_subjects(r["frame"], per_stratum=per, seed=3, keep=keep)
    return r["frame"][r["frame"]["subject"].isin(set(chosen))]


def _all_figures(r):
    c, lines, summ = r["cohort"], r["lines"], r["summ"]
    sid = str(lines["subject"].iloc[0])
    return {
        "courses": courses.courses_figure(_shown(r), full=r["frame"], look=figures.cohort_look(c), highlight_subject=sid),
        "variogram": figures.variogram_figure(r["vg"], look=figures.cohort_look(c)),
        "lag_heatmap": lagcorr.lag_heatmap_figure(r["lc"], look=figures.cohort_look(c)),
        "intervals": lines_view.intervals_figure(lines, look=figures.cohort_look(c), order="slope", highlight_subject=sid),
        "slopes_by_stratum": rate.slopes_by_stratum_figure(lines, look=figures.cohort_look(c)),
        "slope_vs_covariate": rate.slope_vs_covariate_figure(lines, summ.slope_smooth, look=figures.cohort_look(c)),
        "visits": followup.visits_figure(lines, look=figures.cohort_look(c)),
        "dropout": followup.dropout_figure(summ.dropout, look=figures.cohort_look(c)),
    }


def _axis_titles(fig, letter):
    lay = fig.layout.to_plotly_json()
    return [v.get("title", {}).get("text", "") for k, v in lay.items()
            if re.fullmatch(fr"{letter}axis\d*", k)]


def _trace_axes(fig):
    return {(t.xaxis or "x", t.yaxis or "y") for t in fig.data}


def _rgb(colour: str) -> tuple[int, int, int]:
    if colour.startswith("#"):
        return palette.hex_to_rgb(colour)
    return tuple(int(float(v)) for v in re.findall(r"[\d.]+", colour)[:3])


# ----------------------------------------------------------------------- every figure
def test_every_figure_has_title_axis_titles_legend_and_units(res):
    unit = res["roles"].response_unit
    assert unit, "the demo roles carry a response unit"
    for name, fig in _all_figures(res).items():
        assert fig.layout.title.text, name
        xt = [t for t in _axis_titles(fig, "x") if t]
        yt = [t for t in _axis_titles(fig, "y") if t]
        assert xt and yt, name
        # the fonts come from the figures' shared template unless a figure sets its own
        assert (fig.layout.font.size or fig.layout.template.layout.font.size) >= 14, name
        has_legend = fig.layout.showlegend is not False and any(
            t.showlegend is not False and t.name for t in fig.data)
        has_colorbar = any(getattr(t, "colorbar", None) is not None and t.type == "heatmap"
                           for t in fig.data)
        assert has_legend or has_colorbar, name
    figs = _all_figures(res)
    # units: time label from the cohort, response with its unit, squared unit on the semivariogram
    assert res["cohort"].time_label in _axis_titles(figs["courses"], "x")
    assert any(unit in t for t in _axis_titles(figs["courses"], "y"))
    assert any(f"({unit})²" in t for t in _axis_titles(figs["variogram"], "y"))
    assert "time apart (months)" in _axis_titles(figs["variogram"], "x")
    assert any("per month" in t and unit in t for t in _axis_titles(figs["intervals"], "x"))


# ----------------------------------------------------------------------- 1 courses
def test_courses_one_panel_per_group_means_from_every_subject(res):
    c, frame = res["cohort"], res["frame"]
    shown = _shown(res)
    fig = courses.courses_figure(shown, full=frame, look=figures.cohort_look(c))
    labels = list(c.strata.labels)
    # one panel per stratum: distinct subplot axes used by traces (legend key trace excluded)
    used = {ax for ax in _trace_axes(fig)}
    assert len(used) == len(labels) == c.strata.n_strata
    # one subject-line trace per group, never one per subject
    line_traces = [t for t in fig.data if t.mode == "lines" and t.legendgroup in labels
                   and t.showlegend]
    assert len(line_traces) == len(labels)
    drawn = {v for t in line_traces for v in t.customdata if v is not None}
    assert drawn == set(shown["subject"])
    # the figure draws analysis.exploration.summaries.group_means (tested on its own in test_summaries.py);
    # reference: pandas — the same 12 equal-width bins cut with pd.cut over ALL subjects
    t = frame["time"].to_numpy(float)
    edges = np.linspace(t.min(), t.max(), summaries.MEAN_BINS + 1)
    edges[-1] = np.nextafter(edges[-1], np.inf)
    ref = (frame.assign(bin=pd.cut(frame["time"], edges, right=False, labels=False))
           .groupby(["stratum_label", "bin"])
           .agg(time=("time", "mean"), response=("response", "mean"), n=("time", "size"))
           .reset_index())
    ref = ref[ref["n"] >= summaries.MEAN_MIN_VISITS]
    for lab in labels:
        tr = next(t for t in fig.data if t.name == f"{figures.cohort_look(c).group_title(lab)} mean")
        want = ref[ref["stratum_label"] == lab].sort_values("time")
        np.testing.assert_allclose(np.asarray(tr.x, float), want["time"], rtol=1e-10)
        np.testing.assert_allclose(np.asarray(tr.y, float), want["response"], rtol=1e-10)
    # the covariate is named once, in the figure title; each panel title is the group's
    # range with its subject count (reference: pandas nunique of subjects per group)
    assert c.roles.label(c.strata.name) in fig.layout.title.text     # its display label
    per = frame.groupby("stratum_label")["subject"].nunique()
    assert len(fig.layout.annotations) >= len(labels)
    for lab, ann in zip(labels, fig.layout.annotations):
        assert c.strata.name not in ann.text
        assert ann.text.replace("<br>", " ") == f"{lab} · n = {per[lab]:,}", ann.text


def test_courses_highlights_subject_and_group(res):
    c, frame = res["cohort"], res["frame"]
    sid = str(frame["subject"].iloc[0])
    lab = str(frame["stratum_label"].iloc[0])
    other = next(s for s in c.strata.labels if s != lab)
    fig = courses.courses_figure(_shown(res, keep=sid), full=frame, look=figures.cohort_look(c), highlight_subject=sid,
                       highlight_stratum=lab)
    hl = [t for t in fig.data if t.name == f"subject {sid}"]
    assert len(hl) == 1 and hl[0].line.color == palette.HIGHLIGHT_COLOR
    # reference: the subject's own rows in the cohort frame (pandas filter)
    own = frame[frame["subject"] == sid].sort_values("time")
    np.testing.assert_allclose(np.asarray(hl[0].y, float), own["response"])
    assert set(hl[0].customdata) == {sid}
    # the highlighted group's subject lines are more opaque than another group's
    alpha = {t.legendgroup: float(re.findall(r"[\d.]+", t.line.color)[3])
             for t in fig.data if t.mode == "lines" and t.showlegend and t.legendgroup}
    assert alpha[lab] > alpha[other]


# ----------------------------------------------------------------------- 2 semivariogram
def test_variogram_pairs_sizes_and_model_curves(res):
    vg, c, panel = res["vg"], res["cohort"], res["resid"]
    curves = pd.DataFrame({"model": ["exponential"] * 3, "lag": [0.0, 10.0, 40.0],
                           "gamma": [5.0, 20.0, 30.0]})
    fig = figures.variogram_figure(vg, look=figures.cohort_look(c))
    fitted = figures.variogram_figure(vg, look=figures.cohort_look(c), model_curves=curves,
                                      preferred="exponential")
    pts = fig.data[0]
    pairs = np.asarray(pts.customdata)[:, 2].astype(float)
    # reference: brute force — every within-subject pair by a pandas self-merge, binned by numpy
    d = pd.DataFrame({"s": panel.codes, "t": panel.time})
    d["i"] = np.arange(len(d))
    m = d.merge(d, on="s")
    lag = (m["t_x"] - m["t_y"]).abs()[m["i_x"] < m["i_y"]]
    lag = lag[lag <= vg.max_lag]
    edges = np.r_[vg.bins["lag_lo"].to_numpy(), vg.bins["lag_hi"].to_numpy()[-1]]
    counts, _ = np.histogram(lag, bins=edges)
    np.testing.assert_array_equal(pairs, counts[counts > 0])
    # marker area grows with the pair count: sizes ordered like the brute-force counts
    size = np.asarray(pts.marker.size, float)
    i, j = np.triu_indices(len(size), 1)
    assert np.all(np.sign(size[i] - size[j]) == np.sign(pairs[i] - pairs[j]))
    # the same points under the fitted curves (one figure function, one style)
    assert list(fitted.data[0].y) == list(pts.y) and list(fitted.data[0].marker.size) == list(size)
    model = [t for t in fitted.data if t.name == "exponential ★"]
    assert len(model) == 1 and list(model[0].y) == curves["gamma"].tolist()
    assert len(fitted.data) == 2     # points and one curve: no smooth, no process variance
    ref = [t for t in fig.data if t.name.startswith("process variance")]
    assert ref and ref[0].line.dash == "dash"
    assert any("process variance" in (a.text or "") for a in fig.layout.annotations)


# ----------------------------------------------------------------------- 3 lag correlation
def test_heatmap_text_matches_pandas_corr_and_counts(res):
    lc, panel = res["lc"], res["resid"]
    fig = lagcorr.lag_heatmap_figure(lc, look=figures.cohort_look(res["cohort"]))
    heat = next(t for t in fig.data if t.type == "heatmap")
    assert (heat.zmin, heat.zmax) == (-1, 1)
    # reference: pandas — per-subject window means, pairwise-complete DataFrame.corr and counts
    start, width = float(lc.windows["lo"].iloc[0]), lc.width
    k = len(lc.windows)
    win = np.clip(np.floor((panel.time - start) / width + 1e-9), 0, k - 1).astype(int)
    wide = (pd.DataFrame({"s": panel.codes, "w": win, "y": panel.y})
            .pivot_table(index="s", columns="w", values="y", aggfunc="mean")
            .reindex(columns=range(k)))
    r = wide.corr(method="pearson", min_periods=3).to_numpy()
    seen = wide.notna().to_numpy().astype(int)
    n = seen.T @ seen
    text = np.asarray(heat.text, dtype=object)
    for a in range(k):
        for b in range(k):
            got = text[a, b].split("<br>")
            assert got[-1] == f"n={n[a, b]}"
            if np.isfinite(r[a, b]):
                assert abs(float(got[0]) - r[a, b]) <= 0.005 + 1e-9
            else:
                assert len(got) == 1
    # variance bars: pandas var (ddof=1) of the window columns
    bars = next(t for t in fig.data if t.type == "bar")
    np.testing.assert_allclose(np.asarray(bars.y, float), wide.var(ddof=1).to_numpy(),
                               rtol=1e-9)


# ----------------------------------------------------------------------- 4 slope intervals
def _segments_by_row(fig):
    out = {}
    for t in fig.data:
        if t.mode == "lines" and t.name and t.name.endswith("intervals"):
            xs = np.asarray(t.x, dtype=object).reshape(-1, 3)
            ys = np.asarray(t.y, dtype=object).reshape(-1, 3)
            out.update({float(y): (float(x0), float(x1)) for (x0, x1, _), (y, _, _) in zip(xs, ys)})
    return out


def test_interval_ends_equal_scipy_t_intervals_and_groups_are_ordered(res):
    c, lines, frame = res["cohort"], res["lines"], res["frame"]
    fig = lines_view.intervals_figure(lines, look=figures.cohort_look(c), order="slope")
    seg = _segments_by_row(fig)
    # reference: scipy.stats.linregress per subject (a plain loop) and the t quantile
    ref = {}
    for sid, g in frame.groupby("subject"):
        if len(g) >= 3:
            lr = stats.linregress(g["time"], g["response"])
            q = stats.t.ppf(0.975, len(g) - 2)
            ref[sid] = (lr.slope, lr.slope - q * lr.stderr, lr.slope + q * lr.stderr)
    checked = 0
    order_in_group = []
    for t in fig.data:
        if t.mode == "markers" and t.legendgroup in c.strata.labels:
            cd = np.asarray(t.customdata, dtype=object)
            for sid, x, y in zip(cd[:, 0], t.x, t.y):
                slope, lo, hi = ref[str(sid)]
                assert x == pytest.approx(slope, rel=1e-9, abs=1e-12)
                assert seg[float(y)] == pytest.approx((lo, hi), rel=1e-8, abs=1e-10)
                checked += 1
            order_in_group.append((t.legendgroup, np.asarray(t.y, float), np.asarray(t.x, float)))
    assert checked == len(ref) == len(lines)
    # within each group, top-to-bottom position follows the slope (numpy argsort reference)
    for _, ys, xs in order_in_group:
        assert np.all(np.diff(xs[np.argsort(ys)]) >= 0)
    # groups follow stratum order from top to bottom
    tops = [ys.min() for _, ys, _ in order_in_group]
    assert tops == sorted(tops)
    assert [g for g, _, _ in order_in_group] == list(c.strata.labels)


@pytest.mark.parametrize("order", ["intercept", "covariate", "subject"])
def test_interval_orders(res, order):
    lines = res["lines"]
    fig = lines_view.intervals_figure(lines, look=figures.cohort_look(res["cohort"]), order=order)
    ref = lines.set_index(lines["subject"].astype(str))
    for t in fig.data:
        if t.mode == "markers" and t.legendgroup in res["cohort"].strata.labels:
            sids = np.asarray(t.customdata, dtype=object)[:, 0][np.argsort(np.asarray(t.y))]
            key = (pd.Series(sids) if order == "subject"
                   else ref.loc[sids, order].reset_index(drop=True))
            # reference: pandas Series.is_monotonic_increasing on the sorted keys
            assert key.is_monotonic_increasing


def test_two_visit_subjects_are_points_named_in_legend(loose):
    lines, frame = loose["lines"], loose["frame"]
    fig = lines_view.intervals_figure(lines, look=figures.cohort_look(loose["cohort"]), order="slope")
    two = [t for t in fig.data if t.legendgroup == "two-visits"]
    # reference: pandas count of visits per subject in the cohort frame
    n_visits = frame.groupby("subject").size()
    expected = set(n_visits[n_visits == 2].index)
    assert expected, "the loose settings keep some two-visit subjects"
    got = {str(s) for t in two for s in np.asarray(t.customdata, dtype=object)[:, 0]}
    assert got == expected
    assert sum(bool(t.showlegend) for t in two) == 1
    assert "no interval" in two[0].name


def test_many_subjects_stay_readable(res):
    base = res["lines"]
    big = pd.concat([base.assign(subject=base["subject"].astype(str) + f"-{k}")
                     for k in range(3)], ignore_index=True)
    assert len(big) > 300
    fig = lines_view.intervals_figure(big, look=figures.cohort_look(res["cohort"]), order="slope")
    # y ticks name the groups, not 450 subjects; one interval trace + one point trace per group
    assert len(fig.layout.yaxis.tickvals) == res["cohort"].strata.n_strata
    assert len(fig.data) <= 3 * res["cohort"].strata.n_strata + 2
    ids = {s for t in fig.data if t.customdata is not None
           for s in np.asarray(t.customdata, dtype=object)[:, 0]}
    assert ids == set(big["subject"])
    # WebGL is painted above SVG: the highlighted subject must be drawn with the same kind
    sid = str(big["subject"].iloc[7])
    fig = lines_view.intervals_figure(big, look=figures.cohort_look(res["cohort"]), order="slope", highlight_subject=sid)
    hl = next(t for t in fig.data if t.name == f"subject {sid}")
    assert hl.type == fig.data[0].type == "scattergl"
    assert list(hl.customdata[0])[0] == sid


def test_bad_order_is_a_clear_error(res):
    with pytest.raises(ValueError, match="order == 'visits', must be one of"):
        lines_view.intervals_figure(res["lines"], look=figures.cohort_look(res["cohort"]), order="visits")


# ----------------------------------------------------------------------- 5 rate of change
def test_slopes_by_group_and_against_covariate(res):
    c, lines, summ = res["cohort"], res["lines"], res["summ"]
    box = rate.slopes_by_stratum_figure(lines, look=figures.cohort_look(c))
    # reference: pandas groupby of the subject-lines table
    by = lines.groupby("stratum_label")["slope"].apply(lambda s: sorted(s.dropna()))
    for t in box.data:
        if t.type == "box":
            lab = np.asarray(t.customdata, dtype=object)[0, 1]
            assert sorted(np.asarray(t.y, float)) == pytest.approx(by[lab])
    fig = rate.slope_vs_covariate_figure(lines, summ.slope_smooth, look=figures.cohort_look(c))
    assert fig.layout.xaxis.type == "log"     # log2 transform of a positive covariate
    assert "mg/mmol" in fig.layout.xaxis.title.text
    pts = [t for t in fig.data if t.mode == "markers"]
    xs = np.concatenate([np.asarray(t.x, float) for t in pts])
    # reference: the raw covariate in the cohort's baseline table
    raw = c.baseline[c.covariate].to_numpy(float)
    assert sorted(xs) == pytest.approx(sorted(raw[np.isfinite(raw)]))
    # reference: statsmodels lowess (frac 0.6, 3 robustness iterations) recomputed here
    smooth = next(t for t in fig.data if t.mode == "lines" and "lowess" in t.name)
    ok = np.isfinite(raw) & np.isfinite(lines["slope"].to_numpy(float))
    out = lowess(lines["slope"].to_numpy(float)[ok], raw[ok], frac=0.6, it=3)
    xu, idx = np.unique(out[:, 0], return_index=True)
    np.testing.assert_allclose(np.asarray(smooth.y, float), out[idx, 1], rtol=1e-9)


# ----------------------------------------------------------------------- 5 follow-up
def test_visits_histogram_matches_pandas_counts(res):
    c, frame = res["cohort"], res["frame"]
    fig = followup.visits_figure(res["lines"], look=figures.cohort_look(c))
    # reference: pandas — visits per subject from the long frame, counted per group
    per = frame.groupby(["stratum_label", "subject"]).size().rename("n").reset_index()
    title_to_label = {figures.cohort_look(c).group_title(lab): lab for lab in c.strata.labels}
    for t in fig.data:
        want = per[per["stratum_label"] == title_to_label[t.name]]["n"].value_counts()
        got = pd.Series(np.asarray(t.y, int), index=np.asarray(t.x, int))
        assert got[got > 0].to_dict() == want.to_dict()


def test_dropout_retention_curves_and_last_visit_means(res):
    c, frame, summ = res["cohort"], res["frame"], res["summ"]
    d = summ.dropout
    fig = followup.dropout_figure(d, look=figures.cohort_look(c))
    subj = d.subjects.assign(subject=d.subjects["subject"].astype(str))
    for lab in c.strata.labels:
        tr = next(t for t in fig.data if t.legendgroup == lab and t.name and t.line.width)
        x, y = np.asarray(tr.x, float), np.asarray(tr.y, float)
        grp = subj[subj["subject"].isin(set(frame.loc[frame["stratum_label"] == lab,
                                                       "subject"]))]
        left = grp["status"].to_numpy() == "left_early"
        time = np.where(left, grp["last_time"], np.minimum(grp["potential_followup"], d.horizon))
        # reference: Kaplan–Meier by brute force — product over leaving times of (1 − d/n)
        for xv, yv in zip(x[1:], y[1:]):
            s = 1.0
            for u in np.unique(time[left & (time <= xv)]):
                s *= 1 - np.sum(left & (time == u)) / np.sum(time >= u)
            assert yv == pytest.approx(s, abs=1e-12)
    # right panel: pandas groupby mean of the last response by (group, left early or not)
    last = frame.sort_values("time").groupby("subject").agg(
        lab=("stratum_label", "first"), y=("response", "last"))
    last["early"] = subj.set_index("subject").loc[last.index, "left_early"].to_numpy()
    ref = last.groupby(["lab", "early"])["y"].mean()
    for name, early in (("left early", True), ("did not leave", False)):
        tr = next(t for t in fig.data if t.name == name and t.customdata is not None)
        for lab, m in zip(np.asarray(tr.customdata, dtype=object)[:, 0], tr.x):
            if lab in c.strata.labels:
                assert m == pytest.approx(ref[(lab, early)])


def test_dropout_without_potential_followup_shows_last_visits_only(res):
    from analysis.exploration.summaries import dropout_summary

    c, frame = res["cohort"], res["frame"]
    d = dropout_summary(c.panel, c.strata, subject_ids=c.subject_ids)
    fig = followup.dropout_figure(d, look=figures.cohort_look(c))
    assert "cannot be told apart" in fig.layout.title.subtitle.text
    assert fig.layout.yaxis.title.text == "share seen at or after"
    assert not [a for a in fig.layout.annotations if a.text.startswith("horizon")]
    tr = next(t for t in fig.data if t.name == "All subjects")
    last = frame.groupby("subject")["time"].max().to_numpy()
    # reference: brute force — share of subjects whose last visit is after x
    for xv, yv in zip(np.asarray(tr.x)[1:], np.asarray(tr.y)[1:]):
        assert yv == pytest.approx(np.mean(last > xv))


# ----------------------------------------------------------------------- colours
def test_group_colours_are_the_same_in_every_view_and_no_value_is_grey(loose):
    c = loose["cohort"]
    labels = list(c.strata.labels) + ["No value"]
    assert (c.strata.codes < 0).any(), "the loose settings keep subjects without the covariate"
    want = {lab: palette.hex_to_rgb(col) for lab, col in palette.stratum_colours(labels).items()}
    assert want["No value"] == palette.hex_to_rgb(palette.NO_STRATUM_COLOR)
    figs = _all_figures(loose)
    title = {figures.cohort_look(c).group_title(lab): lab for lab in labels}
    seen = []
    for t in figs["courses"].data:
        if t.mode == "lines" and t.showlegend and t.legendgroup in want:
            seen.append((t.legendgroup, _rgb(t.line.color)))
    for t in figs["visits"].data:
        seen.append((title[t.name], _rgb(t.marker.color)))
    for t in figs["slope_vs_covariate"].data:
        if t.mode == "markers" and t.name in title:
            seen.append((title[t.name], _rgb(t.marker.color)))
    assert {lab for lab, _ in seen} >= set(labels)
    for lab, rgb in seen:
        assert rgb == want[lab], lab


def test_empty_figure_carries_the_message():
    fig = figures.empty_figure("Choose the response column.")
    assert fig.layout.annotations[0].text == "Choose the response column."


def test_categorical_covariate_gives_a_message_not_a_traceback(res):
    lines = res["lines"]
    cat = lines.assign(covariate=np.where(lines["slope"] > 0, "rising", "falling"))
    fig = rate.slope_vs_covariate_figure(cat, None, look=figures.cohort_look(res["cohort"]))
    assert "no numeric values" in fig.layout.annotations[0].text
    fig = lines_view.intervals_figure(cat, look=figures.cohort_look(res["cohort"]), order="covariate")
    # reference: pandas — text keys sort alphabetically within each group
    for t in fig.data:
        if t.mode == "markers" and t.legendgroup in res["cohort"].strata.labels:
            sids = np.asarray(t.customdata, dtype=object)[:, 0][np.argsort(np.asarray(t.y))]
            keys = cat.set_index(cat["subject"].astype(str)).loc[sids, "covariate"]
            assert keys.reset_index(drop=True).is_monotonic_increasing


# ----------------------------------------------------------------------- readable layout
def test_panel_titles_fit_their_panels_and_wrap_long_labels():
    # reference: the character budget documented in courses.panel_title (100 characters
    # across the graph, shared by the panel columns) — checked on the produced text
    for ncol in (1, 2, 3, 4):
        budget = int(100 / ncol)
        for label in ("1.0 – 10.7", "37.8 – 318.9", "deceased donor, extended criteria"):
            text = courses.panel_title(label, 1265, ncol=ncol)
            lines = text.split("<br>")
            assert all(len(line) <= max(budget, len(max(label.split(), key=len))) for line in lines)
            assert " ".join(lines).replace(" · ", " ").split() == (
                f"{label} n = 1,265".split()), text
    assert courses.panel_title("1.0 – 10.7", 5, ncol=4, bold=True).startswith("<b>1.0 – 10.7")


def test_rate_and_dropout_labels_are_short_and_carry_units(res):
    c, lines, summ = res["cohort"], res["lines"], res["summ"]
    look = figures.cohort_look(c)
    unit = res["roles"].response_unit
    box = rate.slopes_by_stratum_figure(lines, look=figures.cohort_look(c))
    # x ticks: the bare group ranges (the analysis layer's labels), horizontal; the unit
    # is named once in the axis title
    assert list(box.layout.xaxis.tickvals) == list(c.strata.labels)
    assert [t.replace(" –<br>", " – ") for t in box.layout.xaxis.ticktext] == list(c.strata.labels)
    assert box.layout.xaxis.tickangle == 0
    assert look.stratifier_unit and look.stratifier_unit in box.layout.xaxis.title.text
    # the slope axis title wraps onto two lines and keeps its units
    scatter = rate.slope_vs_covariate_figure(lines, summ.slope_smooth, look=figures.cohort_look(c))
    for fig in (box, scatter):
        title = fig.layout.yaxis.title.text
        assert title.count("<br>") == 1 and unit in title and "per month" in title
        assert max(len(part) for part in title.split("<br>")) <= 30
        assert fig.layout.margin.t >= rate.RATE_TOP
    # dropout: "All subjects" without the covariate's unit; the horizon with the time unit
    drop = followup.dropout_figure(summ.dropout, look=figures.cohort_look(c))
    ticks = list(drop.layout.yaxis2.ticktext)
    assert "All subjects" in ticks
    assert all(t.endswith(look.stratifier_unit) for t in ticks if t != "All subjects")
    horizon = [a.text for a in drop.layout.annotations if a.text.startswith("horizon")]
    assert horizon == [f"horizon {summ.dropout.horizon:.3g} months"]
    assert drop.layout.xaxis.title.text == c.time_label
    assert drop.layout.yaxis.title.text == "share not yet left"
    # the subtitle gives the counts per status in words (from the analysis result)
    sub = drop.layout.title.subtitle.text
    h = f"{summ.dropout.horizon:.3g} months"
    assert f"{summ.dropout.counts['left_early']:,} left before {h}" in sub
    assert f"{summ.dropout.counts['complete']:,} followed to {h}" in sub


def test_foot_margins_grow_with_the_legend_and_tick_labels_they_hold():
    """Server-set margins that hold the legend and labels (checked against the drawn figure in
    tests/browser: plotly.js need not widen them)."""
    from app.figures import (X_AXIS_BLOCK_PX, foot_bottom, foot_legend_bottom,
                             legend_entries, tick_label_left)

    fig = go.Figure([go.Scatter(x=[1], y=[1], name=f"group {i}") for i in range(3)])
    names, grouped = legend_entries(fig)
    assert names == ["group 0", "group 1", "group 2"] and not grouped
    narrow, wide = foot_bottom(fig, width=150), foot_bottom(fig, width=2000)
    assert narrow > wide > X_AXIS_BLOCK_PX          # a narrower plot wraps the legend
    fig.update_layout(showlegend=False)
    assert foot_bottom(fig, width=150) == X_AXIS_BLOCK_PX
    assert foot_legend_bottom(["a"] * 4, grouped=True) > foot_legend_bottom(["a"] * 4)
    assert tick_label_left(["R1"], least=110) == 110
    assert tick_label_left(["37.8 – 318.9 mg/mmol"]) > tick_label_left(["1.0 – 10.7"])
