"""Visit-to-visit correlation: residual correlation between time windows, with each cell's
pair count and each window's variance."""
from __future__ import annotations

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from dash import html
from plotly.subplots import make_subplots

from .. import ids
from .. import palette as pal
from ..components import graph, message, section
from ..figures import COLORBAR_RIGHT_PX, CohortLook, _finish, cohort_look
from ..session import AppContext
from ..views import figure_and_note_view, stage_call

ANCHOR = "section-pairs"
NAV = "Visit-to-visit correlation"
#: heatmap cells carry their text only up to this many windows (hover always has it)
MAX_CELL_TEXT = 16


def layout(settings=None, max_upload_bytes=None):
    return section(ANCHOR, "Correlation between a subject's visits",
                   "Residual correlation between visits that fall in two time windows; each "
                   "cell shows how many within-subject pairs it rests on.",
                   message(ids.PAIRS_MSG),
                   graph(ids.PAIRS_GRAPH, 560),
                   html.Div(id=ids.PAIRS_NOTE, className="cl-note"))


def register(app, context: AppContext) -> None:
    def build(data, roles, settings):
        lc = stage_call(context, "lag_correlation", data, roles, settings)
        cohort = stage_call(context, "cohort", data, roles, settings)
        note = (f"Windows {lc.width:g} {cohort.settings.unit} wide. Cells with too few "
                "subjects seen in both windows are left blank.")
        return lag_heatmap_figure(lc, look=cohort_look(cohort)), note

    figure_and_note_view(app, context, view="pairs", stage="lagcorr",
                         graph=ids.PAIRS_GRAPH, note=ids.PAIRS_NOTE, msg=ids.PAIRS_MSG,
                         build=build, what="computing lag correlations")


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
    lc : analysis.exploration.lagcorr.LagCorrelation
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
            bottom=70, left=92, right=COLORBAR_RIGHT_PX)
    fig.update_layout(showlegend=False)
    fig.update_yaxes(title_text=f"window ({unit})", autorange="reversed", row=1, col=1,
                     showgrid=False, ticks="")
    fig.update_xaxes(showgrid=False, row=1, col=1, ticks="")
    fig.update_xaxes(title_text=f"time window ({look.time_label})", row=2, col=1, type="category")
    fig.update_yaxes(title_text=f"variance<br>{look.squared_unit}", row=2, col=1,
                     rangemode="tozero", title_font={"size": 14})
    return fig
