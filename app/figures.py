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
CURVE_COLOURS = ("#1b6a9e", "#c0621a", "#2c8a5a", "#8c4a9c", "#a33b4b", "#127f86")

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
            bottom=100)
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


# --------------------------------------------------------------------------- plan
#: power-curve colours of the next-study plan
TARGET_COLOUR = "#a33b4b"
CURVE_COLOUR = "#1b6a9e"


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
    fig.update_layout(
        title={"text": "Power of the next study against its size", "x": 0.01},
        xaxis_title="subjects enrolled (all groups)", yaxis_title="power (probability)",
        template="plotly_white", font={"size": 15}, margin={"l": 80, "r": 20, "t": 60, "b": 60},
        legend={"orientation": "h", "yanchor": "top", "y": -0.2, "x": 0}, hovermode="closest")
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
