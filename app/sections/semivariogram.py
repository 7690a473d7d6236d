"""Spread by time apart: the empirical semivariogram of the residuals and its read-out.

The figure is :func:`app.figures.variogram_figure`, shared with the models section and the
report."""
from __future__ import annotations

import numpy as np
from dash import html

from .. import ids
from ..components import graph, message, section
from ..figures import cohort_look, variogram_figure
from ..session import AppContext
from ..views import figure_and_note_view, stage_call

ANCHOR = "section-spread"
NAV = "Spread by time apart"


def layout(settings=None, max_upload_bytes=None):
    return section(ANCHOR, "Spread of residual differences by time apart",
                   "Empirical semivariogram of residuals after removing the mean curve: half "
                   "the mean squared difference between two visits of the same subject, by "
                   "how far apart in time they were.",
                   message(ids.SPREAD_MSG),
                   graph(ids.SPREAD_GRAPH, 460),
                   html.Div(id=ids.SPREAD_READOUT, className="cl-readout"))


def register(app, context: AppContext) -> None:
    def build(data, roles, settings):
        vg = stage_call(context, "variogram", data, roles, settings)
        cohort = stage_call(context, "cohort", data, roles, settings)
        return (variogram_figure(vg, look=cohort_look(cohort)),
                readout(vg, time_unit=cohort.settings.unit))

    figure_and_note_view(app, context, view="spread", stage="variogram",
                         graph=ids.SPREAD_GRAPH, note=ids.SPREAD_READOUT, msg=ids.SPREAD_MSG,
                         build=build, what="computing the semivariogram")


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
