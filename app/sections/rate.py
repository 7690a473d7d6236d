"""Rate of change vs covariate: per-subject slopes by group and against the covariate, and the
group summary table."""
from __future__ import annotations

import textwrap
from typing import Sequence

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from dash import Input, Output, State, dash_table, html

from .. import ids
from .. import palette as pal
from ..components import graph, message, section
from ..figures import (GL_POINTS, CohortLook, _finish, _parenthesis, _plural, _present_strata,
                       _robust_range, _strength, cohort_look, colour_alpha, empty_figure)
from ..digest_figures import (box_figure, cell_click_members, density_figure, members_note,
                              summarised)
from ..session import AppContext, attempt
from ..text import short
from ..views import HIGHLIGHT, STORES, finish, render_key, skip_if_same, stage_call, summary_inputs

ANCHOR = "section-rate"
NAV = "Rate of change vs covariate"


def layout(settings=None, max_upload_bytes=None):
    return section(ANCHOR, "Rate of change and the baseline covariate",
                   "Per-subject slopes by group, and against the covariate with a lowess "
                   "smooth. A first look only: the model section gives the adjusted answer.",
                   message(ids.RATE_MSG),
                   html.Div(className="cl-two", children=[
                       graph(ids.RATE_STRATA_GRAPH, 440),
                       graph(ids.RATE_COVARIATE_GRAPH, 440),
                   ]),
                   html.Div(id=ids.RATE_MEMBERS),
                   dash_table.DataTable(id=ids.RATE_TABLE, style_as_list_view=True,
                                        merge_duplicate_headers=True,
                                        style_cell={"fontFamily": "inherit", "fontSize": "15px",
                                                    "padding": "4px 10px"},
                                        style_header={"fontWeight": "600"}))


def register(app, context: AppContext) -> None:
    @app.callback(Output(ids.RATE_STRATA_GRAPH, "figure"), Output(ids.RATE_COVARIATE_GRAPH, "figure"),
                  Output(ids.RATE_TABLE, "data"), Output(ids.RATE_TABLE, "columns"),
                  Output(ids.RATE_MSG, "children"), Output(ids.VIEW_RENDERED["rate"], "data"),
                  *STORES, *HIGHLIGHT, State(ids.VIEW_RENDERED["rate"], "data"))
    def rate(data, roles, settings, subject, stratum, last):
        key = render_key(context, "summaries", data, roles, settings, subject, stratum)
        skip_if_same(key, last)

        def make():
            frame, summ, cohort = summary_inputs(context, data, roles, settings)
            table = summ.stratum_table.round(3)
            columns = rate_table_columns(table.columns, cohort)
            table = table[[c["id"] for c in columns]]
            look = cohort_look(cohort)
            if summarised(frame):
                return (box_figure(frame, look=look, highlight_subject=subject,
                                   highlight_stratum=stratum),
                        density_figure(frame, summ.slope_smooth, look=look,
                                       highlight_subject=subject),
                        table.astype(object).where(table.notna(), None).to_dict("records"),
                        columns)
            return (slopes_by_stratum_figure(frame, look=look, highlight_subject=subject,
                                             highlight_stratum=stratum),
                    slope_vs_covariate_figure(frame, summ.slope_smooth, look=look,
                                              highlight_subject=subject,
                                              highlight_stratum=stratum),
                    table.astype(object).where(table.notna(), None).to_dict("records"),
                    columns)

        return finish(make, "summarising rates of change", key, ("fig", "fig", "list", "list"))

    @app.callback(Output(ids.RATE_MEMBERS, "children"),
                  Input(ids.RATE_COVARIATE_GRAPH, "clickData"),
                  *(State(i.component_id, i.component_property) for i in STORES),
                  prevent_initial_call=True)
    def cell_members(click, data, roles, settings):
        def make():
            frame = stage_call(context, "subject_lines", data, roles, settings)
            if not summarised(frame):
                return ""
            got = cell_click_members(frame, cohort_look(
                stage_call(context, "cohort", data, roles, settings)), click)
            if got is None:
                return ""
            m, subjects, (x0, x1, y0, y1) = got
            return members_note(f"Cell {x0:.3g}–{x1:.3g} × slope {y0:.3g} to {y1:.3g}",
                                m.total, subjects)

        value, text, _ = attempt(make, what="listing the subjects of the cell")
        return value if value is not None else text


def rate_table_columns(present, cohort) -> list[dict]:
    """Two-row headers for the group summary table (the internal group code is left out)."""
    cov = short(cohort.covariate or "covariate")
    unit = cohort.settings.unit
    per = f"slope per {unit[:-1] if unit.endswith('s') else unit}"
    spec = [
        ("label", ("", "group")), ("subjects", ("", "subjects")), ("observations", ("", "visits")),
        ("cov_min", (cov, "min")), ("cov_q1", (cov, "lower quartile")),
        ("cov_median", (cov, "median")), ("cov_q3", (cov, "upper quartile")),
        ("cov_max", (cov, "max")),
        ("visits_mean", ("visits per subject", "mean")),
        ("visits_median", ("visits per subject", "median")),
        ("visits_min", ("visits per subject", "min")), ("visits_max", ("visits per subject", "max")),
        ("slope_q1", (per, "lower quartile")), ("slope_median", (per, "median")),
        ("slope_q3", (per, "upper quartile")), ("slope_n", (per, "subjects with one")),
    ]
    have = set(present)
    return [{"name": list(name), "id": col} for col, name in spec if col in have]


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


def _log_ticks(values: np.ndarray) -> dict:
    """1-2-5 tick values covering positive ``values``, written as plain numbers."""
    v = values[np.isfinite(values) & (values > 0)]
    if v.size == 0:
        return {}
    lo, hi = np.floor(np.log10(v.min())), np.ceil(np.log10(v.max()))
    ticks = (np.array([1.0, 2.0, 5.0])[None, :] * 10.0 ** np.arange(lo, hi + 1)[:, None]).ravel()
    ticks = ticks[(ticks >= v.min() / 1.5) & (ticks <= v.max() * 1.5)]
    return {"tickvals": ticks.tolist(), "ticktext": [f"{t:g}" for t in ticks]}
