"""The sticky groups bar: group chips, the clear button and the followed subject's card.

Not a numbered section (no entry in the page's navigation)."""
from __future__ import annotations

import numpy as np
import pandas as pd
from dash import Input, Output, dash_table, dcc, html

from analysis.numbers import fmt, signed_term

from .. import ids
from ..components import busy
from ..figures import cohort_look
from ..session import AppContext, attempt
from ..text import short
from ..views import on_cluster, stage_call, stage_stores

ANCHOR = None
NAV = None


def layout(settings=None, max_upload_bytes=None):
    """The compact sticky groups bar: chips and clear button on one line, then the hint
    (beside them when there is room) or the followed subject's card."""
    hint = "Click a subject in any view to follow it everywhere."
    return html.Div(className="cl-selection", title=hint, children=[
        html.Div(className="cl-selection-row", children=[
            html.Span("Groups:", className="cl-label",
                      title="Choose a group to highlight it in every view"),
            dcc.RadioItems(id=ids.LINK_STRATA, options=[], value=None, className="cl-chips",
                           inline=True),
            html.Button("Clear highlight", id=ids.LINK_CLEAR, className="cl-btn cl-btn-quiet",
                        title="Clear the highlighted group and subject"),
            html.Div(className="cl-card-slot", children=busy(
                html.Div(id=ids.LINK_CARD, className="cl-card",
                         children=html.Span(hint, className="cl-hint")))),
        ]),
    ])


def register(app, context: AppContext) -> None:
    @app.callback(Output(ids.LINK_CARD, "children"), *stage_stores("cohort"),
                  Input(ids.STORE_SUBJECT, "data"))
    def subject_card(data, roles, settings, _stage_key, subject):
        if not subject:
            return html.Span("Click a subject in any view to follow it everywhere.",
                             className="cl-hint")
        card, message, _ = attempt(lambda: _card(context, data, roles, settings, subject),
                                   what="describing the selected subject")
        return card if card is not None else html.Span(message, className="cl-msg")


def _card(context, data, roles, settings, subject):
    cohort = stage_call(context, "cohort", data, roles, settings)
    lines = stage_call(context, "subject_lines", data, roles, settings)
    # the subject's visits straight from the panel (no table of every visit is built)
    code = np.flatnonzero(np.asarray(cohort.subject_ids).astype(str) == str(subject))
    dataset, r, s = context.inputs(data, roles, settings)
    if on_cluster(context, dataset):
        # serve --engine dask: this subject's visits fetched from the worker holding them
        mine = (context.workbench.subject_visits(dataset, r, s, subject) if code.size
                else pd.DataFrame({"time": [], "response": []}))
    else:
        p = cohort.panel
        rows = (slice(int(p.starts[code[0]]), int(p.starts[code[0]] + p.counts[code[0]]))
                if code.size else slice(0, 0))
        mine = pd.DataFrame({"time": p.time[rows], "response": p.y[rows]})
    row = lines[lines["subject"].astype(str) == str(subject)]
    if mine.empty or row.empty:
        return html.Span(f"Subject {subject} is not in the analysed cohort with these choices.",
                         className="cl-hint")
    r = row.iloc[0]
    se = f" (SE {fmt(r['slope_se'], 3)})" if "slope_se" in row.columns else ""
    cov = cohort.covariate
    look = cohort_look(cohort)
    head = html.Div(className="cl-card-head", children=[
        html.Strong(f"Subject {short(subject)}"),
        html.Details(className="cl-card-visits-toggle", children=[
            html.Summary(f"{len(mine)} visits", title="show this subject's visits"),
            html.Div(visits_table(mine, cohort, look), className="cl-card-visits")]),
        html.Span(f"line: {line_text(r['intercept'], r['slope'])}{se}",
                  title="this subject's own straight line (OLS)"),
        html.Span(f"group {short(r['stratum_label'])}", className="cl-card-line"),
        *([html.Span(f"{short(look.covariate or cov)} {fmt(r['covariate'], 4)}",
                     className="cl-card-line")] if cov else []),
    ])
    return [head]


def line_text(intercept, slope) -> str:
    """"75.2 − 0.113 × time": a straight line with a true minus and never "+ −"."""
    try:
        b = float(slope)
    except (TypeError, ValueError):
        return "—"
    return f"{fmt(intercept, 3)} {signed_term(b, 3)} × time"


def visits_table(mine, cohort, look):
    return dash_table.DataTable(
        data=[{"time": fmt(t, 4), "response": fmt(y, 4)}
              for t, y in zip(mine["time"], mine["response"])],
        columns=[{"name": short(cohort.time_label), "id": "time"},
                 {"name": short(look.response), "id": "response"}],
        fill_width=False,
        style_table={"maxHeight": "13rem", "overflowY": "auto"},
        style_cell={"fontFamily": "inherit", "fontSize": "14px", "padding": "2px 8px"})
