"""Rate of change vs covariate: per-subject slopes by group and against the covariate, and the
group summary table."""
from __future__ import annotations

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from dash import Output, State, dash_table, html

from analysis.exploration.summaries import stratum_column_labels
from analysis.numbers import fmt, interval

from .. import ids
from .. import palette as pal
from ..components import graph, message, section
from ..figures import (CohortLook, _finish, _parenthesis, _present_strata, _robust_range,
                       _strength, cohort_look)
from ..figures import (RATE_LEFT, RATE_TOP,  # noqa: F401  (Dash-free: the report draws it too)
                       slope_vs_covariate_figure)
from ..figures import HALF_FIGURE_PX, category_ticks, reference_line, x_axis_block
from ..digest_figures import box_figure, cell_click_members, density_figure, summarised
from ..session import AppContext
from ..text import short
from ..views import (HIGHLIGHT, stage_stores, finish, register_members, render_key, skip_if_same,
                     summary_inputs)

ANCHOR = "section-rate"
NAV = "Rate of change vs covariate"
#: the group table's first-read columns (group, subjects, median slope, its interval)
RATE_TABLE_MAIN = "rate-table-main"


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
                   # the columns a clinician reads first; every column folded below
                   dash_table.DataTable(id=RATE_TABLE_MAIN, style_as_list_view=True,
                                        style_cell={"fontFamily": "inherit", "fontSize": "15px",
                                                    "padding": "4px 10px"},
                                        style_header={"fontWeight": "600"}),
                   html.Details(className="cl-fold", children=[
                       html.Summary("All columns: covariate range, visits, slope quartiles"),
                       dash_table.DataTable(id=ids.RATE_TABLE, style_as_list_view=True,
                                            merge_duplicate_headers=True,
                                            style_cell={"fontFamily": "inherit",
                                                        "fontSize": "15px",
                                                        "padding": "4px 10px"},
                                            style_header={"fontWeight": "600"})]))


def register(app, context: AppContext) -> None:
    @app.callback(Output(ids.RATE_STRATA_GRAPH, "figure"), Output(ids.RATE_COVARIATE_GRAPH, "figure"),
                  Output(ids.RATE_TABLE, "data"), Output(ids.RATE_TABLE, "columns"),
                  Output(RATE_TABLE_MAIN, "data"), Output(RATE_TABLE_MAIN, "columns"),
                  Output(ids.RATE_MSG, "children"), Output(ids.VIEW_RENDERED["rate"], "data"),
                  *stage_stores("summaries"), *HIGHLIGHT, State(ids.VIEW_RENDERED["rate"], "data"))
    def rate(data, roles, settings, _stage_key, subject, stratum, last):
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
                        columns, *first_read_table(summ.stratum_table, cohort))
            return (slopes_by_stratum_figure(frame, look=look, highlight_subject=subject,
                                             highlight_stratum=stratum),
                    slope_vs_covariate_figure(frame, summ.slope_smooth, look=look,
                                              highlight_subject=subject,
                                              highlight_stratum=stratum),
                    table.astype(object).where(table.notna(), None).to_dict("records"),
                    columns, *first_read_table(summ.stratum_table, cohort))

        return finish(make, "summarising rates of change", key,
                      ("fig", "fig", "list", "list", "list", "list"))

    def cell(lines, look, click):
        got = cell_click_members(lines, look, click)
        if got is None:
            return None
        m, subjects, (x0, x1, y0, y1) = got
        return f"Cell {x0:.3g}–{x1:.3g} × slope {y0:.3g} to {y1:.3g}", m.total, subjects

    register_members(app, context, output=ids.RATE_MEMBERS, graph=ids.RATE_COVARIATE_GRAPH,
                     describe=cell, what="listing the subjects of the cell")


def first_read_table(table: pd.DataFrame, cohort) -> tuple[list[dict], list[dict]]:
    """Rows and columns of the short group table: group, subjects, the median subject slope
    and its distribution-free 95% confidence interval (display text, true minus)."""
    unit = cohort.settings.unit
    per = f"per {unit[:-1] if unit.endswith('s') else unit}"
    rows = []
    for _, r in table.iterrows():
        rows.append({"label": str(r.get("label", "")),
                     "subjects": fmt(r.get("subjects")),
                     "slope_median": fmt(r.get("slope_median"), 3),
                     "slope_range": interval(r.get("slope_median_lo"), r.get("slope_median_hi"),
                                             3)})
    columns = [{"name": "group", "id": "label"}, {"name": "subjects", "id": "subjects"},
               {"name": f"median slope ({per})", "id": "slope_median"},
               {"name": "95% CI of the median (order statistics)", "id": "slope_range"}]
    return rows, columns


def rate_table_columns(present, cohort) -> list[dict]:
    """Two-row headers for the group summary table (the internal group code is left out)."""
    labels = stratum_column_labels(short(cohort.roles.label(cohort.covariate) or "covariate"),
                                   cohort.settings.unit)
    have = set(present)
    return [{"name": list(pair), "id": col} for col, pair in labels.items() if col in have]


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
    # ticks: the bare group ranges, kept horizontal; the covariate and its unit are in
    # the axis title
    ticks = category_ticks(labels)
    _finish(fig, f"Subject slopes by {look.stratifier}",
            subtitle=(f"axis cut at the 1st–99th percentile; {outside} outside" if yr else
                      "box: quartiles and median · points: subjects"),
            top=RATE_TOP, bottom=None, left=RATE_LEFT, width=HALF_FIGURE_PX,
            axis_block=x_axis_block(ticks))
    reference_line(fig, y=0, line={"color": pal.REFERENCE_COLOR, "width": 1.2, "dash": "dot"})
    fig.update_xaxes(title_text=f"{look.stratifier} group{_parenthesis(look.stratifier_unit.strip())}",
                     type="category",
                     tickangle=0, tickvals=labels, ticktext=ticks)
    fig.update_yaxes(title_text=look.slope_label_wrapped, range=yr)
    fig.update_layout(showlegend=True)
    return fig


