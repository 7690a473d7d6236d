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

import textwrap
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import plotly.io as _pio

from analysis.exploration.summaries import (ALL_LABEL, FOLLOWED, LAST_VISIT, LEFT_EARLY, MEAN_BINS,
                                            group_means, mean_interval_halfwidth)

from analysis.exploration.digest import thin_steps

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
#: the axes' look in every panel of every figure
AXIS_STYLE = {"gridcolor": pal.GRID_COLOR, "zerolinecolor": "#c3c9d0", "linecolor": "#9aa6b2",
              "showline": True, "ticks": "outside", "tickcolor": "#9aa6b2",
              "title": {"font": {"size": 15}}}


def house_template() -> go.layout.Template:
    """The figures' fixed look as one plotly template, layout only: plotly's white layout
    under our fonts, backgrounds and axes (a template's axis part styles every x or y axis of
    a figure, subplots included). Per-trace-type defaults are left out: every trace sets its
    own look, and they would add ~7 kB to each figure sent to the page."""
    layout = {k: v for k, v in _pio.templates["plotly_white"].layout.to_plotly_json().items()
              if k not in ("geo", "polar", "ternary", "scene", "mapbox", "map")}
    for axis in ("xaxis", "yaxis"):
        layout[axis] = {**layout.get(axis, {}), **AXIS_STYLE}
    layout.update(font=FONT, hoverlabel={"font": {"size": 14}}, clickmode="event",
                  paper_bgcolor="#ffffff", plot_bgcolor="#ffffff")
    return go.layout.Template(layout=layout)


HOUSE_TEMPLATE = house_template()
#: every figure made in this process starts from it (plotly applies its default template when
#: a figure is serialised, far cheaper than setting a template object on each figure)
_pio.templates["cohortlens"] = HOUSE_TEMPLATE
_pio.templates.default = "cohortlens"

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
    # display labels (Roles.labels) in place of column names
    name = roles.label if hasattr(roles, "label") else (lambda c: c)
    # names from the user's file are cut to a display length (axis titles, legends)
    return CohortLook(
        strata=tuple(labels),
        colours=dict(pal.stratum_colours(labels)),
        time_label=short(cohort.time_label),
        time_unit=cohort.settings.unit,
        response=short(name(roles.response)),
        response_unit=short(getattr(roles, "response_unit", "") or "", 30),
        stratifier=short(name(stratifier)),
        stratifier_unit=short(cov_unit, 30) if stratifier == cohort.covariate else "",
        covariate=None if cohort.covariate is None else short(name(cohort.covariate)),
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
                      title={"text": title, "x": 0.01} if title else None,
                      margin={"l": 20, "r": 20, "t": 50 if title else 20, "b": 20})
    return fig


#: A figure's width (px) on a 1,280 px wide page: the main column, and half of it (two
#: figures side by side). Margins sized for them also hold at wider pages.
FULL_FIGURE_PX = 882.0
HALF_FIGURE_PX = 432.0
#: the plot's own width in a full-width figure with the default side margins (80 + 24 px)
FULL_PLOT_PX = FULL_FIGURE_PX - 80 - 24
#: The foot legend and the x axis as plotly.js 4 draws them at the house fonts, measured in
#: headless Chromium: an entry is its symbol and gaps (60 px) plus ~8 px a character of its
#: 14 px label; a row is 21.2 px, 31 px when the entries are legend groups; 11 px of padding;
#: one line of tick labels with the axis title under the plot takes 55 px.
LEGEND_ENTRY_PX = 60.0
LEGEND_CHAR_PX = 8.2
LEGEND_ROW_PX = 21.2
LEGEND_GROUP_ROW_PX = 31.0
LEGEND_PAD_PX = 11.0
X_AXIS_BLOCK_PX = 58
#: each further line of a tick label (labels broken with <br>)
TICK_LINE_PX = 20
#: right margin holding a heatmap's colour bar beside the plot (85 px drawn, 12 px gap)
COLORBAR_RIGHT_PX = 106
#: a tick label's width per character at the 15 px axis font, and the axis title beside them
TICK_CHAR_PX = 8.6
Y_TITLE_PX = 46


def _finish(fig: go.Figure, title: str, *, subtitle: str = "", legend_y: float = 0.0,
            top: int = 78, bottom: int | None = 110, left: int = 80, right: int = 24,
            width: float = FULL_FIGURE_PX, axis_block: int = X_AXIS_BLOCK_PX) -> go.Figure:
    """Shared look: title (+ subtitle), projector-size fonts, legend along the figure's foot.

    ``legend_y`` is measured on the whole figure (0 = bottom edge), so the legend
    never runs into the x axis title; ``bottom`` must leave room for both, or is None to be
    sized here from the figure's legend entries (:func:`foot_bottom`, for a figure ``width``
    px wide under an x axis block of ``axis_block`` px). The fixed part of the look (fonts,
    axes, backgrounds) is :data:`HOUSE_TEMPLATE`, set in the default template (each plotly
    update call costs milliseconds on the server).
    """
    if bottom is None:
        bottom = foot_bottom(fig, width=width - left - right, axis_block=axis_block)
    title_spec = {"text": title, "x": 0.01, "xanchor": "left", "font": {"size": TITLE_SIZE}}
    if subtitle:
        title_spec["subtitle"] = {"text": subtitle,
                                  "font": {"size": 14, "color": pal.MUTED_TEXT_COLOR}}
    parts = {"title": title_spec, "margin": {"l": left, "r": right, "t": top, "b": bottom},
             "legend": {"orientation": "h", "x": 0, "xanchor": "left", "y": legend_y,
                        "yanchor": "bottom", "yref": "container", "font": {"size": 14},
                        "itemsizing": "constant"}}
    # assigned whole (merged over what the figure set itself): a tenth of update_layout's cost
    for key, value in parts.items():
        fig.layout[key] = _merged(fig.layout[key].to_plotly_json(), value)
    return fig


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


def reference_line(fig: go.Figure, *, x: float | None = None, y: float | None = None,
                   line: dict) -> go.Figure:
    """A line across the whole plot at ``x`` (vertical) or ``y`` (horizontal), as plotly's
    ``add_vline``/``add_hline`` draw it, added as one shape (those calls cost ~8 ms each on
    the server; this a twentieth of that)."""
    if x is not None:
        shape = {"type": "line", "xref": "x", "x0": x, "x1": x,
                 "yref": "y domain", "y0": 0, "y1": 1, "line": line}
    else:
        shape = {"type": "line", "yref": "y", "y0": y, "y1": y,
                 "xref": "x domain", "x0": 0, "x1": 1, "line": line}
    fig.layout.shapes = (*fig.layout.shapes, shape)
    return fig


def _merged(base: dict, over: dict) -> dict:
    """``base`` with ``over`` laid on top, nested dicts merged key by key."""
    out = dict(base)
    for k, v in over.items():
        out[k] = _merged(out[k], v) if isinstance(v, dict) and isinstance(out.get(k), dict) else v
    return out


def foot_legend_rows(names, *, width: float = FULL_PLOT_PX) -> int:
    """How many rows a foot legend of ``names`` takes over a plot ``width`` px wide.

    Entries are packed greedily, as plotly.js packs a horizontal legend, each as wide as
    its label (see :data:`LEGEND_ENTRY_PX`).
    """
    rows, used = 1, 0.0
    for name in names:
        w = LEGEND_ENTRY_PX + LEGEND_CHAR_PX * len(str(name))
        if used and used + w > width:
            rows, used = rows + 1, 0.0
        used += w
    return rows


def foot_legend_bottom(names, *, width: float = FULL_PLOT_PX,
                       axis_title: bool = True, grouped: bool = False,
                       axis_block: int = X_AXIS_BLOCK_PX) -> int:
    """Bottom margin (px) that holds the x axis (tick labels and title) and a foot legend
    of ``names`` over a plot ``width`` px wide, so plotly.js need not widen the margin
    itself (which draws the figure a second time: a third to a half of its drawing time).
    """
    if not names:
        return axis_block if axis_title else 40
    row = LEGEND_GROUP_ROW_PX if grouped else LEGEND_ROW_PX
    legend = LEGEND_PAD_PX + row * foot_legend_rows(names, width=width)
    return int(np.ceil((axis_block if axis_title else 34) + legend + 3))


def legend_entries(fig: go.Figure) -> tuple[list[str], bool]:
    """(names shown in ``fig``'s legend, whether any is a legend group's entry)."""
    shown = [t for t in fig.data if t.showlegend is not False and t.name]
    if fig.layout.showlegend is False:      # (a lone entry is counted: a legend may be asked for)
        return [], False
    return [t.name for t in shown], any(t.legendgroup for t in shown)


def foot_bottom(fig: go.Figure, *, width: float, axis_block: int = X_AXIS_BLOCK_PX) -> int:
    """:func:`foot_legend_bottom` for ``fig``'s own legend entries over a plot ``width`` px."""
    names, grouped = legend_entries(fig)
    return foot_legend_bottom(names, width=width, grouped=grouped, axis_block=axis_block)


def x_axis_block(ticks=()) -> int:
    """Height (px) of the x axis under a plot: tick labels (``ticks``, some broken over lines
    with <br>) and the axis title."""
    return X_AXIS_BLOCK_PX + TICK_LINE_PX * max((str(t).count("<br>") for t in ticks), default=0)


def tick_label_left(texts, *, least: int = 80, title_lines: int = 1) -> int:
    """Left margin (px) holding y tick labels ``texts`` and the axis title (of
    ``title_lines`` lines) beside them."""
    longest = max((len(str(t)) for t in texts), default=0)
    return max(least, int(np.ceil(TICK_CHAR_PX * longest + Y_TITLE_PX
                                  + TICK_LINE_PX * (title_lines - 1))))


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


#: Report figures: subjects drawn per group in the courses figure, and most subjects (a seeded
#: sample beyond) in the subject-level figures, most points per model-check figure; they keep
#: the whole demo report under 2 MB with the plotting library inlined once.
REPORT_DRAW = 25
REPORT_SUBJECTS = 600
REPORT_CHECK_POINTS = 1000
#: seed of every sample the report draws
CHECK_SEED_REPORT = 1
#: the plotting library the report inlines (plotly.js "basic" bundle: scatter and bar traces,
#: the same plotly.js version the Python package draws with; see app/vendor/README.md)
REPORT_LIBRARY = Path(__file__).resolve().parent / "vendor" / "plotly-basic.min.js"


def report_library() -> str:
    """The plotting library as one inline ``<script>`` (written once at the top of the report)."""
    return f'<script type="text/javascript">{REPORT_LIBRARY.read_text(encoding="utf-8")}</script>'


def _round_values(values):
    """Numbers as 32-bit floats (about 7 significant digits, plenty for a figure; plotly writes
    a float array as packed binary, so this halves its size) or, in a list with gaps, rounded."""
    a = np.asarray(values)
    if a.dtype.kind == "f":
        return a.astype(np.float32)
    if a.dtype.kind == "O":
        return np.array([float(np.float32(v)) if isinstance(v, (float, np.floating))
                         and np.isfinite(v) else v for v in a.ravel()],
                        dtype=object).reshape(a.shape)
    return a


def report_html(fig: go.Figure, *, height: int = 460) -> str:
    """A figure as an HTML snippet for the report: WebGL traces drawn as SVG ones (the inlined
    library has no WebGL), x and y as 32-bit floats, no library of its own (see
    :func:`report_library`)."""
    import plotly.io as pio

    data = []
    for t in fig.data:
        d = t.to_plotly_json()
        for k in ("x", "y"):
            if k in d and d[k] is not None:
                d[k] = _round_values(d[k])
        if d.get("type") == "scattergl":
            d["type"] = "scatter"
        data.append(d)
    out = go.Figure(data=data, layout=fig.layout)
    # the template's per-trace-type defaults (every type, ~10 kB a figure) are not needed:
    # each trace sets its own look; its layout part (fonts, axes) stays
    out.layout.template = go.layout.Template(layout=fig.layout.template.layout)
    return pio.to_html(out, include_plotlyjs=False, full_html=False,
                       config={"displaylogo": False, "responsive": True},
                       default_height=f"{height}px")


def _sample_frame_subjects(frame: pd.DataFrame, limit: int, *, seed: int = CHECK_SEED_REPORT):
    """(rows of at most ``limit`` subjects drawn with a seed, drawn, total) of a per-subject frame."""
    n = len(frame)
    if n <= limit:
        return frame, n, n
    rng = np.random.default_rng(seed)
    keep = np.sort(rng.choice(n, size=limit, replace=False))
    return frame.iloc[keep], limit, n


def aggregate_report_figures(exploration, models) -> list[tuple[str, str, str]]:
    """The report figures drawn from aggregated results only (a cohort whose rows stay on a
    cluster): the semivariogram and, with fitted ``models``, their fitted curves."""
    look = cohort_look(exploration.cohort)
    out = [("library", "", report_library()),
           ("semivariogram", "Binned semivariogram of the detrended residuals (marker area "
                             "∝ pairs) with a lowess smooth and the process variance.",
            report_html(variogram_figure(exploration.variogram, look=look)))]
    if models is not None and getattr(models, "fits", None):
        vg = exploration.variogram
        vgm = models.residual_variogram(n_bins=len(vg.bins), max_lag=vg.max_lag)
        out.append(("models", OVERLAY_CAPTION,
                    report_html(fitted_variogram_figure(vgm, models, look=look), height=520)))
    return out


def report_figures(exploration, models, *, chosen: str | None = None,
                   subject=None) -> list[tuple[str, str, str]]:
    """(place, caption, HTML) of every report figure, the plotting library first.

    The page's figures: courses by group, the semivariogram (and, with fitted ``models``, the
    models' fitted curves over the semivariogram of their own OLS residuals), subject slope
    intervals, slope against the covariate, loss to follow-up (Kaplan–Meier), and the model
    checks of ``chosen`` (default: the preferred model) with ``subject`` (default: the first
    subject with the most visits). Large cohorts are drawn from seeded samples (said in the
    captions).
    """
    from analysis.errors import CohortError
    from analysis.models.checks import checks_for

    cohort = exploration.cohort
    look = cohort_look(cohort)
    out = [("library", "", report_library())]
    frame = cohort.frame
    frame["subject"] = frame["subject"].astype(str)
    chosen_ids, k, n = sample_subjects(frame, per_stratum=REPORT_DRAW, seed=CHECK_SEED_REPORT)
    shown = frame[frame["subject"].isin(set(chosen_ids))]
    out.append(("courses", f"{k:,} of {n:,} subjects drawn ({REPORT_DRAW} per group at most, "
                           f"sample {CHECK_SEED_REPORT}); the thick lines are the mean of every "
                           "subject in the group.",
                report_html(courses_figure(shown, full=frame, look=look), height=560)))
    out.append(("semivariogram", "Binned semivariogram of the detrended residuals (marker area "
                                 "∝ pairs) with a lowess smooth and the process variance.",
                report_html(variogram_figure(exploration.variogram, look=look))))
    lines, drawn, total = _sample_frame_subjects(exploration.subject_lines, REPORT_SUBJECTS)
    sample = ("" if drawn >= total else f" {drawn:,} of {total:,} subjects drawn at random "
              f"(seed {CHECK_SEED_REPORT}).")
    out.append(("lines", "Each subject's least-squares slope with its 95% interval, grouped by "
                         "group and ordered by slope." + sample,
                report_html(intervals_figure(lines, look=look, order="slope"), height=620)))
    out.append(("rate", "Subject slope against the baseline covariate, coloured by group, with "
                        "a lowess smooth of every subject." + sample,
                report_html(slope_vs_covariate_figure(lines, exploration.summaries.slope_smooth,
                                                      look=look), height=480)))
    out.append(("followup", "Share of each group not yet left (Kaplan–Meier, 95% band) and the "
                            "response at the last visit.",
                report_html(dropout_figure(exploration.summaries.dropout, look=look),
                            height=500)))
    if models is None or getattr(models, "panel", None) is None or not models.fits:
        return out
    vg = exploration.variogram
    vgm = models.residual_variogram(n_bins=len(vg.bins), max_lag=vg.max_lag)
    out.append(("models", OVERLAY_CAPTION,
                report_html(fitted_variogram_figure(vgm, models, look=look), height=520)))
    try:
        ch = checks_for(cohort, models, chosen)
    except CohortError:          # the report's text says why
        return out
    if subject is None or not len(ch.subject(subject)):
        counts = ch.visits.groupby("subject", sort=False).size()
        subject = counts.idxmax() if len(counts) else None
    for key, fig in check_figures(ch, look=look, highlight_subject=subject,
                                  limit=REPORT_CHECK_POINTS):
        out.append(("checks", CHECK_CAPTIONS[key].format(model=ch.model, subject=subject,
                                                         limit=REPORT_CHECK_POINTS),
                    report_html(fig, height=440)))
    return out


#: captions of the model-check figures in the report
CHECK_CAPTIONS = {
    "fitted": "{model}: standardised residuals against the population fitted values (at most "
              "{limit:,} visits, a seeded random sample beyond).",
    "time": "{model}: standardised residuals against time (at most {limit:,} visits).",
    "qq": "{model}: normal quantile plot of the standardised residuals.",
    "effects": "{model}: normal quantile plot of each predicted random effect.",
    "subject": "{model}: subject {subject} (the report marks the first subject with the most "
               "visits unless one was highlighted on the page), its visits with the population "
               "and its own predicted course.",
}


# --------------------------------------------------------------------------- views the report draws too
# Moved here from their section modules (which import them back) so the Dash-free report
# can draw the same figures as the page.

# from app/sections/courses.py
def sample_subjects(frame: pd.DataFrame, *, per_stratum: int, seed: int,
                    keep: str | None = None, firsts: pd.DataFrame | None = None
                    ) -> tuple[np.ndarray, int, int]:
    """A reproducible random sample of subjects, up to ``per_stratum`` from each group.

    Returns (chosen subject ids, number drawn, number available). ``keep`` (the
    highlighted subject) is always included. The same (data, seed) gives the same draw.
    ``firsts`` (subject, stratum: one row per subject in order of first appearance) saves
    finding them in ``frame``.
    """
    if firsts is None:
        firsts = frame.drop_duplicates("subject")[["subject", "stratum"]]
    rng = np.random.default_rng(seed)
    chosen = []
    for _, grp in firsts.groupby("stratum", sort=True):
        ids = grp["subject"].to_numpy()
        if len(ids) > per_stratum:
            ids = rng.choice(ids, size=per_stratum, replace=False)
        chosen.extend(ids.tolist())
    if keep is not None and keep not in chosen and bool(
            (firsts["subject"].astype(str) == keep).any()):
        chosen.append(keep)
    return np.asarray(chosen, dtype=object), len(chosen), len(firsts)


def _is_subject(column: pd.Series, subject: str) -> np.ndarray:
    """Rows of ``subject`` (text) in a subject column, text or categorical (a categorical
    column is compared through its codes: no text per row)."""
    if isinstance(column.dtype, pd.CategoricalDtype):
        where = np.flatnonzero(column.cat.categories.astype(str) == subject)
        return column.cat.codes.to_numpy() == (where[0] if where.size else -2)
    return (column.astype(str) == subject).to_numpy()


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
                   n_bins: int = MEAN_BINS, means: pd.DataFrame | None = None,
                   subjects_per: pd.Series | None = None) -> go.Figure:
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
    means, subjects_per : optional
        ``group_means(full, ...)`` and subjects per group label, when already computed.
    """
    labels = list(look.strata) or _present_strata(look, full["stratum_label"])
    k = max(len(labels), 1)
    ncol = k if k <= 4 else (int(np.ceil(k / 2)) if k <= 8 else 4)
    nrow = int(np.ceil(k / ncol))
    if subjects_per is None:
        subjects_per = full.groupby("stratum_label", sort=False)["subject"].nunique()
    # the covariate and its unit are named once, in the figure title; each panel
    # title is the group's range and its subject count, wrapped only when too wide
    titles = [panel_title(lab, int(subjects_per.get(lab, 0)), ncol=ncol,
                          bold=highlight_stratum == lab) for lab in labels]
    title_lines = max(t.count("<br>") + 1 for t in titles) if titles else 1
    layout, panels = panel_grid(nrow, ncol, titles, x_title=look.time_label,
                                y_title=look.response_label, horizontal_spacing=0.045,
                                vertical_spacing=(0.12 + 0.04 * title_lines) if nrow > 1 else 0.1)
    traces = []

    shown = shown.assign(subject=shown["subject"].astype(str),
                         stratum_label=shown["stratum_label"].astype(str))
    shown = shown.sort_values(["stratum_label", "subject", "time"], kind="stable")
    if means is None:
        means = group_means(full, strata=labels, n_bins=n_bins)
    hl = None if highlight_subject is None else str(highlight_subject)
    hl_rows = None if hl is None else full.iloc[_highlight_rows(full, hl)]
    hover = (f"subject %{{customdata}}<br>%{{x:.1f}} {look.time_unit}: %{{y:.1f}}"
             f" {look.response_unit}<extra></extra>")
    # WebGL traces are painted above SVG ones, so once the subject lines need WebGL,
    # the mean and the highlighted subject use it too (and stay on top)
    biggest = int(shown["stratum_label"].value_counts().max()) if len(shown) else 0
    kind = go.Scattergl if biggest > GL_POINTS else go.Scatter
    for i, lab in enumerate(labels):
        axes = panels[i]
        colour = look.colour(lab)
        strength = _strength(look, lab, highlight_stratum)
        sub = shown[shown["stratum_label"] == lab]
        xs, ys, cd = _segments(sub["subject"].to_numpy(), sub["time"].to_numpy(),
                               sub["response"].to_numpy(), sub["subject"].to_numpy())
        traces.append(kind(
            x=xs, y=ys, customdata=cd, mode="lines", name=look.group_title(lab),
            legendgroup=lab, showlegend=True,
            line={"color": pal.with_alpha(colour, 0.42 * strength), "width": 1.2},
            hovertemplate=hover, **axes))
        m = means[means["stratum_label"] == lab]
        if len(m):
            common = dict(x=m["time"].to_numpy(), y=m["response"].to_numpy(), mode="lines",
                          legendgroup=lab, showlegend=False, hoverinfo="skip")
            traces.append(kind(**common, line={"color": "rgba(255,255,255,0.9)", "width": 8},
                               **axes))
            traces.append(kind(
                x=m["time"].to_numpy(), y=m["response"].to_numpy(), mode="lines+markers",
                name=f"{look.group_title(lab)} mean", legendgroup=lab, showlegend=False,
                customdata=m["visits"].to_numpy(),
                line={"color": pal.with_alpha(colour, max(strength, 0.35)), "width": 4},
                marker={"size": 6, "color": pal.with_alpha(colour, max(strength, 0.35))},
                hovertemplate=(f"group mean {look.group_title(lab)}<br>%{{x:.1f}} "
                               f"{look.time_unit}: %{{y:.1f}} {look.response_unit}"
                               "<br>%{customdata} visits<extra></extra>"), **axes))
        if hl is not None:
            h = hl_rows[hl_rows["stratum_label"].astype(str) == lab]
            if len(h):
                h = h.sort_values("time")
                traces.append(kind(
                    x=h["time"].to_numpy(), y=h["response"].to_numpy(), mode="lines+markers",
                    customdata=np.full(len(h), hl, dtype=object), name=f"subject {hl}",
                    line={"color": pal.HIGHLIGHT_COLOR, "width": 3.5},
                    marker={"size": 8, "color": pal.HIGHLIGHT_COLOR,
                            "line": {"color": "#ffffff", "width": 1}},
                    hovertemplate=hover, **axes))
    # a legend key for the mean line (drawn in every panel in its group's colour)
    traces.append(go.Scatter(x=[None], y=[None], mode="lines", name="group mean, every subject",
                             line={"color": pal.REFERENCE_COLOR, "width": 4}, hoverinfo="skip"))
    fig = go.Figure(data=traces, layout=layout)
    total = int(subjects_per.sum())
    drawn = int(shown["subject"].nunique())
    _finish(fig, f"{look.response} over time, by {look.stratifier_label}",
            subtitle=(f"thin lines: {drawn:,} of {total:,} subjects drawn · thick line: mean of "
                      f"every subject in the group, {len(set(means['bin'])) if len(means) else 0}"
                      f" time bins"),
            top=104 + 18 * title_lines, bottom=None)
    return fig


def panel_grid(nrow: int, ncol: int, titles, *, horizontal_spacing: float,
               vertical_spacing: float = 0.1, column_widths=None, shared: bool = True,
               x_title: str = "", y_title: str = "",
               title_size: int = PANEL_TITLE_SIZE) -> tuple[dict, list[dict]]:
    """(layout, axes of each panel) of ``nrow`` × ``ncol`` panels filled row by row, each
    titled from ``titles`` above it; columns as wide as ``column_widths`` say (their shares
    of the width left after the spacing; equal by default). ``shared``: every panel on the
    first panel's axes, the time axis titled (``x_title``) under the bottom row and the
    response axis (``y_title``) beside the first column, inner tick labels hidden.

    The layout plotly's ``make_subplots(..., subplot_titles=...)`` builds, written out
    directly: building it through the figure object's update calls cost more than the rest
    of the courses view at a million rows. A panel's axes are ``{"xaxis": "x2", "yaxis":
    "y2"}``, to pass to its traces.
    """
    shares = np.asarray(column_widths if column_widths is not None else [1.0] * ncol, float)
    widths = (1.0 - horizontal_spacing * (ncol - 1)) * shares / shares.sum()
    lefts = np.concatenate(([0.0], np.cumsum(widths + horizontal_spacing)[:-1]))
    h = (1.0 - vertical_spacing * (nrow - 1)) / nrow
    layout: dict = {"annotations": []}
    panels = []
    for i in range(nrow * ncol):
        r, c = divmod(i, ncol)
        n = "" if i == 0 else str(i + 1)
        x0, w = float(lefts[c]), float(widths[c])
        y1 = 1.0 - r * (h + vertical_spacing)
        xa = {"anchor": f"y{n}", "domain": [x0, x0 + w]}
        ya = {"anchor": f"x{n}", "domain": [y1 - h, y1]}
        if shared:
            xa["title"] = {"text": x_title if r == nrow - 1 else ""}
            ya["title"] = {"text": y_title if c == 0 else ""}
            if i:
                xa["matches"], ya["matches"] = "x", "y"
            if r < nrow - 1:
                xa["showticklabels"] = False
            if c > 0:
                ya["showticklabels"] = False
        layout[f"xaxis{n}"], layout[f"yaxis{n}"] = xa, ya
        panels.append({"xaxis": f"x{n}", "yaxis": f"y{n}"})
        if i < len(titles):
            layout["annotations"].append({
                "text": titles[i], "x": x0 + w / 2, "y": y1, "xref": "paper", "yref": "paper",
                "xanchor": "center", "yanchor": "bottom", "showarrow": False,
                "font": {"size": title_size}})
    return layout, panels


# from app/sections/lines.py
#: at most this many subjects get their id as a y tick label in the slope-interval view
MAX_SUBJECT_TICKS = 40


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
    reference_line(fig, x=0, line={"color": pal.REFERENCE_COLOR, "width": 1.5, "dash": "dot"})
    _finish(fig, "Each subject's slope with its 95% interval", subtitle=" · ".join(notes),
            bottom=None, left=tick_label_left(yaxis["ticktext"], least=110))
    fig.update_xaxes(title_text=look.slope_label, range=xr)
    fig.update_yaxes(title_text=f"subjects, grouped by {look.stratifier}", autorange="reversed",
                     showgrid=False, zeroline=False, **yaxis)
    return fig


# from app/sections/rate.py
#: the two rate-of-change plots sit side by side: room above for title + subtitle,
#: and on the left for a two-line slope axis title
RATE_TOP = 96


RATE_LEFT = 96


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
            top=RATE_TOP, bottom=None, left=RATE_LEFT, width=HALF_FIGURE_PX)
    reference_line(fig, y=0, line={"color": pal.REFERENCE_COLOR, "width": 1.2, "dash": "dot"})
    fig.update_xaxes(title_text=xt, type="log" if log_axis else "linear",
                     **(_log_ticks(df["covariate"].to_numpy(float)) if log_axis else {}))
    fig.update_yaxes(title_text=look.slope_label_wrapped, range=yr)
    return fig


def _log_ticks(values: np.ndarray) -> dict:
    """1-2-5 tick values covering positive ``values``, written as plain numbers."""
    v = values[np.isfinite(values) & (values > 0)]
    if v.size == 0:
        return {}
    lo, hi = np.floor(np.log10(v.min())), np.ceil(np.log10(v.max()))
    ticks = (np.array([1.0, 2.0, 5.0])[None, :] * 10.0 ** np.arange(lo, hi + 1)[:, None]).ravel()
    ticks = ticks[(ticks >= v.min() / 1.5) & (ticks <= v.max() * 1.5)]
    return {"tickvals": ticks.tolist(), "ticktext": [f"{t:g}" for t in ticks]}


# from app/sections/followup.py
#: above this many retention steps per cohort, each Kaplan–Meier curve is read on a time grid
STEP_POINTS = 400


def dropout_figure(dropout, *, look: CohortLook, highlight_stratum=None) -> go.Figure:
    """Left: Kaplan–Meier share of each group not yet left, with its 95% band; right: response
    at the last visit of those who left early against those who did not.

    Parameters
    ----------
    dropout : analysis.exploration.summaries.Dropout
        Reads ``horizon``, ``classified``, ``counts``, ``retention`` (stratum, label, time,
        retained, lo, hi, at_risk, left) and ``by_stratum`` (label, followup, n, mean, sd).
        When ``classified`` is false the left panel shows the share with a visit at or after
        each time and says that leaving cannot be told from the end of the data.
    """
    unit = look.time_unit
    h_text = dropout.horizon_text(unit)
    left_title = ("Not yet left (Kaplan–Meier)" if dropout.classified
                  else "Seen at or after each time")
    # the right panel's group names sit between the panels: the gap is made wide enough
    # for the longest (on a full-width figure at a 1,280 px page)
    groups = list(dict.fromkeys(dropout.by_stratum["label"].astype(str)))
    ticks = [look.group_title(s) for s in groups]
    gap = (TICK_CHAR_PX * max((len(t) for t in ticks), default=0) + 30) / (FULL_PLOT_PX)
    layout, (left, right) = panel_grid(1, 2, (left_title, f"{look.response} at the last visit"),
                                       column_widths=[0.62, 0.38], shared=False, title_size=15,
                                       horizontal_spacing=min(0.4, max(0.22, gap)))
    traces = []
    ret = dropout.retention
    if len(ret) > STEP_POINTS:   # a large cohort: each curve read on a time grid (same curve there)
        ret = ret.iloc[thin_steps(ret["time"], ret["label"], n_points=STEP_POINTS)]
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
        traces.append(go.Scatter(x=x, y=r["hi"].to_numpy(float), mode="lines",
                                 line={"shape": "hv", "width": 0}, legendgroup=lab,
                                 showlegend=False, hoverinfo="skip", **left))
        traces.append(go.Scatter(x=x, y=r["lo"].to_numpy(float), mode="lines",
                                 line={"shape": "hv", "width": 0}, fill="tonexty",
                                 fillcolor=pal.with_alpha(colour, (0.10 if overall else 0.16)
                                                          * strength),
                                 legendgroup=lab, showlegend=False, hoverinfo="skip", **left))
        traces.append(go.Scatter(
            x=x, y=r["retained"].to_numpy(float), mode="lines", name=name, legendgroup=lab,
            line={"shape": "hv", "width": 3 if strength == 1 and not overall else 2,
                  "color": pal.with_alpha(colour, strength),
                  "dash": "dash" if overall else "solid"},
            customdata=np.c_[r["lo"].to_numpy(float), r["hi"].to_numpy(float),
                             r["at_risk"].to_numpy()],
            hovertemplate=(f"{name}<br>%{{x:.1f}} {unit}: %{{y:.1%}} "
                           + ("not yet left" if dropout.classified else "seen at or after")
                           + " (95% band %{customdata[0]:.1%} to %{customdata[1]:.1%})"
                           "<br>%{customdata[2]} at risk<extra></extra>"), **left))
    if dropout.classified:  # without statuses the horizon judges nothing
        layout["shapes"] = [{"type": "line", "x0": dropout.horizon, "x1": dropout.horizon,
                             "xref": "x", "y0": 0, "y1": 1, "yref": "y domain",
                             "line": {"color": pal.REFERENCE_COLOR, "dash": "dot",
                                      "width": 1.5}}]
        layout["annotations"].append({
            "x": dropout.horizon, "y": 1.0, "xref": "x", "yref": "y", "showarrow": False,
            "xanchor": "right", "yanchor": "bottom", "text": f"horizon {h_text}",
            "font": {"size": 13, "color": pal.REFERENCE_COLOR}})
    # right: mean response at the last visit ± 95% interval, one row per group
    tab = dropout.by_stratum
    ypos = {lab: i for i, lab in enumerate(groups)}
    shapes = ({FOLLOWED: ("circle", -0.17), LEFT_EARLY: ("diamond-open", 0.17)}
              if dropout.classified else {LAST_VISIT: ("circle", 0.0)})
    for group, (symbol, shift) in shapes.items():
        g = tab[(tab["followup"] == group) & (tab["n"] > 0)]
        labs = g["label"].astype(str).to_numpy()
        half = mean_interval_halfwidth(g["sd"], g["n"])
        colours = [pal.REFERENCE_COLOR if lab == ALL_LABEL else look.colour(lab) for lab in labs]
        opac = [1.0 if lab == ALL_LABEL else _strength(look, lab, highlight_stratum)
                for lab in labs]
        if dropout.classified:  # legend key in neutral grey (the points carry the group colour)
            traces.append(go.Scatter(x=[None], y=[None], mode="markers", name=group,
                                     legendgroup=group, hoverinfo="skip",
                                     marker={"symbol": symbol, "size": 12,
                                             "color": pal.REFERENCE_COLOR,
                                             "line": {"width": 2.5,
                                                      "color": pal.REFERENCE_COLOR}}, **right))
        traces.append(go.Scatter(
            x=g["mean"].to_numpy(), y=[ypos[lab] + shift for lab in labs], mode="markers",
            name=group, legendgroup=group, showlegend=False,
            marker={"symbol": symbol, "size": 12, "color": colours, "opacity": opac,
                    "line": {"width": 2.5, "color": colours}},
            error_x={"type": "data", "array": np.nan_to_num(half), "color": "#7b8590",
                     "thickness": 1.5, "width": 4},
            customdata=np.c_[labs.astype(object), g["n"].to_numpy(), g["sd"].to_numpy()],
            hovertemplate=(f"%{{customdata[0]}}, {group}<br>mean %{{x:.1f}} "
                           f"{look.response_unit}<br>sd %{{customdata[2]:.1f}}, "
                           "%{customdata[1]} subjects<extra></extra>"), **right))
    if dropout.classified:
        c = dropout.counts
        subtitle = (f"{c['left_early']:,} left before {h_text} · {c['censored']:,} had not "
                    f"reached it when the data end · {c['complete']:,} followed to {h_text}")
    else:
        subtitle = ("Leaving early cannot be told apart from the end of the data "
                    "(no calendar dates or follow-up end column)")
    lo_min = float(np.nanmin(ret["lo"])) if len(ret) else 0.0
    unit_note = f"<br>({look.response_unit})" if look.response_unit else ""
    layout["xaxis"].update(title={"text": look.time_label}, rangemode="tozero")
    layout["yaxis"].update(title={"text": "share not yet left" if dropout.classified
                                  else "share seen at or after"},
                           tickformat=".0%", range=[max(0.0, lo_min - 0.04), 1.03])
    layout["xaxis2"].update(title={"text": f"mean ± 95% interval{unit_note}"})
    layout["yaxis2"].update(tickvals=list(ypos.values()),
                            ticktext=ticks, autorange="reversed",
                            showgrid=False, zeroline=False, title={"text": ""})
    fig = go.Figure(data=traces, layout=layout)
    _finish(fig, "Loss to follow-up, by group", subtitle=subtitle, bottom=None, top=100,
            axis_block=x_axis_block(["<br>" if unit_note else ""]))
    return fig


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
    """Positions of ``highlight_subject``'s rows in ``frame`` (none when it is None)."""
    if highlight_subject is None:
        return np.empty(0, dtype=int)
    return np.flatnonzero(_is_subject(frame["subject"], str(highlight_subject)))


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
    reference_line(fig, y=0, line={"color": pal.REFERENCE_COLOR, "width": 1.2})
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
    """The power curve as an HTML snippet for the report (the library is inlined once)."""
    return report_html(power_figure(made), height=420)


__all__ = [
    "CohortLook", "cohort_look", "empty_figure", "colour_alpha", "variogram_figure",
    "fitted_variogram_figure", "report_figures", "OVERLAY_CAPTION", "power_figure",
    "report_plan_figure",
]
