"""The per-subject views as summaries, for cohorts above :data:`SUMMARY_SUBJECTS` subjects.

Each figure's size is fixed whatever the cohort's size (the numbers come from
:mod:`analysis.exploration.digest`):

* :func:`bands_figure` - subject slope intervals as percentile bands per group, with a seeded
  random sample of subjects drawn individually (the highlighted one always);
* :func:`density_figure` - slope against the covariate as counts on a grid, with the lowess
  curve over every subject and the highlighted subject on top;
* :func:`box_figure` - box statistics of the slopes per group, computed on the server.

A click on a band point or a grid cell selects one subject in it (its id is the point's
``customdata``, so the page's usual subject link applies) and :func:`members_note` lists the
first subjects in that band or cell.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from dash import html

from analysis.exploration.digest import (BAND_STEP, GRID_SHAPE, MEMBERS_SHOWN, SAMPLE_PER_GROUP,
                                         SUMMARY_SUBJECTS, WHISKER_IQR, band_members,
                                         box_statistics, cell_members, density_grid,
                                         percent_rank, percentile_bands, subject_sample)

from . import palette as pal
from .figures import (COLORBAR_RIGHT_PX, HALF_FIGURE_PX, CohortLook, _finish, _parenthesis,
                      category_ticks, x_axis_block,
                      _plural, _present_strata, _robust_range, _rows_to_segments, _strength,
                      empty_figure, reference_line, tick_label_left)
from .text import short

#: percent units between two groups' blocks in the band view
BAND_GAP = 14.0
DENSITY_SCALE = [[0.0, "#e8eef5"], [0.35, "#8fb0cf"], [1.0, "#1d3f63"]]


def summarised(lines: pd.DataFrame) -> bool:
    """Whether the per-subject views draw summaries for these subject lines."""
    return len(lines) > SUMMARY_SUBJECTS


def summary_note(n: int) -> str:
    """The first line of a summarised view's note."""
    return f"summary of all {n:,} subjects (shown so above {SUMMARY_SUBJECTS:,})"


def _codes(labels: pd.Series, order: list[str]) -> np.ndarray:
    """Each label's position in ``order`` (``len(order)`` for any other label or none);
    one text lookup per distinct label, not per subject."""
    rank = {s: i for i, s in enumerate(order)}
    codes, uniques = pd.factorize(labels, use_na_sentinel=True)
    lut = np.array([rank.get(str(u), len(order)) for u in uniques] + [len(order)],
                   dtype=np.int64)
    return lut[codes]              # code -1 (no label) -> the last entry


def _slopes(lines: pd.DataFrame, labels: list[str]):
    df = lines[np.isfinite(lines["slope"].to_numpy(float))].reset_index(drop=True)
    codes = _codes(df["stratum_label"], labels)
    has = df["has_interval"].to_numpy(bool)
    lo = np.where(has, df["slope_lo"].to_numpy(float), np.nan)
    hi = np.where(has, df["slope_hi"].to_numpy(float), np.nan)
    return df, codes, df["slope"].to_numpy(float), lo, hi


# --------------------------------------------------------------------------- bands
#: the title block hung from the figure's top edge (a three-line subtitle then grows
#: downwards into the top margin instead of into the plot)
TITLE_AT_TOP = {"yref": "container", "y": 1.0, "yanchor": "top", "pad": {"t": 12}}


def bands_figure(lines: pd.DataFrame, *, look: CohortLook, highlight_subject=None,
                 highlight_stratum=None, seed: int = 1,
                 per_group: int = SAMPLE_PER_GROUP) -> go.Figure:
    """Per group, every :data:`BAND_STEP`-th percentile of the subject slopes (a line of
    points, each carrying the subject at that rank) inside the band of the same percentiles
    of the interval ends; a random sample of subjects drawn individually at their own rank."""
    labels = _present_strata(look, lines["stratum_label"][np.isfinite(
        lines["slope"].to_numpy(float))])
    df, codes, slope, lo, hi = _slopes(lines, labels)
    bands = percentile_bands(slope, lo, hi, codes, step=BAND_STEP)
    rank = percent_rank(slope, codes)
    sid = df["subject"].astype(str).to_numpy(dtype=object)
    keep = None
    if highlight_subject is not None:
        hit = np.flatnonzero(sid == str(highlight_subject))
        keep = int(hit[0]) if hit.size else None
    sample = subject_sample(codes, per_group=per_group, seed=seed, keep=keep)
    # the subject at each band point's rank: sorted position round(p (n - 1) / 100)
    order = np.lexsort((slope, codes))
    starts = np.searchsorted(codes[order], bands.groups)
    pos = np.rint(bands.percent[None, :] / 100.0 * (bands.n[:, None] - 1)).astype(np.int64)
    rep = sid[order[starts[:, None] + pos]]
    fig = go.Figure()
    offsets = {}
    half = BAND_STEP / 2
    for r, g in enumerate(bands.groups):
        lab = labels[g] if g < len(labels) else str(g)
        off = r * (100.0 + BAND_GAP)
        offsets[lab] = off
        colour = look.colour(lab)
        strength = _strength(look, lab, highlight_stratum)
        y = off + bands.percent
        ok = np.isfinite(bands.lo[r]) & np.isfinite(bands.hi[r])
        if ok.any():
            fig.add_trace(go.Scatter(
                x=np.r_[bands.lo[r][ok], bands.hi[r][ok][::-1]], y=np.r_[y[ok], y[ok][::-1]],
                mode="lines", fill="toself", line={"width": 0}, hoverinfo="skip",
                fillcolor=pal.with_alpha(colour, 0.22 * strength), legendgroup=lab,
                showlegend=False, name=f"{lab}: interval ends"))
        custom = np.c_[rep[r], np.full(y.size, lab, dtype=object),
                       np.maximum(bands.percent - half, 0), np.minimum(bands.percent + half, 100)]
        fig.add_trace(go.Scatter(
            x=bands.slope[r], y=y, mode="lines+markers", name=look.group_title(lab),
            legendgroup=lab, customdata=custom,
            line={"color": pal.with_alpha(colour, strength), "width": 2},
            marker={"color": pal.with_alpha(colour, strength), "size": 4},
            hovertemplate=(f"{look.group_title(lab)}<br>%{{customdata[2]:.1f}}–"
                           f"%{{customdata[3]:.1f}}th percentile of slope: %{{x:.3g}} "
                           f"{look.per_time}<br>click: select subject %{{customdata[0]}}, "
                           "list the subjects of this band<extra></extra>")))
    # the sample, each subject at its own rank in its group
    s = sample[np.isin(codes[sample], bands.groups)]
    s_lab = np.array([labels[g] if g < len(labels) else str(g) for g in codes[s]], dtype=object)
    s_y = np.array([offsets[lab] for lab in s_lab], dtype=float) + rank[s]
    s_has = np.isfinite(lo[s])
    xs, ys = _rows_to_segments(lo[s][s_has], hi[s][s_has], s_y[s_has], s_y[s_has])
    fig.add_trace(go.Scatter(x=xs, y=ys, mode="lines", hoverinfo="skip", showlegend=False,
                             line={"color": "rgba(60,60,60,0.35)", "width": 1},
                             name="sampled subjects' intervals"))
    hover = ("subject %{customdata[0]}<br>slope %{x:.3g} " + look.per_time +
             "<br>interval %{customdata[1]:.3g} to %{customdata[2]:.3g}"
             "<br>%{customdata[3]} visits<extra></extra>")
    fig.add_trace(go.Scatter(
        x=slope[s], y=s_y, mode="markers", name=f"{s.size:,} subjects drawn at random",
        customdata=np.c_[sid[s], lo[s], hi[s], df["n"].to_numpy()[s]],
        marker={"color": "rgba(40,40,40,0.75)", "size": 5, "symbol": "circle-open"},
        hovertemplate=hover))
    if keep is not None and codes[keep] in bands.groups:
        lab = labels[codes[keep]]
        yk = offsets[lab] + rank[keep]
        if np.isfinite(lo[keep]):
            fig.add_trace(go.Scatter(x=[lo[keep], hi[keep]], y=[yk, yk], mode="lines",
                                     showlegend=False, hoverinfo="skip",
                                     line={"color": pal.HIGHLIGHT_COLOR, "width": 4}))
        fig.add_trace(go.Scatter(
            x=[slope[keep]], y=[yk], mode="markers+text", name=f"subject {highlight_subject}",
            customdata=[[str(highlight_subject), lo[keep], hi[keep], int(df["n"].iloc[keep])]],
            text=[f"  {highlight_subject}"], textposition="middle right",
            textfont={"size": 14, "color": pal.HIGHLIGHT_COLOR},
            marker={"color": pal.HIGHLIGHT_COLOR, "size": 13, "symbol": "diamond",
                    "line": {"color": "#ffffff", "width": 1.5}}, hovertemplate=hover))
    xr, _ = _robust_range(np.r_[bands.lo.ravel(), bands.hi.ravel(), bands.slope.ravel()],
                          q=0.01)
    no_slope = int(len(lines) - len(df))
    drawn = f"{s.size:,} subjects drawn at random (sample {seed}) at their rank"
    if no_slope:
        drawn += f" · {no_slope:,} without a slope not shown"
    reference_line(fig, x=0, line={"color": pal.REFERENCE_COLOR, "width": 1.5, "dash": "dot"})
    ticks = [look.group_title(k) for k in offsets]
    # one line each, so none runs past the figure's edge; the title block hangs from the top
    _finish(fig, "Each subject's slope with its 95% interval, as percentile bands",
            subtitle=(summary_note(len(df)) + ", ordered by slope<br>per group every "
                      f"{BAND_STEP:g}th percentile of slope (line) and of the interval ends "
                      f"(band)<br>{drawn}"),
            top=132, bottom=None, left=tick_label_left(ticks, least=110, title_lines=2))
    fig.layout.title.update(TITLE_AT_TOP)
    fig.update_xaxes(title_text=look.slope_label, range=xr)
    fig.update_yaxes(title_text=f"percent of subjects,<br>grouped by {look.stratifier}",
                     autorange="reversed", showgrid=False, zeroline=False,
                     tickvals=[offsets[k] + 50 for k in offsets], ticktext=ticks)
    return fig


# --------------------------------------------------------------------------- density
def _covariate_pairs(lines: pd.DataFrame):
    cov = pd.to_numeric(lines["covariate"], errors="coerce").to_numpy(float)
    slope = lines["slope"].to_numpy(float)
    ok = np.isfinite(cov) & np.isfinite(slope)
    return lines[ok].reset_index(drop=True), cov[ok], slope[ok]


def covariate_grid(lines: pd.DataFrame, look: CohortLook):
    """(subjects with both values, covariate, slope, the density grid) as the figure counts."""
    df, cov, slope = _covariate_pairs(lines)
    if df.empty:
        return df, cov, slope, None
    log_axis = look.transform.startswith("log") and bool((cov > 0).all())
    yr, _ = _robust_range(slope)
    grid = density_grid(cov, slope, shape=GRID_SHAPE, y_range=yr, log_x=log_axis)
    return df, cov, slope, grid


def density_figure(lines: pd.DataFrame, smooth: pd.DataFrame | None, *, look: CohortLook,
                   highlight_subject=None) -> go.Figure:
    """Subject slope against the covariate as counts on a grid, the lowess curve over every
    subject, and the highlighted subject on top. Each cell carries one of its subjects."""
    name = look.covariate or "covariate"
    df, cov, slope, grid = covariate_grid(lines, look)
    if grid is None:
        return empty_figure(f"{name} has no numeric values here, so slopes cannot be plotted "
                            "against it; the box plot compares its groups.",
                            title=f"Subject slope against {name}")
    nx, ny = grid.counts.shape
    i, j = grid.cells(cov, slope)
    inside = np.flatnonzero(i >= 0)
    cell = i[inside] * ny + j[inside]
    first = inside[np.unique(cell, return_index=True)[1]]
    custom = np.full((ny, nx), "", dtype=object)
    custom[j[first], i[first]] = df["subject"].astype(str).to_numpy(dtype=object)[first]
    z = grid.counts.T.astype(float)
    z[z == 0] = np.nan
    x_edges = 10.0 ** grid.x_edges if grid.log_x else grid.x_edges
    fig = go.Figure(go.Heatmap(
        x=x_edges, y=grid.y_edges, z=z, customdata=custom, colorscale=DENSITY_SCALE,
        name="subjects per cell", showscale=True,
        colorbar={"title": {"text": "subjects", "side": "right"}, "thickness": 12},
        hovertemplate=(f"%{{z}} subjects<br>{name} %{{x:.3g}}, slope %{{y:.3g}}"
                       "<br>click: list them, select subject %{customdata}<extra></extra>")))
    if smooth is not None and len(smooth):
        fig.add_trace(go.Scatter(
            x=smooth["covariate"].to_numpy(), y=smooth["slope_smooth"].to_numpy(), mode="lines",
            name="lowess smooth, all subjects", line={"color": pal.HIGHLIGHT_COLOR, "width": 3.5},
            hovertemplate=f"{name} %{{x:.3g}}<br>smoothed slope %{{y:.3g}}<extra></extra>"))
    if highlight_subject is not None:
        h = np.flatnonzero(df["subject"].astype(str).to_numpy() == str(highlight_subject))
        if h.size:
            fig.add_trace(go.Scatter(
                x=cov[h[:1]], y=slope[h[:1]], mode="markers",
                customdata=[[str(highlight_subject), str(df["stratum_label"].iloc[h[0]])]],
                name=f"subject {highlight_subject}",
                marker={"size": 18, "color": pal.HIGHLIGHT_COLOR, "symbol": "diamond-open",
                        "line": {"width": 3, "color": pal.HIGHLIGHT_COLOR}},
                hovertemplate="subject %{customdata[0]}<extra></extra>"))
    unit = look.covariate_unit
    xt = name + _parenthesis(", ".join(p for p in (unit, "log scale" if grid.log_x else "") if p))
    sub = (summary_note(len(df)) + f"<br>subjects per cell of a {nx} × {ny} grid"
           + (f"; {grid.n_outside:,} off the axis" if grid.n_outside else "")
           + "<br>line: lowess smooth of every subject")
    _finish(fig, f"Subject slope against {name}", subtitle=sub, top=132, bottom=150, left=96,
            right=COLORBAR_RIGHT_PX)
    fig.layout.title.update(TITLE_AT_TOP)
    reference_line(fig, y=0, line={"color": pal.REFERENCE_COLOR, "width": 1.2, "dash": "dot"})
    fig.update_xaxes(title_text=xt, type="log" if grid.log_x else "linear")
    fig.update_yaxes(title_text=look.slope_label_wrapped,
                     range=[float(grid.y_edges[0]), float(grid.y_edges[-1])])
    return fig


# --------------------------------------------------------------------------- boxes
def box_figure(lines: pd.DataFrame, *, look: CohortLook, highlight_subject=None,
               highlight_stratum=None) -> go.Figure:
    """Box statistics of the subject slopes per group (quartiles, whiskers to the furthest
    slope within 1.5 IQR), computed on the server: no point per subject is sent."""
    labels = _present_strata(look, lines["stratum_label"][np.isfinite(
        lines["slope"].to_numpy(float))])
    df, codes, slope, _, _ = _slopes(lines, labels)
    box = box_statistics(slope, codes)
    names = [labels[g] if g < len(labels) else str(g) for g in box.groups]
    fig = go.Figure()
    beyond = 0
    for r, lab in enumerate(names):
        strength = _strength(look, lab, highlight_stratum)
        colour = look.colour(lab)
        beyond += int(box.n_below[r] + box.n_above[r])
        fig.add_trace(go.Box(
            x=[lab], q1=[box.q1[r]], median=[box.median[r]], q3=[box.q3[r]],
            lowerfence=[box.lower[r]], upperfence=[box.upper[r]], mean=[box.mean[r]],
            name=f"{look.group_title(lab)} (n={int(box.n[r]):,})", boxpoints=False,
            line={"color": pal.with_alpha(colour, max(strength, 0.35)), "width": 2},
            fillcolor=pal.with_alpha(colour, 0.18 * strength)))
    if highlight_subject is not None:
        h = np.flatnonzero(df["subject"].astype(str).to_numpy() == str(highlight_subject))
        if h.size:
            lab = str(df["stratum_label"].iloc[h[0]])
            fig.add_trace(go.Scatter(
                x=[lab], y=slope[h[:1]], mode="markers", name=f"subject {highlight_subject}",
                customdata=[[str(highlight_subject), lab]],
                marker={"size": 16, "color": pal.HIGHLIGHT_COLOR, "symbol": "diamond-open",
                        "line": {"width": 3, "color": pal.HIGHLIGHT_COLOR}},
                hovertemplate="subject %{customdata[0]}<br>slope %{y:.3g}<extra></extra>"))
    yr, _ = _robust_range(slope)
    # the bare group ranges, horizontal, broken after their dash when they do not fit side by
    # side (as in the per-subject view); the covariate and its unit are in the axis title
    ticks = category_ticks(names)
    _finish(fig, f"Subject slopes by {look.stratifier}",
            subtitle=(summary_note(len(df)) + f"<br>quartiles; whiskers within "
                      f"{WHISKER_IQR:g} IQR; {beyond:,} beyond not drawn"),
            top=132, bottom=None, left=96, width=HALF_FIGURE_PX,     # (as the density beside it)
            axis_block=x_axis_block(ticks))
    fig.layout.title.update(TITLE_AT_TOP)
    reference_line(fig, y=0, line={"color": pal.REFERENCE_COLOR, "width": 1.2, "dash": "dot"})
    fig.update_xaxes(title_text=f"{look.stratifier} group"
                                f"{_parenthesis(look.stratifier_unit.strip())}",
                     type="category", tickangle=0, tickvals=names, ticktext=ticks)
    fig.update_yaxes(title_text=look.slope_label_wrapped, range=yr)
    fig.update_layout(showlegend=True)
    return fig


# --------------------------------------------------------------------------- members
def band_click_members(lines: pd.DataFrame, look: CohortLook, click: dict | None):
    """(group label, percent range, Members, subject ids) of a clicked band point, or None."""
    p = _point(click)
    cd = p.get("customdata") if p else None
    if not isinstance(cd, (list, tuple)) or len(cd) != 4:
        return None
    lab, p_lo, p_hi = str(cd[1]), float(cd[2]), float(cd[3])
    labels = _present_strata(look, lines["stratum_label"][np.isfinite(
        lines["slope"].to_numpy(float))])
    if lab not in labels:
        return None
    df, codes, slope, _, _ = _slopes(lines, labels)
    m = band_members(slope, codes, labels.index(lab), p_lo, p_hi, limit=MEMBERS_SHOWN)
    return lab, (p_lo, p_hi), m, df["subject"].astype(str).to_numpy()[m.index]


def cell_click_members(lines: pd.DataFrame, look: CohortLook, click: dict | None):
    """(Members, subject ids, cell edges) of a clicked density cell, or None."""
    p = _point(click)
    if not p or not isinstance(p.get("pointNumber"), (list, tuple)):
        return None
    j, i = (int(v) for v in p["pointNumber"])
    df, cov, slope, grid = covariate_grid(lines, look)
    if grid is None:
        return None
    m = cell_members(grid, cov, slope, i, j, limit=MEMBERS_SHOWN)
    xe = 10.0 ** grid.x_edges if grid.log_x else grid.x_edges
    return m, df["subject"].astype(str).to_numpy()[m.index], (xe[i], xe[i + 1],
                                                              grid.y_edges[j], grid.y_edges[j + 1])


def _point(click):
    if not click or not click.get("points"):
        return None
    return click["points"][0]


def members_note(what: str, total: int, subjects) -> html.P:
    shown = ", ".join(short(s, 24) for s in subjects)
    head = (f"{what}: {_plural(total, 'subject')}" +
            (f", the first {len(subjects)} by slope" if total > len(subjects) else "") + ": ")
    return html.P([html.Strong(head), shown or "none"], className="cl-note")
