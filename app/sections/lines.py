"""Subject lines: each subject's least-squares slope with its 95% interval, grouped by group."""
from __future__ import annotations

from typing import Sequence

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from dash import Input, Output, State, dcc, html

from .. import ids
from .. import palette as pal
from ..components import graph, message, section
from ..figures import CohortLook, _finish, _plural, _robust_range, _rows_to_segments, _strength, \
    cohort_look
from ..digest_figures import band_click_members, bands_figure, members_note, summarised
from ..session import AppContext, attempt
from ..text import short
from ..urlstate import LINE_ORDERS, VIEW_DEFAULTS
from ..views import HIGHLIGHT, STORES, finish, render_key, skip_if_same, stage_call

ANCHOR = "section-lines"
NAV = "Subject lines"
#: at most this many subjects get their id as a y tick label in the slope-interval view
MAX_SUBJECT_TICKS = 40


def layout(settings=None, max_upload_bytes=None):
    return section(ANCHOR, "Each subject's own straight line",
                   "Least-squares intercept and slope per subject with 95% intervals "
                   "(subjects with two visits have no interval).",
                   html.Div(className="cl-view-controls", children=[
                       html.Label("Order subjects by", className="cl-label"),
                       dcc.RadioItems(id=ids.LINES_ORDER, inline=True, className="cl-radio",
                                      value=VIEW_DEFAULTS["order"],
                                      options=[{"label": o, "value": o} for o in LINE_ORDERS]),
                   ]),
                   message(ids.LINES_MSG),
                   graph(ids.LINES_GRAPH, 620),
                   html.Div(id=ids.LINES_MEMBERS))


def register(app, context: AppContext) -> None:
    @app.callback(Output(ids.LINES_GRAPH, "figure"), Output(ids.LINES_MSG, "children"),
                  Output(ids.VIEW_RENDERED["lines"], "data"),
                  *STORES, *HIGHLIGHT, Input(ids.LINES_ORDER, "value"),
                  State(ids.VIEW_RENDERED["lines"], "data"))
    def lines(data, roles, settings, subject, stratum, order, last):
        order = order or "slope"
        key = render_key(context, "cohort", data, roles, settings, subject, stratum, order)
        skip_if_same(key, last)

        def make():
            frame = stage_call(context, "subject_lines", data, roles, settings)
            cohort = stage_call(context, "cohort", data, roles, settings)
            if summarised(frame):
                return (bands_figure(frame, look=cohort_look(cohort), highlight_subject=subject,
                                     highlight_stratum=stratum),)
            return (intervals_figure(frame, look=cohort_look(cohort), order=order,
                                     highlight_subject=subject, highlight_stratum=stratum),)

        return finish(make, "drawing subject lines", key, ("fig",))

    @app.callback(Output(ids.LINES_MEMBERS, "children"), Input(ids.LINES_GRAPH, "clickData"),
                  *(State(i.component_id, i.component_property) for i in STORES),
                  prevent_initial_call=True)
    def band_members(click, data, roles, settings):
        def make():
            frame = stage_call(context, "subject_lines", data, roles, settings)
            if not summarised(frame):
                return ""
            got = band_click_members(frame, cohort_look(
                stage_call(context, "cohort", data, roles, settings)), click)
            if got is None:
                return ""
            lab, (lo, hi), m, subjects = got
            return members_note(f"Group {short(lab)}, {lo:g}th–{hi:g}th percentile of slope",
                                m.total, subjects)

        value, text, _ = attempt(make, what="listing the subjects of the band")
        return value if value is not None else text


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
