"""Follow-up & loss: visits per subject, the Kaplan–Meier share not yet left and the response at
the last visit (the statistics come from :mod:`analysis.exploration.summaries`)."""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from dash import Output, State, html, no_update

from analysis.exploration.summaries import BAND_METHOD, visit_counts

from .. import ids
from .. import palette as pal
from ..components import graph, message, section
from ..figures import CohortLook, _finish, _plural, _strength, cohort_look, colour_alpha
from ..figures import dropout_figure  # noqa: F401  (Dash-free: the report draws it too)
from ..session import AppContext
from ..views import HIGHLIGHT, stage_stores, finish, render_key, skip_if_same, summary_inputs

ANCHOR = "section-follow"
NAV = "Follow-up & loss"


def layout(settings=None, max_upload_bytes=None):
    return section(ANCHOR, "Visits and loss to follow-up",
                   "How many visits each subject has, and when subjects leave the data, by group.",
                   message(ids.FOLLOW_MSG),
                   graph(ids.FOLLOW_VISITS_GRAPH, 380),
                   graph(ids.FOLLOW_DROPOUT_GRAPH, 500),
                   html.Div(id=ids.FOLLOW_NOTE, className="cl-readout"))


def register(app, context: AppContext) -> None:
    @app.callback(Output(ids.FOLLOW_VISITS_GRAPH, "figure"),
                  Output(ids.FOLLOW_DROPOUT_GRAPH, "figure"), Output(ids.FOLLOW_NOTE, "children"),
                  Output(ids.FOLLOW_MSG, "children"), Output(ids.VIEW_RENDERED["follow"], "data"),
                  *stage_stores("summaries"), *HIGHLIGHT,
                  State(ids.VIEW_RENDERED["follow"], "data"))
    def follow(data, roles, settings, _stage_key, subject, stratum, last):
        # the loss-to-follow-up figure does not show the highlighted subject: when only the
        # subject changed, it is not drawn or sent again
        unchanged = render_key(context, "summaries", data, roles, settings, stratum)
        key = json.dumps([unchanged, subject])
        skip_if_same(key, last)
        same_dropout = isinstance(last, str) and last.startswith(json.dumps([unchanged])[:-1])

        def make():
            frame, summ, cohort = summary_inputs(context, data, roles, settings)
            look = cohort_look(cohort)
            visits = visits_figure(frame, look=look, highlight_subject=subject,
                                   highlight_stratum=stratum)
            if same_dropout:
                return visits, no_update, no_update
            return (visits, dropout_figure(summ.dropout, look=look, highlight_stratum=stratum),
                    dropout_note(summ.dropout, time_unit=cohort.settings.unit))

        return finish(make, "summarising follow-up", key, ("fig", "fig", "list"))


def dropout_note(dropout, *, time_unit: str = "") -> list:
    """The follow-up counts in plain words, the rule behind them and the band's method."""
    out = [html.P([html.Strong("Follow-up: "), dropout.sentence(time_unit)])]
    if dropout.classified:
        out.append(html.P(f"Rule: {dropout.status_rule}. Curves: Kaplan–Meier share not yet "
                          f"left, with a {BAND_METHOD}; leaving counts at the last visit, and "
                          "subjects who did not leave count to their potential follow-up or "
                          "the horizon.", className="cl-caveat"))
    out += [html.P(n, className="cl-caveat") for n in dropout.notes]
    return out


def visits_figure(lines: pd.DataFrame, *, look: CohortLook, highlight_subject=None,
                  highlight_stratum=None) -> go.Figure:
    """How many visits each subject has, bars side by side per group."""
    tab = visit_counts(lines, strata=look.strata)
    fig = go.Figure()
    for lab in tab.columns:
        strength = _strength(look, lab, highlight_stratum)
        fig.add_trace(go.Bar(
            x=tab.index.to_numpy(), y=tab[lab].to_numpy(), name=look.group_title(lab),
            marker={"color": colour_alpha(look, lab, 0.9 * strength)},
            hovertemplate=(f"{look.group_title(lab)}<br>%{{x}} visits: %{{y}} subjects"
                           "<extra></extra>")))
    if highlight_subject is not None:
        h = lines[lines["subject"].astype(str) == str(highlight_subject)]
        if len(h):
            n = int(h["n"].iloc[0])
            fig.add_vline(x=n, line={"color": pal.HIGHLIGHT_COLOR, "width": 2.5, "dash": "dash"},
                          annotation_text=f"subject {highlight_subject}: {n}",
                          annotation_position="top right", annotation_font={"size": 14})
    med = float(np.median(lines["n"])) if len(lines) else float("nan")
    _finish(fig, "Visits per subject",
            subtitle=f"{_plural(len(lines), 'subject')} · median {med:g} visits",
            bottom=105)
    fig.update_layout(barmode="group", bargap=0.15, bargroupgap=0.05)
    fig.update_xaxes(title_text="visits (count)", dtick=1 if len(tab) <= 12 else None)
    fig.update_yaxes(title_text="subjects (count)")
    return fig


