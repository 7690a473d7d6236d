"""Subject lines: each subject's least-squares slope with its 95% interval, grouped by group."""
from __future__ import annotations

from dash import Input, Output, State, dcc, html

from .. import ids
from ..components import graph, message, section
from ..figures import cohort_look
from ..figures import intervals_figure  # noqa: F401  (Dash-free: the report draws it too)
from ..digest_figures import band_click_members, bands_figure, summarised
from ..session import AppContext
from ..text import short
from ..urlstate import LINE_ORDERS, VIEW_DEFAULTS
from ..views import (HIGHLIGHT, stage_stores, finish, register_members, render_key, skip_if_same,
                     stage_call)

ANCHOR = "section-lines"
NAV = "Subject lines"


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
                  *stage_stores("cohort"), *HIGHLIGHT, Input(ids.LINES_ORDER, "value"),
                  State(ids.VIEW_RENDERED["lines"], "data"))
    def lines(data, roles, settings, _stage_key, subject, stratum, order, last):
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

    def band(lines, look, click):
        got = band_click_members(lines, look, click)
        if got is None:
            return None
        lab, (lo, hi), m, subjects = got
        return (f"Group {short(lab)}, {lo:g}th–{hi:g}th percentile of slope", m.total, subjects)

    register_members(app, context, output=ids.LINES_MEMBERS, graph=ids.LINES_GRAPH,
                     describe=band, what="listing the subjects of the band")


