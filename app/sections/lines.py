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
from ..figures import (MAX_SUBJECT_TICKS, ORDER_COLUMNS, interval_layout,  # noqa: F401  (Dash-free:
                       intervals_figure)                                    # the report draws it too)
from ..digest_figures import band_click_members, bands_figure, members_note, summarised
from ..session import AppContext, attempt
from ..text import short
from ..urlstate import LINE_ORDERS, VIEW_DEFAULTS
from ..views import HIGHLIGHT, STORES, finish, render_key, skip_if_same, stage_call

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


