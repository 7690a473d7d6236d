"""Every dashboard figure, drawn from result tables.

Pure functions: result objects / DataFrames in, ``plotly.graph_objects.Figure``
out. Nothing here imports Dash or reads a browser store. The names, units and
colours a figure needs come in one small :class:`CohortLook`, built once per
cohort by :mod:`app.draw`, so that the same group has the same colour and the
same axis wording in every view.

Conventions kept by every figure

* a title, axis titles with units, a legend;
* subject ids in ``customdata`` (first element when ``customdata`` is a row) on
  the traces a click should select a subject from;
* one trace per group (never one per subject): many subject lines are one
  trace with ``None`` between subjects;
* the highlighted subject is drawn on top in :data:`app.palette.HIGHLIGHT_COLOR`;
  a highlighted group keeps full strength while the others fade.
"""
from __future__ import annotations

import textwrap
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from plotly.subplots import make_subplots

from analysis.confidence import z_quantile
from analysis.lagbins import equal_width_bins
from analysis.summaries import ALL_LABEL, FOLLOWED, LAST_VISIT, LEFT_EARLY

from . import palette as pal

#: above this many points in one group, subject lines/points use WebGL traces
GL_POINTS = 1500
#: time bins for the group mean in the courses view, and the fewest visits a bin needs
MEAN_BINS = 12
MEAN_MIN_VISITS = 5
#: at most this many subjects get their id as a y tick label in the slope-interval view
MAX_SUBJECT_TICKS = 40
#: heatmap cells carry their text only up to this many windows (hover always has it)
MAX_CELL_TEXT = 16
#: readable on a projector
FONT = {"family": "DejaVu Sans, Segoe UI, Roboto, Helvetica, Arial, sans-serif",
        "size": 15, "color": "#1b1f24"}
TITLE_SIZE = 19
#: small-multiple panel titles
PANEL_TITLE_SIZE = 14
FADED = 0.18

_SINGULAR = {"days": "day", "weeks": "week", "months": "month", "years": "year"}


# --------------------------------------------------------------------------- naming
@dataclass(frozen=True)
class CohortLook:
    """Names, units and colours shared by every figure of one cohort.

    Attributes
    ----------
    strata : tuple of str
        Group labels in stratum-code order, ``"No value"`` last when some subjects lack one.
    colours : mapping
        ``{label: hex colour}`` (see :func:`app.palette.stratum_colours`).
    time_label : str
        Time axis wording with its unit, e.g. ``"Months since tx_date"``.
    time_unit : str
        Plural unit word, e.g. ``"months"``.
    response : str
        Response column name.
    response_unit : str
        Its unit ('' when unknown).
    stratifier, stratifier_unit : str
        The covariate the groups were cut from, and its unit.
    covariate, covariate_unit : str or None, str
        The primary baseline covariate (raw scale) and its unit.
    transform : str
        Transform of the primary covariate ('none', 'log', 'log2', 'log10').
    counts : mapping
        Subjects per group label (optional; shown in titles).
    """

    strata: tuple[str, ...]
    colours: Mapping[str, str]
    time_label: str = "time"
    time_unit: str = ""
    response: str = "response"
    response_unit: str = ""
    stratifier: str = "group"
    stratifier_unit: str = ""
    covariate: str | None = None
    covariate_unit: str = ""
    transform: str = "none"
    counts: Mapping[str, int] = field(default_factory=dict)

    def colour(self, label) -> str:
        return self.colours.get(str(label), pal.NO_STRATUM_COLOR)

    @property
    def response_label(self) -> str:
        """``"egfr (mL/min/1.73m²)"`` or the bare column name."""
        return f"{self.response} ({self.response_unit})" if self.response_unit else self.response

    @property
    def squared_unit(self) -> str:
        """Squared response unit: ``"(mL/min/1.73m²)²"``, ``"mg²"`` or ``"squared egfr units"``."""
        u = self.response_unit.strip()
        if not u:
            return f"squared {self.response} units"
        simple = u.isalnum()
        return f"{u}²" if simple else f"({u})²"

    @property
    def per_time(self) -> str:
        """``"per month"`` (or ``"per time unit"``)."""
        u = self.time_unit.strip()
        if not u:
            return "per time unit"
        return f"per {_SINGULAR.get(u, u[:-1] if u.endswith('s') else u)}"

    @property
    def slope_unit(self) -> str:
        """``"mL/min/1.73m² per month"`` (or ``"per month"`` without a response unit)."""
        return f"{self.response_unit} {self.per_time}" if self.response_unit else self.per_time

    @property
    def slope_label(self) -> str:
        """Axis title of a per-subject slope, with units (one line, for a horizontal axis)."""
        return f"slope of {self.response} ({self.slope_unit})"

    @property
    def slope_label_wrapped(self) -> str:
        """The slope axis title on two lines, for a vertical axis beside a short plot."""
        return f"slope of {self.response}<br>({self.slope_unit})"

    @property
    def stratifier_label(self) -> str:
        """``"urine_protein_ratio (mg/mmol)"``: the covariate the groups were cut from."""
        u = self.stratifier_unit.strip()
        return f"{self.stratifier} ({u})" if u else self.stratifier

    def group_title(self, label: str) -> str:
        """``"1.0 – 10.7 mg/mmol"``: a group label with the stratifier's unit.

        The labels for subjects without a value and for all subjects together
        carry no unit.
        """
        u = self.stratifier_unit.strip()
        if (label in (pal.NO_VALUE_LABEL, ALL_LABEL) or not u or str(label).endswith(u)):
            return str(label)
        return f"{label} {u}"


# --------------------------------------------------------------------------- helpers
def empty_figure(message: str, *, title: str = "") -> go.Figure:
    """A blank figure carrying only ``message`` (no axes)."""
    fig = go.Figure()
    fig.add_annotation(text=message, showarrow=False, x=0.5, y=0.5, xref="paper", yref="paper",
                       font={"size": 17, "color": pal.MUTED_TEXT_COLOR})
    fig.update_layout(xaxis={"visible": False}, yaxis={"visible": False},
                      template="plotly_white", font=FONT,
                      title={"text": title, "x": 0.01} if title else None,
                      margin={"l": 20, "r": 20, "t": 50 if title else 20, "b": 20})
    return fig


def _finish(fig: go.Figure, title: str, *, subtitle: str = "", legend_y: float = 0.0,
            top: int = 78, bottom: int = 110, left: int = 80, right: int = 24) -> go.Figure:
    """Shared look: title (+ subtitle), projector-size fonts, legend along the figure's foot.

    ``legend_y`` is measured on the whole figure (0 = bottom edge), so the legend
    never runs into the x axis title; ``bottom`` must leave room for both.
    """
    title_spec = {"text": title, "x": 0.01, "xanchor": "left", "font": {"size": TITLE_SIZE}}
    if subtitle:
        title_spec["subtitle"] = {"text": subtitle,
                                  "font": {"size": 14, "color": pal.MUTED_TEXT_COLOR}}
    fig.update_layout(
        template="plotly_white", font=FONT, title=title_spec,
        margin={"l": left, "r": right, "t": top, "b": bottom},
        legend={"orientation": "h", "x": 0, "xanchor": "left", "y": legend_y,
                "yanchor": "bottom", "yref": "container", "font": {"size": 14},
                "itemsizing": "constant"},
        hoverlabel={"font": {"size": 14}}, clickmode="event",
        paper_bgcolor="#ffffff", plot_bgcolor="#ffffff",
    )
    fig.update_xaxes(gridcolor=pal.GRID_COLOR, zerolinecolor="#c3c9d0", linecolor="#9aa6b2",
                     showline=True, ticks="outside", tickcolor="#9aa6b2",
                     title_font={"size": 15})
    fig.update_yaxes(gridcolor=pal.GRID_COLOR, zerolinecolor="#c3c9d0", linecolor="#9aa6b2",
                     showline=True, ticks="outside", tickcolor="#9aa6b2",
                     title_font={"size": 15})
    return fig


def _segments(keys: np.ndarray, *columns: np.ndarray) -> list[np.ndarray]:
    """Columns with a ``None`` inserted wherever ``keys`` changes (rows grouped by key).

    Turns many subject lines into one trace: plotly breaks a line at ``None``.
    """
    keys = np.asarray(keys)
    breaks = np.flatnonzero(keys[1:] != keys[:-1]) + 1 if keys.size else np.empty(0, int)
    return [np.insert(np.asarray(c, dtype=object), breaks, None) for c in columns]


def _rows_to_segments(x0, x1, y0, y1) -> tuple[np.ndarray, np.ndarray]:
    """Horizontal/any segments (x0,y0)-(x1,y1) as one None-separated line."""
    n = len(x0)
    xs = np.empty(3 * n, dtype=object)
    ys = np.empty(3 * n, dtype=object)
    xs[0::3], xs[1::3], xs[2::3] = x0, x1, None
    ys[0::3], ys[1::3], ys[2::3] = y0, y1, None
    return xs, ys


def _robust_range(values, *, q: float = 0.01, pad: float = 0.06) -> tuple[list[float] | None, int]:
    """Axis range covering the ``q``..``1-q`` quantiles (padded) and how many values fall outside.

    Returns (None, 0) when every value already fits within the padded range of all values.
    """
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size < 20:
        return None, 0
    lo, hi = np.quantile(v, [q, 1 - q])
    if hi <= lo:
        return None, 0
    span = hi - lo
    lo, hi = lo - pad * span, hi + pad * span
    outside = int(np.sum((v < lo) | (v > hi)))
    if outside == 0:
        return None, 0
    return [float(lo), float(hi)], outside


def _plural(n: int, word: str) -> str:
    return f"{n:,} {word}" if n == 1 else f"{n:,} {word}s"


def _strength(look: CohortLook, label, highlight_stratum) -> float:
    """1 for the highlighted group (or every group when none is), else faded."""
    return 1.0 if highlight_stratum in (None, "", label) else FADED


def _present_strata(look: CohortLook, labels: pd.Series) -> list[str]:
    """Group labels in look order, then any label the look did not know."""
    seen = set(map(str, pd.unique(labels.astype(str))))
    known = [lab for lab in look.strata if lab in seen]
    return known + sorted(seen - set(look.strata))


# --------------------------------------------------------------------------- 1 courses
def group_means(full: pd.DataFrame, *, strata: Sequence[str], n_bins: int = MEAN_BINS,
                min_visits: int = MEAN_MIN_VISITS) -> pd.DataFrame:
    """Binned mean response over time per group, from every subject of the group.

    Time is cut into ``n_bins`` equal-width bins over the whole cohort's range
    (shared by all groups, so group curves are comparable); a bin's point sits at
    the mean visit time inside it. Bins with fewer than ``min_visits`` visits are dropped.

    Returns
    -------
    DataFrame
        stratum_label, bin, time, response, visits.
    """
    t = full["time"].to_numpy(float)
    y = full["response"].to_numpy(float)
    lab = full["stratum_label"].astype(str).to_numpy()
    cols = ["stratum_label", "bin", "time", "response", "visits"]
    ok = np.isfinite(t) & np.isfinite(y)
    if not ok.any():
        return pd.DataFrame(columns=cols)
    t, y, lab = t[ok], y[ok], lab[ok]
    edges, b = equal_width_bins(t, n_bins)
    nb = edges.size - 1
    codes = pd.Categorical(lab, categories=list(strata)).codes.astype(np.int64)
    keep = codes >= 0
    key = codes[keep] * nb + b[keep]
    size = len(strata) * nb
    n = np.bincount(key, minlength=size)
    st = np.bincount(key, weights=t[keep], minlength=size)
    sy = np.bincount(key, weights=y[keep], minlength=size)
    cell = np.flatnonzero(n >= max(int(min_visits), 1))
    return pd.DataFrame({
        "stratum_label": np.asarray(strata, dtype=object)[cell // nb],
        "bin": cell % nb,
        "time": st[cell] / n[cell],
        "response": sy[cell] / n[cell],
        "visits": n[cell],
    }, columns=cols)


def panel_title(label: str, n: int, *, ncol: int, bold: bool = False) -> str:
    """``"1.0 – 10.7 · n = 265"``: a small-multiple title that fits its panel.

    The budget of characters per line shrinks with the number of panel columns
    (about 100 characters of :data:`PANEL_TITLE_SIZE` text across a ~1000 px
    graph); a longer title puts the count on its own line and wraps the label.
    """
    budget = max(12, int(100 / max(ncol, 1)))
    count = f"n = {n:,}"
    label = str(label)
    if len(label) + 3 + len(count) <= budget:
        lines = [f"{label} · {count}"]
    else:
        lines = textwrap.wrap(label, width=budget, break_long_words=False) or [label]
        lines.append(count)
    if bold:
        lines[0] = f"<b>{lines[0]}</b>"
    return "<br>".join(lines)


def courses_figure(shown: pd.DataFrame, *, full: pd.DataFrame, look: CohortLook,
                   highlight_subject=None, highlight_stratum=None,
                   n_bins: int = MEAN_BINS) -> go.Figure:
    """Response over time, one panel per group: sampled subject lines and the group mean.

    Parameters
    ----------
    shown : DataFrame
        Rows of the sampled subjects: subject, time, response, stratum_label.
    full : DataFrame
        Every included row (the group means use all subjects, not only the sample).
    look : CohortLook
    highlight_subject : str, optional
        Drawn bold in the highlight colour in its group's panel.
    highlight_stratum : str, optional
        Its panel keeps full strength; the others fade.
    """
    labels = list(look.strata) or _present_strata(look, full["stratum_label"])
    k = max(len(labels), 1)
    ncol = k if k <= 4 else (int(np.ceil(k / 2)) if k <= 8 else 4)
    nrow = int(np.ceil(k / ncol))
    subjects_per = full.groupby("stratum_label", sort=False)["subject"].nunique()
    # the covariate and its unit are named once, in the figure title; each panel
    # title is the group's range and its subject count, wrapped only when too wide
    titles = [panel_title(lab, int(subjects_per.get(lab, 0)), ncol=ncol,
                          bold=highlight_stratum == lab) for lab in labels]
    title_lines = max(t.count("<br>") + 1 for t in titles) if titles else 1
    fig = make_subplots(rows=nrow, cols=ncol, shared_xaxes="all", shared_yaxes="all",
                        subplot_titles=titles, horizontal_spacing=0.045,
                        vertical_spacing=(0.12 + 0.04 * title_lines) if nrow > 1 else 0.1)
    for ann in fig.layout.annotations:
        ann.font = {"size": PANEL_TITLE_SIZE}

    shown = shown.assign(subject=shown["subject"].astype(str),
                         stratum_label=shown["stratum_label"].astype(str))
    shown = shown.sort_values(["stratum_label", "subject", "time"], kind="stable")
    means = group_means(full, strata=labels, n_bins=n_bins)
    hl = None if highlight_subject is None else str(highlight_subject)
    hover = (f"subject %{{customdata}}<br>%{{x:.1f}} {look.time_unit}: %{{y:.1f}}"
             f" {look.response_unit}<extra></extra>")
    # WebGL traces are painted above SVG ones, so once the subject lines need WebGL,
    # the mean and the highlighted subject use it too (and stay on top)
    biggest = int(shown["stratum_label"].value_counts().max()) if len(shown) else 0
    kind = go.Scattergl if biggest > GL_POINTS else go.Scatter
    for i, lab in enumerate(labels):
        row, col = i // ncol + 1, i % ncol + 1
        colour = look.colour(lab)
        strength = _strength(look, lab, highlight_stratum)
        sub = shown[shown["stratum_label"] == lab]
        xs, ys, cd = _segments(sub["subject"].to_numpy(), sub["time"].to_numpy(),
                               sub["response"].to_numpy(), sub["subject"].to_numpy())
        fig.add_trace(kind(
            x=xs, y=ys, customdata=cd, mode="lines", name=look.group_title(lab),
            legendgroup=lab, showlegend=True,
            line={"color": pal.with_alpha(colour, 0.42 * strength), "width": 1.2},
            hovertemplate=hover), row=row, col=col)
        m = means[means["stratum_label"] == lab]
        if len(m):
            common = dict(x=m["time"].to_numpy(), y=m["response"].to_numpy(), mode="lines",
                          legendgroup=lab, showlegend=False, hoverinfo="skip")
            fig.add_trace(kind(**common, line={"color": "rgba(255,255,255,0.9)",
                                               "width": 8}), row=row, col=col)
            fig.add_trace(kind(
                x=m["time"].to_numpy(), y=m["response"].to_numpy(), mode="lines+markers",
                name=f"{look.group_title(lab)} mean", legendgroup=lab, showlegend=False,
                customdata=m["visits"].to_numpy(),
                line={"color": pal.with_alpha(colour, max(strength, 0.35)), "width": 4},
                marker={"size": 6, "color": pal.with_alpha(colour, max(strength, 0.35))},
                hovertemplate=(f"group mean {look.group_title(lab)}<br>%{{x:.1f}} "
                               f"{look.time_unit}: %{{y:.1f}} {look.response_unit}"
                               "<br>%{customdata} visits<extra></extra>")), row=row, col=col)
        if hl is not None:
            h = full[(full["subject"].astype(str) == hl) & (full["stratum_label"].astype(str) == lab)]
            if len(h):
                h = h.sort_values("time")
                fig.add_trace(kind(
                    x=h["time"].to_numpy(), y=h["response"].to_numpy(), mode="lines+markers",
                    customdata=np.full(len(h), hl, dtype=object), name=f"subject {hl}",
                    line={"color": pal.HIGHLIGHT_COLOR, "width": 3.5},
                    marker={"size": 8, "color": pal.HIGHLIGHT_COLOR,
                            "line": {"color": "#ffffff", "width": 1}},
                    hovertemplate=hover), row=row, col=col)
    # a legend key for the mean line (drawn in every panel in its group's colour)
    fig.add_trace(go.Scatter(x=[None], y=[None], mode="lines", name="group mean, every subject",
                             line={"color": pal.REFERENCE_COLOR, "width": 4}, hoverinfo="skip"),
                  row=1, col=1)
    total = int(full["subject"].nunique())
    drawn = int(shown["subject"].nunique())
    _finish(fig, f"{look.response} over time, by {look.stratifier_label}",
            subtitle=(f"thin lines: {drawn:,} of {total:,} subjects drawn · thick line: mean of "
                      f"every subject in the group, {len(set(means['bin'])) if len(means) else 0}"
                      f" time bins"),
            top=104 + 18 * title_lines, bottom=105)
    fig.update_xaxes(title_text="")
    fig.update_yaxes(title_text="")
    for c in range(1, ncol + 1):
        fig.update_xaxes(title_text=look.time_label, row=nrow, col=c)
    fig.update_yaxes(title_text=look.response_label, col=1)
    return fig


# --------------------------------------------------------------------------- 2 semivariogram
def variogram_figure(vg, *, look: CohortLook,
                     model_curves: Sequence[tuple[str, Sequence[float], Sequence[float]]] | None
                     = None) -> go.Figure:
    """Binned semivariogram (marker area ∝ pairs), its lowess smooth and the process variance.

    Parameters
    ----------
    vg : analysis.variogram.Semivariogram
        Reads ``bins`` (lag_lo, lag_hi, lag_mean, gamma, pairs), ``smooth`` (lag,
        gamma) and ``process_variance``.
    model_curves : list of (name, lags, values), optional
        Semivariograms implied by fitted models, drawn as lines.
    """
    b = vg.bins
    b = b[(b["pairs"] > 0) & np.isfinite(b["gamma"])]
    pairs = b["pairs"].to_numpy(float)
    biggest = pairs.max() if pairs.size else 1.0
    size = 8.0 + 22.0 * np.sqrt(pairs / biggest)
    unit = look.time_unit
    sq = look.squared_unit
    fig = go.Figure()
    fig.add_trace(go.Scatter(
        x=b["lag_mean"].to_numpy(), y=b["gamma"].to_numpy(), mode="markers",
        name="binned mean (area ∝ pairs)",
        marker={"size": size, "sizemode": "diameter", "color": pal.with_alpha(pal.STRATUM_COLORS[0], 0.8),
                "line": {"color": "#ffffff", "width": 1}},
        customdata=np.c_[b["lag_lo"].to_numpy(), b["lag_hi"].to_numpy(), pairs],
        hovertemplate=(f"lag %{{customdata[0]:.3g}}–%{{customdata[1]:.3g}} {unit}"
                       f"<br>mean lag %{{x:.2f}}<br>γ = %{{y:.4g}} {sq}"
                       "<br>%{customdata[2]:,} pairs<extra></extra>")))
    s = vg.smooth
    if len(s):
        fig.add_trace(go.Scatter(x=s["lag"].to_numpy(), y=s["gamma"].to_numpy(), mode="lines",
                                 name="lowess smooth of all pairs",
                                 line={"color": pal.STRATUM_COLORS[5], "width": 3.5},
                                 hovertemplate=(f"lag %{{x:.2f}} {unit}<br>smooth %{{y:.4g}} {sq}"
                                                "<extra></extra>")))
    dashes = ("dash", "dot", "dashdot", "longdash", "longdashdot")
    tops = [b["gamma"].max() if len(b) else 0.0]
    for j, (name, lags, values) in enumerate(model_curves or ()):
        lags = np.asarray(lags, dtype=float)
        values = np.asarray(values, dtype=float)
        tops.append(np.nanmax(values) if values.size else 0.0)
        fig.add_trace(go.Scatter(
            x=lags, y=values, mode="lines", name=f"model: {name}",
            line={"color": pal.STRATUM_COLORS[(2 + j) % len(pal.STRATUM_COLORS)], "width": 2.5,
                  "dash": dashes[j % len(dashes)]},
            hovertemplate=f"{name}<br>lag %{{x:.2f}} {unit}<br>%{{y:.4g}} {sq}<extra></extra>"))
    pv = float(vg.process_variance)
    if np.isfinite(pv):
        tops.append(pv)
        # a trace (not a shape) so the reference line has a legend entry
        x_end = float(vg.max_lag) if np.isfinite(getattr(vg, "max_lag", np.nan)) else (
            float(b["lag_hi"].max()) if len(b) else 1.0)
        fig.add_trace(go.Scatter(x=[0, x_end], y=[pv, pv], mode="lines",
                                 name="process variance (pairs from different subjects)",
                                 line={"color": pal.REFERENCE_COLOR, "width": 2, "dash": "dash"},
                                 hovertemplate=f"process variance %{{y:.4g}} {sq}<extra></extra>"))
        fig.add_annotation(x=x_end, y=pv, xanchor="right", yanchor="bottom", showarrow=False,
                           text=f"process variance {pv:.3g}", font={"size": 14,
                                                                   "color": pal.REFERENCE_COLOR})
    top = np.nanmax([t for t in tops if np.isfinite(t)] or [1.0])
    _finish(fig, "Semivariogram of within-subject residuals",
            subtitle=f"half squared difference of two visits of a subject, by time apart · "
                     f"{int(getattr(vg, 'n_pairs', pairs.sum())):,} pairs",
            bottom=100)
    fig.update_xaxes(title_text=f"time apart ({unit})" if unit else "time apart", rangemode="tozero")
    fig.update_yaxes(title_text=f"semivariance, {sq}", range=[0, 1.12 * top])
    return fig


# --------------------------------------------------------------------------- 3 lag correlation
def window_names(windows: pd.DataFrame) -> list[str]:
    """``"0–6"`` per window (edges in time units)."""
    return [f"{lo:g}–{hi:g}" for lo, hi in zip(windows["lo"], windows["hi"])]


def cell_texts(matrix: np.ndarray, pairs: np.ndarray) -> list[list[str]]:
    """``"0.85<br>n=726"`` per cell; blank correlations show only the count."""
    r = np.asarray(matrix, dtype=float)
    n = np.asarray(pairs).astype(int)
    txt = np.char.add(np.char.add(np.char.mod("%.2f", np.nan_to_num(r)), "<br>n="),
                      n.astype(str))
    blank = np.char.add("n=", n.astype(str))
    return np.where(np.isfinite(r), txt, blank).tolist()


def lag_heatmap_figure(lc, *, look: CohortLook) -> go.Figure:
    """Correlation between time windows (diverging scale on [−1, 1]) above each window's variance.

    Parameters
    ----------
    lc : analysis.lagcorr.LagCorrelation
        Reads ``windows`` (lo, hi, subjects, variance), ``matrix``, ``pairs`` and ``width``.
    """
    w = lc.windows
    names = window_names(w)
    k = len(names)
    unit = look.time_unit
    matrix = np.asarray(lc.matrix, dtype=float)
    pairs = np.asarray(lc.pairs).astype(int)
    fig = make_subplots(rows=2, cols=1, shared_xaxes=True, row_heights=[0.82, 0.18],
                        vertical_spacing=0.04)
    # hover: both windows, r, subjects in both
    row_names = np.repeat(np.asarray(names, dtype=object)[:, None], k, axis=1)
    col_names = np.repeat(np.asarray(names, dtype=object)[None, :], k, axis=0)
    custom = np.dstack([row_names, col_names, pairs.astype(object)])
    heat = go.Heatmap(
        z=matrix, x=names, y=names, zmin=-1, zmax=1, zmid=0,
        colorscale=[list(p) for p in pal.DIVERGING_SCALE], customdata=custom,
        xgap=1, ygap=1, hoverongaps=False,
        colorbar={"title": {"text": "r", "side": "top"}, "len": 0.8, "y": 1.0, "yanchor": "top",
                  "tickvals": [-1, -0.5, 0, 0.5, 1], "thickness": 16},
        hovertemplate=(f"windows %{{customdata[0]}} and %{{customdata[1]}} {unit}"
                       "<br>r = %{z:.2f}<br>%{customdata[2]} subjects seen in both"
                       "<extra></extra>"),
        name="correlation")
    if k <= MAX_CELL_TEXT:
        heat.update(text=cell_texts(matrix, pairs), texttemplate="%{text}",
                    textfont={"size": 14 if k <= 6 else (12 if k <= 10 else 10)})
    fig.add_trace(heat, row=1, col=1)
    var = w["variance"].to_numpy(float)
    fig.add_trace(go.Bar(
        x=names, y=var, name="variance of window values",
        marker={"color": pal.with_alpha(pal.REFERENCE_COLOR, 0.75)},
        customdata=np.c_[w["subjects"].to_numpy()],
        hovertemplate=(f"window %{{x}} {unit}<br>variance %{{y:.4g}} {look.squared_unit}"
                       "<br>%{customdata[0]} subjects<extra></extra>")), row=2, col=1)
    _finish(fig, "Correlation of residuals between time windows",
            subtitle=(f"windows {lc.width:g} {unit} wide · cell: r and subjects seen in both · "
                      "bars: variance in each window"),
            bottom=70, right=30)
    fig.update_layout(showlegend=False)
    fig.update_yaxes(title_text=f"window ({unit})", autorange="reversed", row=1, col=1,
                     showgrid=False, ticks="")
    fig.update_xaxes(showgrid=False, row=1, col=1, ticks="")
    fig.update_xaxes(title_text=f"time window ({look.time_label})", row=2, col=1, type="category")
    fig.update_yaxes(title_text=f"variance<br>{look.squared_unit}", row=2, col=1,
                     rangemode="tozero", title_font={"size": 14})
    return fig


# --------------------------------------------------------------------------- 4 slope intervals
ORDER_COLUMNS = {"slope": "slope", "intercept": "intercept", "covariate": "covariate",
                 "subject": "subject"}


def interval_layout(lines: pd.DataFrame, *, strata: Sequence[str], order: str) -> pd.DataFrame:
    """Rows with a slope, grouped by stratum (in ``strata`` order), sorted by ``order`` within,
    with their vertical position ``pos`` (a gap between groups)."""
    if order not in ORDER_COLUMNS:
        raise ValueError(f"order == {order!r}, must be one of {', '.join(ORDER_COLUMNS)}")
    df = lines[np.isfinite(lines["slope"].to_numpy(float))].copy()
    df["stratum_label"] = df["stratum_label"].astype(str)
    rank = {s: i for i, s in enumerate(strata)}
    df["_g"] = df["stratum_label"].map(rank).fillna(len(rank)).astype(int)
    key = df[ORDER_COLUMNS[order]]
    numeric = pd.to_numeric(key, errors="coerce")
    # a categorical covariate (or subject ids) sorts as text
    df["_k"] = key.astype(str) if order == "subject" or numeric.isna().all() and key.notna().any() \
        else numeric
    df = df.sort_values(["_g", "_k", "subject"], na_position="last", kind="stable")
    gap = max(2.0, 0.03 * len(df))
    df["pos"] = np.arange(len(df), dtype=float) + gap * (df["_g"].rank(method="dense").to_numpy() - 1)
    return df.drop(columns=["_k"])


def intervals_figure(lines: pd.DataFrame, *, look: CohortLook, order: str = "slope",
                     highlight_subject=None, highlight_stratum=None) -> go.Figure:
    """Each subject's slope with its 95% interval, grouped and coloured by group.

    Parameters
    ----------
    lines : DataFrame
        Per-subject lines: subject, n, intercept, slope, slope_lo, slope_hi,
        has_interval, stratum_label, covariate.
    order : {'slope', 'intercept', 'covariate', 'subject'}
        Order of subjects within each group.
    """
    df = interval_layout(lines, strata=look.strata, order=order)
    no_slope = int(len(lines) - len(df))
    many = len(df) > 300
    # WebGL traces are painted above SVG ones: every trace here, the highlight included,
    # uses the same kind so the drawing order is the trace order
    kind = go.Scattergl if many else go.Scatter
    fig = go.Figure()
    labels = [s for s in look.strata if s in set(df["stratum_label"])] + sorted(
        set(df["stratum_label"]) - set(look.strata))
    hover = ("subject %{customdata[0]}<br>slope %{x:.3g} " + look.per_time +
             "<br>interval %{customdata[1]:.3g} to %{customdata[2]:.3g}"
             "<br>intercept %{customdata[4]:.4g}<br>%{customdata[3]} visits<extra></extra>")
    two_legend = False
    for lab in labels:
        g = df[df["stratum_label"] == lab]
        colour = look.colour(lab)
        strength = _strength(look, lab, highlight_stratum)
        has = g["has_interval"].to_numpy(bool)
        gi = g[has]
        if len(gi):
            xs, ys = _rows_to_segments(gi["slope_lo"].to_numpy(), gi["slope_hi"].to_numpy(),
                                       gi["pos"].to_numpy(), gi["pos"].to_numpy())
            fig.add_trace(kind(
                x=xs, y=ys, mode="lines", legendgroup=lab, showlegend=False, hoverinfo="skip",
                name=f"{lab} intervals",
                line={"color": pal.with_alpha(colour, (0.45 if many else 0.7) * strength),
                      "width": 1 if many else 2}))
        custom = np.c_[g["subject"].astype(str).to_numpy(dtype=object),
                       g["slope_lo"].to_numpy(), g["slope_hi"].to_numpy(),
                       g["n"].to_numpy(), g["intercept"].to_numpy()]
        fig.add_trace(kind(
            x=g["slope"].to_numpy()[has], y=g["pos"].to_numpy()[has], customdata=custom[has],
            mode="markers", name=look.group_title(lab), legendgroup=lab,
            marker={"color": colour, "size": 4 if many else 7, "opacity": strength},
            hovertemplate=hover))
        if (~has).any():
            fig.add_trace(kind(
                x=g["slope"].to_numpy()[~has], y=g["pos"].to_numpy()[~has],
                customdata=custom[~has], mode="markers",
                name="two visits: slope only, no interval", legendgroup="two-visits",
                showlegend=not two_legend,
                marker={"color": colour, "size": 6 if many else 9, "symbol": "circle-open",
                        "line": {"width": 2}, "opacity": strength},
                hovertemplate=hover.replace("interval %{customdata[1]:.3g} to "
                                            "%{customdata[2]:.3g}", "no interval (two visits)")))
            two_legend = True
    if highlight_subject is not None:
        h = df[df["subject"].astype(str) == str(highlight_subject)]
        if len(h):
            r = h.iloc[0]
            lo, hi = (r["slope_lo"], r["slope_hi"]) if bool(r["has_interval"]) else (r["slope"],) * 2
            fig.add_trace(kind(
                x=[lo, hi], y=[r["pos"], r["pos"]], mode="lines", showlegend=False,
                line={"color": pal.HIGHLIGHT_COLOR, "width": 4}, hoverinfo="skip"))
            fig.add_trace(kind(
                x=[r["slope"]], y=[r["pos"]], mode="markers+text",
                customdata=[[str(r["subject"]), lo, hi, r["n"], r["intercept"]]],
                name=f"subject {highlight_subject}", text=[f"  {highlight_subject}"],
                textposition="middle right", textfont={"size": 14, "color": pal.HIGHLIGHT_COLOR},
                marker={"color": pal.HIGHLIGHT_COLOR, "size": 13, "symbol": "diamond",
                        "line": {"color": "#ffffff", "width": 1.5}},
                hovertemplate=hover))
    # y axis: subject ids when few, group names at block centres otherwise
    if len(df) <= MAX_SUBJECT_TICKS:
        yaxis = {"tickvals": df["pos"].tolist(), "ticktext": df["subject"].astype(str).tolist()}
    else:
        centre = df.groupby("stratum_label", sort=False)["pos"].median()
        yaxis = {"tickvals": [float(centre[s]) for s in labels],
                 "ticktext": [look.group_title(s) for s in labels]}
    ends = np.r_[df["slope_lo"].to_numpy(float), df["slope_hi"].to_numpy(float),
                 df["slope"].to_numpy(float)]
    xr, outside = _robust_range(ends, q=0.01)
    notes = [f"{_plural(len(df), 'subject')}, ordered by {order} within each group"]
    if xr is not None:
        notes.append("axis cut at the 1st–99th percentile of the interval ends")
    if no_slope:
        notes.append(f"{no_slope} without a slope (one visit or one time) not shown")
    fig.add_vline(x=0, line={"color": pal.REFERENCE_COLOR, "width": 1.5, "dash": "dot"})
    _finish(fig, "Each subject's slope with its 95% interval", subtitle=" · ".join(notes),
            bottom=105, left=150 if len(df) > MAX_SUBJECT_TICKS else 110)
    fig.update_xaxes(title_text=look.slope_label, range=xr)
    fig.update_yaxes(title_text=f"subjects, grouped by {look.stratifier}", autorange="reversed",
                     showgrid=False, zeroline=False, **yaxis)
    return fig


# --------------------------------------------------------------------------- 5 rate of change
#: the two rate-of-change plots sit side by side: room above for title + subtitle,
#: and on the left for a two-line slope axis title
RATE_TOP = 96
RATE_LEFT = 96


def category_ticks(labels: Sequence[str], *, width: int = 40) -> list[str]:
    """Horizontal tick labels for ``labels`` side by side on an axis about ``width`` characters long.

    When every label fits its share they stay on one line; otherwise each range
    label ("10.7 – 20.4") breaks after its dash and any other label wraps at
    spaces, so neighbouring labels never run into each other.
    """
    labels = [str(lab) for lab in labels]
    budget = max(6, int(width / max(len(labels), 1)))
    if all(len(lab) <= budget for lab in labels):
        return labels
    out = []
    for lab in labels:
        lo, dash, hi = lab.partition(" – ")
        if dash and lo and hi:
            out.append(f"{lo} –<br>{hi}")
        else:
            out.append("<br>".join(textwrap.wrap(lab, width=budget, break_long_words=False)
                                   or [lab]))
    return out


def slopes_by_stratum_figure(lines: pd.DataFrame, *, look: CohortLook, highlight_subject=None,
                             highlight_stratum=None) -> go.Figure:
    """Box of per-subject slopes per group with every subject as a point.

    ``customdata`` is (subject, group label) so a click can select either.
    """
    df = lines[np.isfinite(lines["slope"].to_numpy(float))]
    labels = _present_strata(look, df["stratum_label"])
    fig = go.Figure()
    for lab in labels:
        g = df[df["stratum_label"].astype(str) == lab]
        strength = _strength(look, lab, highlight_stratum)
        colour = look.colour(lab)
        fig.add_trace(go.Box(
            y=g["slope"].to_numpy(), x=np.full(len(g), lab, dtype=object),
            name=look.group_title(lab), boxpoints="all", jitter=0.45, pointpos=0,
            customdata=np.c_[g["subject"].astype(str).to_numpy(dtype=object),
                             np.full(len(g), lab, dtype=object)],
            marker={"color": pal.with_alpha(colour, 0.55 * strength), "size": 5},
            line={"color": pal.with_alpha(colour, max(strength, 0.35)), "width": 2},
            fillcolor=pal.with_alpha(colour, 0.12 * strength), boxmean=False,
            hovertemplate=(f"subject %{{customdata[0]}}<br>{look.group_title(lab)}"
                           f"<br>slope %{{y:.3g}} {look.per_time}<extra></extra>")))
    if highlight_subject is not None:
        h = df[df["subject"].astype(str) == str(highlight_subject)]
        if len(h):
            lab = str(h["stratum_label"].iloc[0])
            fig.add_trace(go.Scatter(
                x=[lab], y=h["slope"].to_numpy()[:1], mode="markers",
                name=f"subject {highlight_subject}",
                customdata=[[str(highlight_subject), lab]],
                marker={"size": 16, "color": pal.HIGHLIGHT_COLOR, "symbol": "diamond-open",
                        "line": {"width": 3, "color": pal.HIGHLIGHT_COLOR}},
                hovertemplate="subject %{customdata[0]}<br>slope %{y:.3g}<extra></extra>"))
    yr, outside = _robust_range(df["slope"].to_numpy(float))
    _finish(fig, f"Subject slopes by {look.stratifier}",
            subtitle=(f"axis cut at the 1st–99th percentile; {outside} outside" if yr else
                      "box: quartiles and median · points: subjects"),
            top=RATE_TOP, bottom=130, left=RATE_LEFT)
    fig.add_hline(y=0, line={"color": pal.REFERENCE_COLOR, "width": 1.2, "dash": "dot"})
    # ticks: the bare group ranges, kept horizontal; the covariate and its unit are in
    # the axis title
    ticks = category_ticks(labels)
    fig.update_xaxes(title_text=f"{look.stratifier} group{_parenthesis(look.stratifier_unit.strip())}",
                     type="category",
                     tickangle=0, tickvals=labels, ticktext=ticks)
    fig.update_yaxes(title_text=look.slope_label_wrapped, range=yr)
    fig.update_layout(showlegend=True)
    return fig


def slope_vs_covariate_figure(lines: pd.DataFrame, smooth: pd.DataFrame | None, *,
                              look: CohortLook, highlight_subject=None,
                              highlight_stratum=None) -> go.Figure:
    """Per-subject slope against the raw baseline covariate, coloured by group, with a lowess line.

    The x axis is logarithmic when the covariate is analysed on a log scale
    (and every value is positive).
    """
    name = look.covariate or "covariate"
    cov = pd.to_numeric(lines["covariate"], errors="coerce").to_numpy(float)
    df = lines[np.isfinite(lines["slope"].to_numpy(float)) & np.isfinite(cov)].assign(
        covariate=cov[np.isfinite(lines["slope"].to_numpy(float)) & np.isfinite(cov)])
    if df.empty:
        return empty_figure(f"{name} has no numeric values here, so slopes cannot be plotted "
                            "against it; the box plot compares its groups.",
                            title=f"Subject slope against {name}")
    log_axis = look.transform.startswith("log") and bool((df["covariate"] > 0).all())
    fig = go.Figure()
    kind = go.Scattergl if len(df) > GL_POINTS else go.Scatter   # one kind: order = trace order
    for lab in _present_strata(look, df["stratum_label"]):
        g = df[df["stratum_label"].astype(str) == lab]
        strength = _strength(look, lab, highlight_stratum)
        fig.add_trace(kind(
            x=g["covariate"].to_numpy(), y=g["slope"].to_numpy(), mode="markers",
            name=look.group_title(lab),
            customdata=np.c_[g["subject"].astype(str).to_numpy(dtype=object),
                             np.full(len(g), lab, dtype=object)],
            marker={"color": colour_alpha(look, lab, 0.7 * strength), "size": 7,
                    "line": {"width": 0.5, "color": "#ffffff"}},
            hovertemplate=(f"subject %{{customdata[0]}}<br>{name} %{{x:.3g}}"
                           f"<br>slope %{{y:.3g}} {look.per_time}<extra></extra>")))
    if smooth is not None and len(smooth):
        fig.add_trace(kind(
            x=smooth["covariate"].to_numpy(), y=smooth["slope_smooth"].to_numpy(), mode="lines",
            name="lowess smooth, all subjects", line={"color": pal.HIGHLIGHT_COLOR, "width": 3.5},
            hovertemplate=f"{name} %{{x:.3g}}<br>smoothed slope %{{y:.3g}}<extra></extra>"))
    if highlight_subject is not None:
        h = df[df["subject"].astype(str) == str(highlight_subject)]
        if len(h):
            fig.add_trace(kind(
                x=h["covariate"].to_numpy(), y=h["slope"].to_numpy(), mode="markers",
                customdata=[[str(highlight_subject), str(h["stratum_label"].iloc[0])]],
                name=f"subject {highlight_subject}",
                marker={"size": 18, "color": pal.HIGHLIGHT_COLOR, "symbol": "diamond-open",
                        "line": {"width": 3, "color": pal.HIGHLIGHT_COLOR}},
                hovertemplate="subject %{customdata[0]}<extra></extra>"))
    yr, outside = _robust_range(df["slope"].to_numpy(float))
    unit = look.covariate_unit
    xt = name + _parenthesis(", ".join(p for p in (unit, "log scale" if log_axis else "") if p))
    _finish(fig, f"Subject slope against {name}",
            subtitle=(f"axis cut at the 1st–99th percentile; {outside} outside" if yr else
                      f"{_plural(len(df), 'subject')}; line: lowess smooth"),
            top=RATE_TOP, bottom=150, left=RATE_LEFT)
    fig.add_hline(y=0, line={"color": pal.REFERENCE_COLOR, "width": 1.2, "dash": "dot"})
    fig.update_xaxes(title_text=xt, type="log" if log_axis else "linear",
                     **(_log_ticks(df["covariate"].to_numpy(float)) if log_axis else {}))
    fig.update_yaxes(title_text=look.slope_label_wrapped, range=yr)
    return fig


def _parenthesis(text: str) -> str:
    return f" ({text})" if text else ""


def _log_ticks(values: np.ndarray) -> dict:
    """1-2-5 tick values covering positive ``values``, written as plain numbers."""
    v = values[np.isfinite(values) & (values > 0)]
    if v.size == 0:
        return {}
    lo, hi = np.floor(np.log10(v.min())), np.ceil(np.log10(v.max()))
    ticks = (np.array([1.0, 2.0, 5.0])[None, :] * 10.0 ** np.arange(lo, hi + 1)[:, None]).ravel()
    ticks = ticks[(ticks >= v.min() / 1.5) & (ticks <= v.max() * 1.5)]
    return {"tickvals": ticks.tolist(), "ticktext": [f"{t:g}" for t in ticks]}


def colour_alpha(look: CohortLook, label, alpha: float) -> str:
    return pal.with_alpha(look.colour(label), alpha)


# --------------------------------------------------------------------------- 5 follow-up
def visit_counts(lines: pd.DataFrame, *, strata: Sequence[str]) -> pd.DataFrame:
    """Subjects per (number of visits, group): index visits, one column per group."""
    tab = pd.crosstab(lines["n"].astype(int), lines["stratum_label"].astype(str))
    cols = [s for s in strata if s in tab.columns] + sorted(set(tab.columns) - set(strata))
    full = np.arange(tab.index.min(), tab.index.max() + 1) if len(tab) else []
    return tab.reindex(index=full, columns=cols, fill_value=0)


def visits_figure(lines: pd.DataFrame, *, look: CohortLook, highlight_subject=None,
                  highlight_stratum=None) -> go.Figure:
    """How many visits each subject has, bars side by side per group."""
    tab = visit_counts(lines, strata=look.strata)
    fig = go.Figure()
    for lab in tab.columns:
        strength = _strength(look, lab, highlight_stratum)
        fig.add_trace(go.Bar(
            x=tab.index.to_numpy(), y=tab[lab].to_numpy(), name=look.group_title(lab),
            marker={"color": colour_alpha(look, lab, 0.9 * strength)},
            hovertemplate=(f"{look.group_title(lab)}<br>%{{x}} visits: %{{y}} subjects"
                           "<extra></extra>")))
    if highlight_subject is not None:
        h = lines[lines["subject"].astype(str) == str(highlight_subject)]
        if len(h):
            n = int(h["n"].iloc[0])
            fig.add_vline(x=n, line={"color": pal.HIGHLIGHT_COLOR, "width": 2.5, "dash": "dash"},
                          annotation_text=f"subject {highlight_subject}: {n}",
                          annotation_position="top right", annotation_font={"size": 14})
    med = float(np.median(lines["n"])) if len(lines) else float("nan")
    _finish(fig, "Visits per subject",
            subtitle=f"{_plural(len(lines), 'subject')} · median {med:g} visits",
            bottom=105)
    fig.update_layout(barmode="group", bargap=0.15, bargroupgap=0.05)
    fig.update_xaxes(title_text="visits (count)", dtick=1 if len(tab) <= 12 else None)
    fig.update_yaxes(title_text="subjects (count)")
    return fig


def dropout_figure(dropout, *, look: CohortLook, highlight_stratum=None) -> go.Figure:
    """Left: Kaplan–Meier share of each group not yet left, with its 95% band; right: response
    at the last visit of those who left early against those who did not.

    Parameters
    ----------
    dropout : analysis.summaries.Dropout
        Reads ``horizon``, ``classified``, ``counts``, ``retention`` (stratum, label, time,
        retained, lo, hi, at_risk, left) and ``by_stratum`` (label, followup, n, mean, sd).
        When ``classified`` is false the left panel shows the share with a visit at or after
        each time and says that leaving cannot be told from the end of the data.
    """
    unit = look.time_unit
    h_text = dropout.horizon_text(unit)
    left_title = ("Not yet left (Kaplan–Meier)" if dropout.classified
                  else "Seen at or after each time")
    fig = make_subplots(rows=1, cols=2, column_widths=[0.62, 0.38], horizontal_spacing=0.22,
                        subplot_titles=(left_title, f"{look.response} at the last visit"))
    for ann in fig.layout.annotations:
        ann.font = {"size": 15}
    ret = dropout.retention
    order = [s for s in look.strata if s in set(ret["label"])] + [ALL_LABEL]
    for lab in order:
        r = ret[ret["label"] == lab]
        if not len(r):
            continue
        overall = lab == ALL_LABEL
        strength = 1.0 if overall else _strength(look, lab, highlight_stratum)
        colour = pal.REFERENCE_COLOR if overall else look.colour(lab)
        name = ALL_LABEL if overall else look.group_title(lab)
        x = r["time"].to_numpy(float)
        fig.add_trace(go.Scatter(x=x, y=r["hi"].to_numpy(float), mode="lines",
                                 line={"shape": "hv", "width": 0}, legendgroup=lab,
                                 showlegend=False, hoverinfo="skip"), row=1, col=1)
        fig.add_trace(go.Scatter(x=x, y=r["lo"].to_numpy(float), mode="lines",
                                 line={"shape": "hv", "width": 0}, fill="tonexty",
                                 fillcolor=pal.with_alpha(colour, (0.10 if overall else 0.16)
                                                          * strength),
                                 legendgroup=lab, showlegend=False, hoverinfo="skip"),
                      row=1, col=1)
        fig.add_trace(go.Scatter(
            x=x, y=r["retained"].to_numpy(float), mode="lines", name=name, legendgroup=lab,
            line={"shape": "hv", "width": 3 if strength == 1 and not overall else 2,
                  "color": pal.with_alpha(colour, strength),
                  "dash": "dash" if overall else "solid"},
            customdata=np.c_[r["lo"].to_numpy(float), r["hi"].to_numpy(float),
                             r["at_risk"].to_numpy()],
            hovertemplate=(f"{name}<br>%{{x:.1f}} {unit}: %{{y:.1%}} "
                           + ("not yet left" if dropout.classified else "seen at or after")
                           + " (95% band %{customdata[0]:.1%} to %{customdata[1]:.1%})"
                           "<br>%{customdata[2]} at risk<extra></extra>")), row=1, col=1)
    if dropout.classified:  # without statuses the horizon judges nothing
        fig.add_vline(x=dropout.horizon, line={"color": pal.REFERENCE_COLOR, "dash": "dot",
                                               "width": 1.5}, row=1, col=1)
        fig.add_annotation(x=dropout.horizon, y=1.0, xref="x", yref="y", showarrow=False,
                           xanchor="right", yanchor="bottom", text=f"horizon {h_text}",
                           font={"size": 13, "color": pal.REFERENCE_COLOR})
    # right: mean response at the last visit ± 95% interval, one row per group
    tab = dropout.by_stratum
    groups = list(dict.fromkeys(tab["label"].astype(str)))
    ypos = {lab: i for i, lab in enumerate(groups)}
    shapes = ({FOLLOWED: ("circle", -0.17), LEFT_EARLY: ("diamond-open", 0.17)}
              if dropout.classified else {LAST_VISIT: ("circle", 0.0)})
    for group, (symbol, shift) in shapes.items():
        g = tab[(tab["followup"] == group) & (tab["n"] > 0)]
        labs = g["label"].astype(str).to_numpy()
        half = z_quantile() * g["sd"].to_numpy(float) / np.sqrt(g["n"].to_numpy(float))
        colours = [pal.REFERENCE_COLOR if lab == ALL_LABEL else look.colour(lab) for lab in labs]
        opac = [1.0 if lab == ALL_LABEL else _strength(look, lab, highlight_stratum)
                for lab in labs]
        if dropout.classified:  # legend key in neutral grey (the points carry the group colour)
            fig.add_trace(go.Scatter(x=[None], y=[None], mode="markers", name=group,
                                     legendgroup=group, hoverinfo="skip",
                                     marker={"symbol": symbol, "size": 12,
                                             "color": pal.REFERENCE_COLOR,
                                             "line": {"width": 2.5,
                                                      "color": pal.REFERENCE_COLOR}}),
                          row=1, col=2)
        fig.add_trace(go.Scatter(
            x=g["mean"].to_numpy(), y=[ypos[lab] + shift for lab in labs], mode="markers",
            name=group, legendgroup=group, showlegend=False,
            marker={"symbol": symbol, "size": 12, "color": colours, "opacity": opac,
                    "line": {"width": 2.5, "color": colours}},
            error_x={"type": "data", "array": np.nan_to_num(half), "color": "#7b8590",
                     "thickness": 1.5, "width": 4},
            customdata=np.c_[labs.astype(object), g["n"].to_numpy(), g["sd"].to_numpy()],
            hovertemplate=(f"%{{customdata[0]}}, {group}<br>mean %{{x:.1f}} "
                           f"{look.response_unit}<br>sd %{{customdata[2]:.1f}}, "
                           "%{customdata[1]} subjects<extra></extra>")), row=1, col=2)
    if dropout.classified:
        c = dropout.counts
        subtitle = (f"{c['left_early']:,} left before {h_text} · {c['censored']:,} had not "
                    f"reached it when the data end · {c['complete']:,} followed to {h_text}")
    else:
        subtitle = ("Leaving early cannot be told apart from the end of the data "
                    "(no calendar dates or follow-up end column)")
    _finish(fig, "Loss to follow-up, by group", subtitle=subtitle, bottom=130, top=100)
    lo_min = float(np.nanmin(ret["lo"])) if len(ret) else 0.0
    fig.update_xaxes(title_text=look.time_label, row=1, col=1, rangemode="tozero")
    fig.update_yaxes(title_text=("share not yet left" if dropout.classified
                                 else "share seen at or after"),
                     tickformat=".0%", range=[max(0.0, lo_min - 0.04), 1.03], row=1, col=1)
    fig.update_xaxes(title_text=f"mean ± 95% interval{' (' + look.response_unit + ')' if look.response_unit else ''}",
                     row=1, col=2)
    fig.update_yaxes(tickvals=list(ypos.values()),
                     ticktext=[look.group_title(s) for s in ypos], autorange="reversed",
                     row=1, col=2, showgrid=False, zeroline=False, title_text="")
    return fig


__all__ = [
    "CohortLook", "empty_figure", "courses_figure", "group_means", "variogram_figure",
    "lag_heatmap_figure", "cell_texts", "window_names", "intervals_figure", "interval_layout",
    "slopes_by_stratum_figure", "slope_vs_covariate_figure", "visits_figure", "visit_counts",
    "dropout_figure",
]
