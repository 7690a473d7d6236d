"""View callbacks: read the stores → one Workbench stage → one figure.

Each view remembers the key it was last drawn for (its stage's settings, the
data, roles, highlight and its own controls) and skips the redraw when a change
elsewhere does not concern it, so e.g. new variogram bins redraw only the
semivariogram.
"""
from __future__ import annotations

import json

import numpy as np
from dash import Input, Output, State, html
from dash.exceptions import PreventUpdate

from analysis.pipeline import Workbench
from analysis.settings import json_key

from . import draw, ids
from .session import AppContext, NeedsInput, attempt
from .text import short

STORES = (Input(ids.STORE_DATA, "data"), Input(ids.STORE_ROLES, "data"),
          Input(ids.STORE_SETTINGS, "data"))
HIGHLIGHT = (Input(ids.STORE_SUBJECT, "data"), Input(ids.LINK_STRATA, "value"))


def render_key(context: AppContext, stage: str, data, roles, settings, *extra) -> str:
    """What a view's picture depends on: data key, roles, its stage's settings and extras."""
    try:
        dataset, r, s = context.inputs(data, roles, settings)
    except Exception:  # noqa: BLE001 - an unusable input is itself part of the key
        return "unusable:" + json.dumps([data, roles, settings, extra], default=str)
    d = s.to_dict()
    sub = {k: d[k] for k in Workbench.stage_fields(stage, s)}
    return json_key([dataset.key, r.to_dict(), stage, sub, extra])


def _skip_if_same(key: str, last: str | None) -> None:
    if key == last:
        raise PreventUpdate


def _stage_call(context, name, data, roles, settings):
    dataset, r, s = context.inputs(data, roles, settings)
    return getattr(context.workbench, name)(dataset, r, s)


def register(app, context: AppContext) -> None:
    wb_call = lambda name, *stores: _stage_call(context, name, *stores)  # noqa: E731

    # -------------------------------------------------------------- courses over time
    @app.callback(Output(ids.COURSE_GRAPH, "figure"), Output(ids.COURSE_NOTE, "children"),
                  Output(ids.COURSE_MSG, "children"), Output(ids.VIEW_RENDERED["course"], "data"),
                  *STORES, *HIGHLIGHT, Input(ids.COURSE_DRAW, "value"),
                  Input(ids.COURSE_SEED, "value"), State(ids.VIEW_RENDERED["course"], "data"))
    def courses(data, roles, settings, subject, stratum, n_draw, seed, last):
        n_draw, seed = int(n_draw or 40), int(seed or 1)
        key = render_key(context, "cohort", data, roles, settings, subject, stratum, n_draw, seed)
        _skip_if_same(key, last)

        def make():
            cohort = wb_call("cohort", data, roles, settings)
            frame = cohort.frame
            frame["subject"] = frame["subject"].astype(str)
            chosen, k, n = draw.sample_subjects(frame, per_stratum=n_draw, seed=seed,
                                                keep=subject)
            shown = frame[frame["subject"].isin(set(chosen))]
            fig = draw.courses(shown, full=frame, cohort=cohort, highlight_subject=subject,
                               highlight_stratum=stratum)
            return fig, f"{k} of {n} subjects drawn (sample {seed}); means use every subject."

        return _finish(make, "drawing courses over time", key, ("fig", "text"))

    # -------------------------------------------------------- semivariogram, lag correlation
    def semivariogram_view(data, roles, settings):
        vg = wb_call("variogram", data, roles, settings)
        cohort = wb_call("cohort", data, roles, settings)
        return draw.variogram(vg, cohort=cohort), readout(vg, time_unit=cohort.settings.unit)

    def lag_view(data, roles, settings):
        lc = wb_call("lag_correlation", data, roles, settings)
        cohort = wb_call("cohort", data, roles, settings)
        note = (f"Windows {lc.width:g} {cohort.settings.unit} wide. Cells with too few "
                "subjects seen in both windows are left blank.")
        return draw.lag_heatmap(lc, cohort=cohort), note

    _figure_and_note_view(app, context, view="spread", stage="variogram",
                          graph=ids.SPREAD_GRAPH, note=ids.SPREAD_READOUT, msg=ids.SPREAD_MSG,
                          build=semivariogram_view, what="computing the semivariogram")
    _figure_and_note_view(app, context, view="pairs", stage="lagcorr",
                          graph=ids.PAIRS_GRAPH, note=ids.PAIRS_NOTE, msg=ids.PAIRS_MSG,
                          build=lag_view, what="computing lag correlations")

    # -------------------------------------------------------------- subject lines
    @app.callback(Output(ids.LINES_GRAPH, "figure"), Output(ids.LINES_MSG, "children"),
                  Output(ids.VIEW_RENDERED["lines"], "data"),
                  *STORES, *HIGHLIGHT, Input(ids.LINES_ORDER, "value"),
                  State(ids.VIEW_RENDERED["lines"], "data"))
    def lines(data, roles, settings, subject, stratum, order, last):
        order = order or "slope"
        key = render_key(context, "cohort", data, roles, settings, subject, stratum, order)
        _skip_if_same(key, last)

        def make():
            frame = wb_call("subject_lines", data, roles, settings)
            cohort = wb_call("cohort", data, roles, settings)
            return (draw.intervals(frame, cohort=cohort, order=order, highlight_subject=subject,
                                   highlight_stratum=stratum),)

        return _finish(make, "drawing subject lines", key, ("fig",))

    # -------------------------------------------------------------- rate of change
    def summary_inputs(data, roles, settings):
        """Subject lines, stratum summaries and the cohort (all cached stages)."""
        return (wb_call("subject_lines", data, roles, settings),
                wb_call("summaries", data, roles, settings),
                wb_call("cohort", data, roles, settings))

    @app.callback(Output(ids.RATE_STRATA_GRAPH, "figure"), Output(ids.RATE_COVARIATE_GRAPH, "figure"),
                  Output(ids.RATE_TABLE, "data"), Output(ids.RATE_TABLE, "columns"),
                  Output(ids.RATE_MSG, "children"), Output(ids.VIEW_RENDERED["rate"], "data"),
                  *STORES, *HIGHLIGHT, State(ids.VIEW_RENDERED["rate"], "data"))
    def rate(data, roles, settings, subject, stratum, last):
        key = render_key(context, "summaries", data, roles, settings, subject, stratum)
        _skip_if_same(key, last)

        def make():
            frame, summ, cohort = summary_inputs(data, roles, settings)
            table = summ.stratum_table.round(3)
            columns = rate_table_columns(table.columns, cohort)
            table = table[[c["id"] for c in columns]]
            return (draw.slopes_by_stratum(frame, cohort=cohort, highlight_subject=subject,
                                           highlight_stratum=stratum),
                    draw.slope_vs_covariate(frame, summ.slope_smooth, cohort=cohort,
                                            highlight_subject=subject,
                                            highlight_stratum=stratum),
                    table.astype(object).where(table.notna(), None).to_dict("records"),
                    columns)

        return _finish(make, "summarising rates of change", key, ("fig", "fig", "list", "list"))

    # -------------------------------------------------------------- follow-up
    @app.callback(Output(ids.FOLLOW_VISITS_GRAPH, "figure"),
                  Output(ids.FOLLOW_DROPOUT_GRAPH, "figure"), Output(ids.FOLLOW_NOTE, "children"),
                  Output(ids.FOLLOW_MSG, "children"), Output(ids.VIEW_RENDERED["follow"], "data"),
                  *STORES, *HIGHLIGHT, State(ids.VIEW_RENDERED["follow"], "data"))
    def follow(data, roles, settings, subject, stratum, last):
        key = render_key(context, "summaries", data, roles, settings, subject, stratum)
        _skip_if_same(key, last)

        def make():
            frame, summ, cohort = summary_inputs(data, roles, settings)
            return (draw.visits(frame, cohort=cohort, highlight_subject=subject,
                                highlight_stratum=stratum),
                    draw.dropout(summ.dropout, cohort=cohort, highlight_stratum=stratum),
                    dropout_note(summ.dropout, time_unit=cohort.settings.unit))

        return _finish(make, "summarising follow-up", key, ("fig", "fig", "list"))


def dropout_note(dropout, *, time_unit: str = "") -> list:
    """The follow-up counts in plain words, the rule behind them and the band's method."""
    from analysis.summaries import BAND_METHOD

    out = [html.P([html.Strong("Follow-up: "), dropout.sentence(time_unit)])]
    if dropout.classified:
        out.append(html.P(f"Rule: {dropout.status_rule}. Curves: Kaplan–Meier share not yet "
                          f"left, with a {BAND_METHOD}; leaving counts at the last visit, and "
                          "subjects who did not leave count to their potential follow-up or "
                          "the horizon.", className="cl-caveat"))
    out += [html.P(n, className="cl-caveat") for n in dropout.notes]
    return out


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


def _figure_and_note_view(app, context: AppContext, *, view: str, stage: str, graph: str,
                          note: str, msg: str, build, what: str) -> None:
    """Register a view drawn from the stores alone: one figure plus a note under it.

    ``build(data, roles, settings)`` returns (figure, note); the view redraws only when
    the settings of ``stage`` (or the data/roles) change.
    """
    @app.callback(Output(graph, "figure"), Output(note, "children"), Output(msg, "children"),
                  Output(ids.VIEW_RENDERED[view], "data"),
                  *STORES, State(ids.VIEW_RENDERED[view], "data"))
    def _view(data, roles, settings, last):
        key = render_key(context, stage, data, roles, settings)
        _skip_if_same(key, last)
        return _finish(lambda: build(data, roles, settings), what, key, ("fig", "text"))


def _finish(make, what: str, key: str, shape: tuple[str, ...]):
    """(outputs..., message, key) from ``make()``; on an error, blanks of ``shape`` and the message.

    ``shape`` names each output ``make`` returns: 'fig', 'text' or 'list'.
    """
    value, message, err = attempt(make, what=what)
    if value is not None:
        return (*value, "", key)
    waiting = isinstance(err, NeedsInput)
    fig = draw.empty(message if waiting else "This view cannot be drawn with the current choices.")
    blank = {"fig": fig, "text": "", "list": []}
    return (*(blank[k] for k in shape), "" if waiting else message, key)


def readout(vg, *, time_unit: str = "") -> list:
    """Plain-language variance split under the semivariogram, with its caveat.

    ``time_unit`` (e.g. "months") names the unit of the longest lag used.
    """
    r = vg.readout
    share = r.shares or {}

    def pct(name):
        v = share.get(name)
        return "—" if v is None or not np.isfinite(v) else f"{100 * v:.0f}%"

    def num(v):
        return "—" if v is None or not np.isfinite(v) else f"{v:.3g}"

    return [
        html.P([html.Strong("Read-out: "),
                f"of the total residual variance ({num(vg.process_variance)}), about "
                f"{pct('nugget')} looks like measurement error (nugget {num(r.nugget)}), "
                f"{pct('serial')} like serially correlated variation ({num(r.serial)}) and "
                f"{pct('between')} like stable differences between subjects ({num(r.between)})."]),
        html.P(f"{vg.n_pairs:,} within-subject pairs up to {vg.max_lag:g} "
               f"{time_unit or 'time units'} apart are used.", className="cl-caveat"),
        *[html.P(n, className="cl-caveat") for n in vg.notes],
        html.P(vg.caveat, className="cl-caveat"),
    ]
