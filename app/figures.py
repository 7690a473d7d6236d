"""The shared figure style, and the semivariogram figure the page and the report share.

Each page section draws its own figures (``app/sections/*.py``) with the pieces
here: :class:`CohortLook`, :func:`cohort_look`, the template :func:`_finish` and
the small helpers. This module imports plotly but never Dash, so the report
(:func:`report_figures`) can use it without a web framework.

Pure functions: result objects / DataFrames in, ``plotly.graph_objects.Figure``
out. Nothing here imports Dash or reads a browser store. The names, units and
colours a figure needs come in one small :class:`CohortLook`, built once per
cohort by :func:`cohort_look`, so that the same group has the same colour and the
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

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np
import pandas as pd
import plotly.graph_objects as go

from analysis.exploration.summaries import ALL_LABEL

from . import palette as pal
from .text import short

#: above this many points in one group, subject lines/points use WebGL traces
GL_POINTS = 1500
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


def cohort_look(cohort) -> CohortLook:
    """Names, units and colours of one prepared cohort, for every figure."""
    labels = list(cohort.strata.labels)
    if (cohort.strata.codes < 0).any():
        labels.append(pal.NO_VALUE_LABEL)
    roles = cohort.roles
    codes = np.asarray(cohort.strata.codes)
    counts = np.bincount(codes[codes >= 0], minlength=cohort.strata.n_strata)
    count_map = {lab: int(c) for lab, c in zip(cohort.strata.labels, counts)}
    if pal.NO_VALUE_LABEL in labels:
        count_map[pal.NO_VALUE_LABEL] = int((codes < 0).sum())
    cov_unit = getattr(roles, "covariate_unit", "") or ""
    stratifier = cohort.strata.name or "group"
    # names from the user's file are cut to a display length (axis titles, legends)
    return CohortLook(
        strata=tuple(labels),
        colours=dict(pal.stratum_colours(labels)),
        time_label=short(cohort.time_label),
        time_unit=cohort.settings.unit,
        response=short(roles.response),
        response_unit=short(getattr(roles, "response_unit", "") or "", 30),
        stratifier=short(stratifier),
        stratifier_unit=short(cov_unit, 30) if stratifier == cohort.covariate else "",
        covariate=None if cohort.covariate is None else short(cohort.covariate),
        covariate_unit=short(cov_unit, 30),
        transform=cohort.settings.transform,
        counts=count_map,
    )


def _parenthesis(text: str) -> str:
    return f" ({text})" if text else ""


def colour_alpha(look: CohortLook, label, alpha: float) -> str:
    return pal.with_alpha(look.colour(label), alpha)


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


def foot_legend_rows(names, *, width: float = 780.0) -> int:
    """How many rows a foot legend of ``names`` takes in a figure ``width`` px wide.

    Estimated from the text length at the legend's 14 px font (about 8 px a character plus
    the symbol and the gap, 48 px), packed greedily, as plotly packs a horizontal legend.
    """
    rows, used = 1, 0.0
    for name in names:
        w = 48.0 + 8.0 * len(str(name))
        if used and used + w > width:
            rows, used = rows + 1, 0.0
        used += w
    return rows


def foot_legend_bottom(names, *, width: float = 780.0, axis_title: bool = True) -> int:
    """Bottom margin (px) that holds the x axis title and a foot legend of ``names``.

    24 px per legend row under the tick labels and the axis title (70 px), so the axis title
    never sits on the legend however many entries wrap.
    """
    return (70 if axis_title else 40) + 24 * foot_legend_rows(names, width=width)


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

# --------------------------------------------------------------------------- semivariogram
#: one line colour per fitted model (cycled), distinct from the empirical points
CURVE_COLOURS = (pal.STRATUM_COLORS[5], pal.STRATUM_COLORS[2], pal.STRATUM_COLORS[3],
                 pal.STRATUM_COLORS[6], pal.STRATUM_COLORS[1], pal.REFERENCE_COLOR)

#: Caption of the semivariogram overlay of fitted models (page and report).
OVERLAY_CAPTION = ("Points: empirical semivariogram (sized by pair count) of the residuals from "
                   "the models' own mean — the fixed-effects design fitted by ordinary least "
                   "squares — not of the smooth trend used for exploration, so points and lines "
                   "describe the same residuals. Lines: the semivariogram implied by each fitted "
                   "model (★ = preferred).")


def variogram_figure(vg, *, look: CohortLook, model_curves: pd.DataFrame | None = None,
                     preferred: str | None = None, title: str | None = None) -> go.Figure:
    """Binned semivariogram (marker area ∝ pairs), optionally with fitted models' curves.

    The one semivariogram figure: the exploration section, the models section and the
    report all draw it.

    Parameters
    ----------
    vg : analysis.exploration.variogram.Semivariogram
        Reads ``bins`` (lag_lo, lag_hi, lag_mean, gamma, pairs), ``smooth`` (lag,
        gamma), ``process_variance``, ``max_lag`` and ``n_pairs``.
    model_curves : DataFrame, optional
        :func:`analysis.exploration.variogram.model_curves` (model, lag, gamma): each fitted model's
        implied semivariogram, one line each, the ``preferred`` one thicker and starred.
        With curves the figure shows the points and the curves only (the smooth and the
        process variance describe the exploration's residuals, not the models').
    title : str, optional
        Figure title (default: the exploration's).
    """
    b = vg.bins
    b = b[(b["pairs"] > 0) & np.isfinite(b["gamma"])]
    pairs = b["pairs"].to_numpy(float)
    biggest = pairs.max() if pairs.size else 1.0
    size = 8.0 + 22.0 * np.sqrt(pairs / biggest)
    unit = look.time_unit
    sq = look.squared_unit
    fitted = model_curves is not None
    fig = go.Figure()
    fig.add_trace(go.Scatter(
        x=b["lag_mean"].to_numpy(), y=b["gamma"].to_numpy(), mode="markers",
        name=("empirical (residuals of the models' mean, OLS)" if fitted
              else "binned mean (area ∝ pairs)"),
        marker={"size": size, "sizemode": "diameter", "color": pal.with_alpha(pal.STRATUM_COLORS[0], 0.8),
                "line": {"color": "#ffffff", "width": 1}},
        customdata=np.c_[b["lag_lo"].to_numpy(), b["lag_hi"].to_numpy(), pairs],
        hovertemplate=(f"lag %{{customdata[0]:.3g}}–%{{customdata[1]:.3g}} {unit}"
                       f"<br>mean lag %{{x:.2f}}<br>γ = %{{y:.4g}} {sq}"
                       "<br>%{customdata[2]:,} pairs<extra></extra>")))
    tops = [b["gamma"].max() if len(b) else 0.0]
    s = vg.smooth
    if len(s) and not fitted:
        fig.add_trace(go.Scatter(x=s["lag"].to_numpy(), y=s["gamma"].to_numpy(), mode="lines",
                                 name="lowess smooth of all pairs",
                                 line={"color": pal.STRATUM_COLORS[5], "width": 3.5},
                                 hovertemplate=(f"lag %{{x:.2f}} {unit}<br>smooth %{{y:.4g}} {sq}"
                                                "<extra></extra>")))
    for i, (name, part) in enumerate(model_curves.groupby("model", sort=False) if fitted else ()):
        best = name == preferred
        values = part["gamma"].to_numpy(float)
        tops.append(np.nanmax(values) if values.size else 0.0)
        fig.add_trace(go.Scatter(
            x=part["lag"].to_numpy(float), y=values, mode="lines",
            name=f"{name} ★" if best else name,
            line={"color": CURVE_COLOURS[i % len(CURVE_COLOURS)], "width": 4 if best else 2.5,
                  "dash": "solid" if best else "dash"},
            hovertemplate=f"{name}<br>lag %{{x:.2f}} {unit}<br>fitted %{{y:.4g}} {sq}"
                          "<extra></extra>"))
    pv = float(vg.process_variance)
    if np.isfinite(pv) and not fitted:
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
    _finish(fig, title or "Semivariogram of within-subject residuals",
            subtitle=f"half squared difference of two visits of a subject, by time apart · "
                     f"{int(getattr(vg, 'n_pairs', pairs.sum())):,} pairs",
            bottom=max(100, foot_legend_bottom([t.name for t in fig.data if t.showlegend
                                                 is not False])))
    fig.update_xaxes(title_text=f"time apart ({unit})" if unit else "time apart", rangemode="tozero")
    fig.update_yaxes(title_text=f"semivariance, {sq}", range=[0, 1.12 * top])
    return fig


def fitted_variogram_figure(vg, models, *, look: CohortLook) -> go.Figure:
    """The semivariogram ``vg`` with each fitted model of ``models`` (a ``ModelSet``) over it."""
    from analysis.exploration.variogram import model_curves

    return variogram_figure(vg, look=look, model_curves=model_curves(models.fits, vg.max_lag),
                            preferred=models.preferred,
                            title=f"{look.response}: fitted semivariograms against the "
                                  "empirical one")


def report_figures(exploration, models) -> list[tuple[str, str]]:
    """(caption, self-contained HTML) figures for the report: the semivariogram overlay.

    With fitted ``models`` the points are the semivariogram of the models' own OLS residuals
    and the lines each model's implied one; without, the exploration's semivariogram.
    """
    import plotly.io as pio

    vg = exploration.variogram
    look = cohort_look(exploration.cohort)
    if models is not None and getattr(models, "panel", None) is not None:
        vg = models.residual_variogram(n_bins=len(vg.bins), max_lag=vg.max_lag)
        fig = fitted_variogram_figure(vg, models, look=look)
    else:
        fig = variogram_figure(vg, look=look, model_curves=pd.DataFrame(
            {"model": [], "lag": [], "gamma": []}),
            title=f"{look.response}: fitted semivariograms against the empirical one")
    snippet = pio.to_html(fig, include_plotlyjs=True, full_html=False,
                          config={"displaylogo": False}, default_height="460px")
    return [(OVERLAY_CAPTION, snippet)]


# --------------------------------------------------------------------------- model checks
#: most points one model-check figure draws (a seeded random sample beyond; keeps each figure
#: well under ~300 kB of data on the page and in the report)
CHECK_POINTS = 3000
#: seed of that sample (stated in the figures' subtitles)
CHECK_SEED = 1
#: colour of the residual points and of the predicted random effects
CHECK_COLOUR = pal.STRATUM_COLORS[0]
#: the population prediction and the subject's own prediction in the subject figure
POPULATION_COLOUR = pal.REFERENCE_COLOR
OWN_COLOUR = pal.STRATUM_COLORS[5]
SERIAL_COLOUR = pal.STRATUM_COLORS[2]


def _sample_note(shown: int, total: int, what: str = "visits") -> str:
    if shown >= total:
        return f"{total:,} {what}"
    return f"{shown:,} of {total:,} {what} drawn (random sample, seed {CHECK_SEED})"


def _highlight_rows(frame: pd.DataFrame, highlight_subject) -> np.ndarray:
    if highlight_subject is None:
        return np.empty(0, dtype=int)
    return np.flatnonzero(frame["subject"].to_numpy() == str(highlight_subject))


def residual_scatter_figure(checks, *, look: CohortLook, against: str = "fitted",
                            highlight_subject=None, limit: int = CHECK_POINTS) -> go.Figure:
    """Standardised (decorrelated) residuals against the population fitted values or time.

    Under the model the points scatter evenly about 0 with about 95% between the dashed
    lines at ±z (the normal quantile of the page's confidence level); a funnel or a curve
    shows variance or mean-model trouble.
    """
    from analysis.confidence import CONFIDENCE_LEVEL, z_quantile
    from analysis.models.checks import thin_rows

    v = checks.visits
    hl = _highlight_rows(v, highlight_subject)
    rows = thin_rows(len(v), limit, seed=CHECK_SEED, keep=hl)
    shown = v.iloc[rows]
    col = "fitted" if against == "fitted" else "time"
    x_title = (f"population fitted value, {look.response_label}" if col == "fitted"
               else look.time_label)
    fig = go.Figure()
    kind = go.Scattergl if len(shown) > GL_POINTS else go.Scatter
    fig.add_trace(kind(
        x=shown[col].to_numpy(float), y=shown["standardised"].to_numpy(float), mode="markers",
        name="visit", customdata=shown["subject"].to_numpy(dtype=object),
        marker={"color": pal.with_alpha(CHECK_COLOUR, 0.45), "size": 6},
        hovertemplate=("subject %{customdata}<br>" + ("fitted %{x:.4g}" if col == "fitted"
                                                      else f"%{{x:.3g}} {look.time_unit}")
                       + "<br>standardised residual %{y:.2f}<extra></extra>")))
    z = z_quantile(CONFIDENCE_LEVEL)
    lo, hi = float(np.nanmin(shown[col])) if len(shown) else 0.0, \
        float(np.nanmax(shown[col])) if len(shown) else 1.0
    fig.add_trace(go.Scatter(x=[lo, hi, None, lo, hi], y=[z, z, None, -z, -z], mode="lines",
                             name=f"±{z:.2f}: {100 * CONFIDENCE_LEVEL:g}% of N(0, 1)",
                             line={"color": pal.REFERENCE_COLOR, "width": 1.5, "dash": "dash"},
                             hoverinfo="skip"))
    if hl.size:
        h = v.iloc[hl]
        fig.add_trace(kind(x=h[col].to_numpy(float), y=h["standardised"].to_numpy(float),
                           mode="markers", name=f"subject {highlight_subject}",
                           customdata=h["subject"].to_numpy(dtype=object),
                           marker={"color": pal.HIGHLIGHT_COLOR, "size": 11, "symbol": "diamond",
                                   "line": {"color": "#ffffff", "width": 1}},
                           hovertemplate="subject %{customdata}<br>%{y:.2f}<extra></extra>"))
    fig.add_hline(y=0, line={"color": pal.REFERENCE_COLOR, "width": 1.2})
    what = "fitted value" if col == "fitted" else "time"
    _finish(fig, f"Standardised residuals by {what}",
            subtitle=_sample_note(len(shown), len(v)), bottom=100)
    fig.update_xaxes(title_text=x_title)
    yr, _ = _robust_range(shown["standardised"].to_numpy(float), q=0.001)
    fig.update_yaxes(title_text="standardised residual (SD units)", range=yr, zeroline=False)
    return fig


def residual_qq_figure(checks, *, look: CohortLook, highlight_subject=None,
                       limit: int = CHECK_POINTS) -> go.Figure:
    """Normal quantile plot of the standardised residuals against the N(0, 1) diagonal."""
    from analysis.models.checks import thin_quantiles

    v = checks.visits
    rows = thin_quantiles(v["score"].to_numpy(float), limit)
    shown = v.iloc[rows]
    fig = go.Figure()
    kind = go.Scattergl if len(shown) > GL_POINTS else go.Scatter
    fig.add_trace(kind(
        x=shown["score"].to_numpy(float), y=shown["standardised"].to_numpy(float),
        mode="markers", name="visit", customdata=shown["subject"].to_numpy(dtype=object),
        marker={"color": pal.with_alpha(CHECK_COLOUR, 0.55), "size": 6},
        hovertemplate=("subject %{customdata}<br>normal quantile %{x:.2f}"
                       "<br>standardised residual %{y:.2f}<extra></extra>")))
    ends = [float(np.nanmin(shown["score"])), float(np.nanmax(shown["score"]))] if len(shown) \
        else [-3.0, 3.0]
    fig.add_trace(go.Scatter(x=ends, y=ends, mode="lines", name="N(0, 1): the diagonal",
                             line={"color": pal.REFERENCE_COLOR, "width": 2, "dash": "dash"},
                             hoverinfo="skip"))
    hl = _highlight_rows(v, highlight_subject)
    if hl.size:
        h = v.iloc[hl]
        fig.add_trace(kind(x=h["score"].to_numpy(float), y=h["standardised"].to_numpy(float),
                           mode="markers", name=f"subject {highlight_subject}",
                           customdata=h["subject"].to_numpy(dtype=object),
                           marker={"color": pal.HIGHLIGHT_COLOR, "size": 11, "symbol": "diamond",
                                   "line": {"color": "#ffffff", "width": 1}},
                           hovertemplate="subject %{customdata}<br>%{y:.2f}<extra></extra>"))
    note = (f"{len(v):,} visits" if len(shown) >= len(v) else
            f"{len(shown):,} of {len(v):,} visits, evenly by rank, extremes kept")
    _finish(fig, "Residuals against the normal", subtitle=note, bottom=100)
    fig.update_xaxes(title_text="standard normal quantile")
    fig.update_yaxes(title_text="standardised residual (SD units)")
    return fig


def effects_qq_figure(checks, *, look: CohortLook, highlight_subject=None,
                      limit: int = CHECK_POINTS) -> go.Figure:
    """Normal quantile plot of each predicted random effect, with its quartile line."""
    from plotly.subplots import make_subplots

    from analysis.models.checks import quartile_line, thin_quantiles

    names = checks.effect_names
    if not names:
        return empty_figure(f"{checks.model} has no random effects to check.",
                            title="Predicted random effects")
    e = checks.effects
    units = {"intercept": look.response_unit, "slope": look.slope_unit}
    fig = make_subplots(rows=1, cols=len(names), horizontal_spacing=0.16,
                        subplot_titles=[f"random {n}{_parenthesis(units[n])}" for n in names])
    for ann in fig.layout.annotations:
        ann.font = {"size": PANEL_TITLE_SIZE}
    hl = str(highlight_subject) if highlight_subject is not None else None
    shown_n = 0
    for j, n in enumerate(names, start=1):
        rows = thin_quantiles(e[f"{n}_score"].to_numpy(float), limit // len(names))
        g = e.iloc[rows]
        shown_n = len(g)
        fig.add_trace(go.Scatter(
            x=g[f"{n}_score"].to_numpy(float), y=g[n].to_numpy(float), mode="markers",
            name="subject", showlegend=j == 1, legendgroup="subject",
            customdata=g["subject"].to_numpy(dtype=object),
            marker={"color": pal.with_alpha(CHECK_COLOUR, 0.6), "size": 6},
            hovertemplate=("subject %{customdata}<br>normal quantile %{x:.2f}<br>"
                           f"{n} %{{y:.4g}}<extra></extra>")), row=1, col=j)
        a, b = quartile_line(e[n])
        z = e[f"{n}_score"].to_numpy(float)
        ends = np.array([np.nanmin(z), np.nanmax(z)]) if z.size else np.array([-3.0, 3.0])
        fig.add_trace(go.Scatter(x=ends, y=a + b * ends, mode="lines",
                                 name="line through the quartiles", showlegend=j == 1,
                                 legendgroup="line",
                                 line={"color": pal.REFERENCE_COLOR, "width": 2, "dash": "dash"},
                                 hoverinfo="skip"), row=1, col=j)
        if hl is not None:
            h = e[e["subject"] == hl]
            if len(h):
                fig.add_trace(go.Scatter(
                    x=h[f"{n}_score"].to_numpy(float), y=h[n].to_numpy(float), mode="markers",
                    name=f"subject {hl}", showlegend=j == 1, legendgroup="hl",
                    customdata=h["subject"].to_numpy(dtype=object),
                    marker={"color": pal.HIGHLIGHT_COLOR, "size": 12, "symbol": "diamond",
                            "line": {"color": "#ffffff", "width": 1}},
                    hovertemplate="subject %{customdata}<br>%{y:.4g}<extra></extra>"),
                    row=1, col=j)
        fig.update_xaxes(title_text="normal quantile", row=1, col=j)
        fig.update_yaxes(title_text="predicted deviation" if j == 1 else "", row=1, col=j)
    note = (f"{len(e):,} subjects" if shown_n >= len(e) else
            f"{shown_n:,} of {len(e):,} subjects, evenly by rank, extremes kept")
    _finish(fig, "Random effects against the normal",
            subtitle=f"{note} · read the shape, not the spread", bottom=100, top=104)
    return fig


def subject_fit_figure(checks, subject, *, look: CohortLook) -> go.Figure:
    """One subject's visits with the population prediction and its own predicted course."""
    title = "One subject: visits and predicted course"
    if subject is None:
        return empty_figure("Click a subject in any view to see its visits and predicted "
                            "course here.", title=title)
    s = checks.subject(subject).sort_values("time", kind="stable")
    if not len(s):
        return empty_figure(f"Subject {subject} is not among the subjects {checks.model} was "
                            "fitted to.", title=title)
    t = s["time"].to_numpy(float)
    hover = f"%{{x:.3g}} {look.time_unit}: %{{y:.4g}}"
    fig = go.Figure()
    fig.add_trace(go.Scatter(x=t, y=s["fitted"].to_numpy(float), mode="lines",
                             name="population prediction (fixed effects)",
                             line={"color": POPULATION_COLOUR, "width": 2.5, "dash": "dash"},
                             hovertemplate="population " + hover + "<extra></extra>"))
    if checks.effect_names:
        fig.add_trace(go.Scatter(x=t, y=s["subject_fitted"].to_numpy(float), mode="lines",
                                 name="own prediction (+ its random effects)",
                                 line={"color": OWN_COLOUR, "width": 3.5},
                                 hovertemplate="own " + hover + "<extra></extra>"))
    if checks.serial:
        fig.add_trace(go.Scatter(x=t, y=s["serial_fitted"].to_numpy(float), mode="lines+markers",
                                 name="own prediction + serial component",
                                 line={"color": SERIAL_COLOUR, "width": 2, "dash": "dot"},
                                 marker={"size": 6},
                                 hovertemplate="with serial " + hover + "<extra></extra>"))
    fig.add_trace(go.Scatter(x=t, y=s["response"].to_numpy(float), mode="markers",
                             name="visits", customdata=s["subject"].to_numpy(dtype=object),
                             marker={"color": pal.HIGHLIGHT_COLOR, "size": 10,
                                     "line": {"color": "#ffffff", "width": 1}},
                             hovertemplate="subject %{customdata}<br>" + hover
                                           + "<extra></extra>"))
    parts = [f"subject {subject}", checks.model, "lines join the predictions at the visits"]
    if not checks.serial:
        parts.append("no serial process in this model")
    _finish(fig, title, subtitle=" · ".join(parts), bottom=100)
    fig.update_xaxes(title_text=look.time_label)
    fig.update_yaxes(title_text=look.response_label)
    return fig


def check_figures(checks, *, look: CohortLook, highlight_subject=None,
                  limit: int = CHECK_POINTS) -> list[tuple[str, go.Figure]]:
    """(key, figure) of every model-check figure, in page order."""
    return [
        ("fitted", residual_scatter_figure(checks, look=look, against="fitted",
                                           highlight_subject=highlight_subject, limit=limit)),
        ("time", residual_scatter_figure(checks, look=look, against="time",
                                         highlight_subject=highlight_subject, limit=limit)),
        ("qq", residual_qq_figure(checks, look=look, highlight_subject=highlight_subject,
                                  limit=limit)),
        ("effects", effects_qq_figure(checks, look=look, highlight_subject=highlight_subject,
                                      limit=limit)),
        ("subject", subject_fit_figure(checks, highlight_subject, look=look)),
    ]


# --------------------------------------------------------------------------- plan
#: power-curve colours of the next-study plan
TARGET_COLOUR = pal.STRATUM_COLORS[5]
CURVE_COLOUR = pal.STRATUM_COLORS[0]


def power_figure(made) -> go.Figure:
    """Power against the number of subjects, with the target power and the size needed."""
    curve = made.plan.to_frame()
    p = made.plan
    fig = go.Figure()
    fig.add_trace(go.Scatter(x=curve["subjects"], y=curve["power"], mode="lines+markers",
                             name=f"power under {made.model}",
                             line={"color": CURVE_COLOUR, "width": 3}, marker={"size": 5},
                             hovertemplate="%{x} subjects<br>power %{y:.3f}<extra></extra>"))
    fig.add_trace(go.Scatter(x=[curve["subjects"].min(), curve["subjects"].max()],
                             y=[made.inputs.power] * 2, mode="lines",
                             name=f"target power {made.inputs.power:g}",
                             line={"color": TARGET_COLOUR, "dash": "dash", "width": 2},
                             hoverinfo="skip"))
    fig.add_trace(go.Scatter(x=[p.subjects_needed], y=[p.achieved_power], mode="markers",
                             name=f"needed: {p.subjects_needed:,} subjects",
                             marker={"color": TARGET_COLOUR, "size": 13, "symbol": "diamond"},
                             hovertemplate="%{x} subjects<br>power %{y:.3f}<extra></extra>"))
    _finish(fig, "Power of the next study against its size",
            bottom=foot_legend_bottom([t.name for t in fig.data]), top=60)
    fig.update_layout(hovermode="closest")
    fig.update_xaxes(title_text="subjects enrolled (all groups)")
    fig.update_yaxes(title_text="power (probability)")
    fig.update_yaxes(range=[0, 1.02])
    fig.update_xaxes(rangemode="tozero")
    return fig


def report_plan_figure(made) -> str:
    """The power curve as self-contained HTML for the report."""
    import plotly.io as pio

    return pio.to_html(power_figure(made), include_plotlyjs=True, full_html=False,
                       config={"displaylogo": False}, default_height="420px")


__all__ = [
    "CohortLook", "cohort_look", "empty_figure", "colour_alpha", "variogram_figure",
    "fitted_variogram_figure", "report_figures", "OVERLAY_CAPTION", "power_figure",
    "report_plan_figure",
]
