"""Follow-up & loss: visits per subject, the Kaplan–Meier share not yet left and the response at
the last visit (the statistics come from :mod:`analysis.exploration.summaries`)."""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from dash import Output, State, html, no_update
from plotly.subplots import make_subplots

from analysis.exploration.summaries import (ALL_LABEL, BAND_METHOD, FOLLOWED, LAST_VISIT, LEFT_EARLY,
                                mean_interval_halfwidth, visit_counts)

from analysis.exploration.digest import thin_steps

from .. import ids
from .. import palette as pal
from ..components import graph, message, section
from ..figures import CohortLook, _finish, _plural, _strength, cohort_look, colour_alpha
from ..session import AppContext
from ..views import HIGHLIGHT, STORES, finish, render_key, skip_if_same, summary_inputs

#: most points of one Kaplan–Meier curve sent to the page (see analysis.exploration.digest)
STEP_POINTS = 400

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
                  *STORES, *HIGHLIGHT, State(ids.VIEW_RENDERED["follow"], "data"))
    def follow(data, roles, settings, subject, stratum, last):
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
    fig = make_subplots(rows=1, cols=2, column_widths=[0.62, 0.38], horizontal_spacing=0.22,
                        subplot_titles=(left_title, f"{look.response} at the last visit"))
    for ann in fig.layout.annotations:
        ann.font = {"size": 15}
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
        fig.add_trace(go.Scatter(x=x, y=r["hi"].to_numpy(float), mode="lines",
                                 line={"shape": "hv", "width": 0}, legendgroup=lab,
                                 showlegend=False, hoverinfo="skip"), row=1, col=1)
        fig.add_trace(go.Scatter(x=x, y=r["lo"].to_numpy(float), mode="lines",
                                 line={"shape": "hv", "width": 0}, fill="tonexty",
                                 fillcolor=pal.with_alpha(colour, (0.10 if overall else 0.16)
                                                          * strength),
                                 legendgroup=lab, showlegend=False, hoverinfo="skip"),
                      row=1, col=1)
        fig.add_trace(go.Scatter(
            x=x, y=r["retained"].to_numpy(float), mode="lines", name=name, legendgroup=lab,
            line={"shape": "hv", "width": 3 if strength == 1 and not overall else 2,
                  "color": pal.with_alpha(colour, strength),
                  "dash": "dash" if overall else "solid"},
            customdata=np.c_[r["lo"].to_numpy(float), r["hi"].to_numpy(float),
                             r["at_risk"].to_numpy()],
            hovertemplate=(f"{name}<br>%{{x:.1f}} {unit}: %{{y:.1%}} "
                           + ("not yet left" if dropout.classified else "seen at or after")
                           + " (95% band %{customdata[0]:.1%} to %{customdata[1]:.1%})"
                           "<br>%{customdata[2]} at risk<extra></extra>")), row=1, col=1)
    if dropout.classified:  # without statuses the horizon judges nothing
        fig.add_vline(x=dropout.horizon, line={"color": pal.REFERENCE_COLOR, "dash": "dot",
                                               "width": 1.5}, row=1, col=1)
        fig.add_annotation(x=dropout.horizon, y=1.0, xref="x", yref="y", showarrow=False,
                           xanchor="right", yanchor="bottom", text=f"horizon {h_text}",
                           font={"size": 13, "color": pal.REFERENCE_COLOR})
    # right: mean response at the last visit ± 95% interval, one row per group
    tab = dropout.by_stratum
    groups = list(dict.fromkeys(tab["label"].astype(str)))
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
            fig.add_trace(go.Scatter(x=[None], y=[None], mode="markers", name=group,
                                     legendgroup=group, hoverinfo="skip",
                                     marker={"symbol": symbol, "size": 12,
                                             "color": pal.REFERENCE_COLOR,
                                             "line": {"width": 2.5,
                                                      "color": pal.REFERENCE_COLOR}}),
                          row=1, col=2)
        fig.add_trace(go.Scatter(
            x=g["mean"].to_numpy(), y=[ypos[lab] + shift for lab in labs], mode="markers",
            name=group, legendgroup=group, showlegend=False,
            marker={"symbol": symbol, "size": 12, "color": colours, "opacity": opac,
                    "line": {"width": 2.5, "color": colours}},
            error_x={"type": "data", "array": np.nan_to_num(half), "color": "#7b8590",
                     "thickness": 1.5, "width": 4},
            customdata=np.c_[labs.astype(object), g["n"].to_numpy(), g["sd"].to_numpy()],
            hovertemplate=(f"%{{customdata[0]}}, {group}<br>mean %{{x:.1f}} "
                           f"{look.response_unit}<br>sd %{{customdata[2]:.1f}}, "
                           "%{customdata[1]} subjects<extra></extra>")), row=1, col=2)
    if dropout.classified:
        c = dropout.counts
        subtitle = (f"{c['left_early']:,} left before {h_text} · {c['censored']:,} had not "
                    f"reached it when the data end · {c['complete']:,} followed to {h_text}")
    else:
        subtitle = ("Leaving early cannot be told apart from the end of the data "
                    "(no calendar dates or follow-up end column)")
    _finish(fig, "Loss to follow-up, by group", subtitle=subtitle, bottom=130, top=100)
    lo_min = float(np.nanmin(ret["lo"])) if len(ret) else 0.0
    fig.update_xaxes(title_text=look.time_label, row=1, col=1, rangemode="tozero")
    fig.update_yaxes(title_text=("share not yet left" if dropout.classified
                                 else "share seen at or after"),
                     tickformat=".0%", range=[max(0.0, lo_min - 0.04), 1.03], row=1, col=1)
    fig.update_xaxes(title_text=f"mean ± 95% interval{' (' + look.response_unit + ')' if look.response_unit else ''}",
                     row=1, col=2)
    fig.update_yaxes(tickvals=list(ypos.values()),
                     ticktext=[look.group_title(s) for s in ypos], autorange="reversed",
                     row=1, col=2, showgrid=False, zeroline=False, title_text="")
    return fig
