"""Shared plumbing of the page sections' view callbacks: stores → one Workbench stage → figure.

Each section module (``app/sections/``) registers its own callbacks with these
helpers. Each view remembers the key it was last drawn for (its stage's settings, the
data, roles, highlight and its own controls) and skips the redraw when a change
elsewhere does not concern it, so e.g. new variogram bins redraw only the
semivariogram.
"""
from __future__ import annotations

import json

from dash import Input, Output, State, dcc
from dash.exceptions import PreventUpdate

from analysis.errors import NotOnCluster
from analysis.pipeline import Workbench
from analysis.settings import json_key

from . import ids
from .figures import empty_figure
from .session import AppContext, NeedsInput, attempt

STORES = (Input(ids.STORE_DATA, "data"), Input(ids.STORE_ROLES, "data"),
          Input(ids.STORE_SETTINGS, "data"))
HIGHLIGHT = (Input(ids.STORE_SUBJECT, "data"), Input(ids.LINK_STRATA, "value"))


def stage_stores(stage: str) -> tuple:
    """A view's dependencies on the stores: data, roles and settings read as they are, and the
    call made only when ``stage``'s key changes (:data:`app.ids.STAGE_KEY`, written by the
    hub). The callback takes one more argument after ``settings``: that key."""
    return (*(State(i.component_id, i.component_property) for i in STORES),
            Input(ids.STAGE_KEY[stage], "data"))


def render_key(context: AppContext, stage: str, data, roles, settings, *extra) -> str:
    """What a view's picture depends on: data key, roles, its stage's settings and extras."""
    try:
        dataset, r, s = context.inputs(data, roles, settings)
    except Exception:  # noqa: BLE001 - an unusable input is itself part of the key
        return "unusable:" + json.dumps([data, roles, settings, extra], default=str)
    d = s.to_dict()
    sub = {k: d[k] for k in Workbench.stage_fields(stage, s)}
    return json_key([dataset.key, r.to_dict(), stage, sub, extra])


def rendered_id(view: str) -> str:
    """Id of the store holding the key ``view`` was last drawn for (``"<view>-rendered"``).

    The page's first views have theirs in :data:`app.ids.VIEW_RENDERED` (placed by
    :mod:`app.layout`); a new section places :func:`rendered_store` in its own fragment.
    """
    return ids.VIEW_RENDERED.get(view, f"{view}-rendered")


def rendered_store(view: str) -> dcc.Store:
    """The store for :func:`rendered_id` (put it in the section's layout fragment)."""
    return dcc.Store(id=rendered_id(view))


def skip_if_same(key: str, last: str | None) -> None:
    if key == last:
        raise PreventUpdate


def stage_call(context, name, data, roles, settings):
    dataset, r, s = context.inputs(data, roles, settings)
    return getattr(context.workbench, name)(dataset, r, s)


def on_cluster(context, dataset) -> bool:
    """Whether ``dataset`` is served from a Dask cluster (``serve --engine dask``)."""
    ask = getattr(context.workbench, "on_cluster", None)
    return ask is not None and bool(ask(dataset))


def refuse_on_cluster(context, dataset, what: str) -> None:
    """Raise NotOnCluster when ``dataset`` is served from a Dask cluster and the view ``what``
    reads every visit (``serve --engine dask``); nothing on the single-machine page."""
    refuse = getattr(context.workbench, "refuse_visit_view", None)
    if refuse is not None:
        refuse(dataset, what)


def summary_inputs(context, data, roles, settings):
    """Subject lines, stratum summaries and the cohort (all cached stages)."""
    return (stage_call(context, "subject_lines", data, roles, settings),
            stage_call(context, "summaries", data, roles, settings),
            stage_call(context, "cohort", data, roles, settings))


def model_chooser(app, *, hint: str, body: str, model: str, read_models) -> None:
    """A section that works on a fitted model: its hint shows until models are fitted, then its
    body, with ``model`` offering the fits (the preferred one marked and chosen).
    ``read_models(snapshot)`` gives the fitted models of a models snapshot. Not called at the
    page's opening: no models are fitted then, and the layout starts with the hint shown and the
    body hidden (saves the opening round trips of this and its followers)."""
    @app.callback(Output(hint, "style"), Output(body, "style"), Output(model, "options"),
                  Output(model, "value"), Input(ids.MODELS_SNAPSHOT, "data"),
                  prevent_initial_call=True)
    def models_ready(snapshot):
        hide, show = {"display": "none"}, {}
        if not snapshot:
            return show, hide, [], None
        models, _, _ = attempt(lambda: read_models(snapshot), what="reading the fitted models")
        if models is None or not models.fits:
            return show, hide, [], None
        names = list(models.fits)
        opts = [{"label": f"{n} ★" if n == models.preferred else n, "value": n} for n in names]
        return hide, show, opts, models.preferred if models.preferred in names else names[0]


def figure_and_note_view(app, context: AppContext, *, view: str, stage: str, graph: str,
                         note: str, msg: str, build, what: str) -> None:
    """Register a view drawn from the stores alone: one figure plus a note under it.

    ``build(data, roles, settings)`` returns (figure, note); the view redraws only when
    the settings of ``stage`` (or the data/roles) change.
    """
    @app.callback(Output(graph, "figure"), Output(note, "children"), Output(msg, "children"),
                  Output(rendered_id(view), "data"),
                  *stage_stores(stage), State(rendered_id(view), "data"))
    def _view(data, roles, settings, _stage_key, last):
        key = render_key(context, stage, data, roles, settings)
        skip_if_same(key, last)
        return finish(lambda: build(data, roles, settings), what, key, ("fig", "text"))


def finish(make, what: str, key: str, shape: tuple[str, ...]):
    """(outputs..., message, key) from ``make()``; on an error, blanks of ``shape`` and the message.

    ``shape`` names each output ``make`` returns: 'fig', 'text' or 'list'.
    """
    value, message, err = attempt(make, what=what)
    if value is not None:
        return (*value, "", key)
    waiting = isinstance(err, (NeedsInput, NotOnCluster))   # said in the view itself
    if isinstance(err, NotOnCluster):                       # a long note: in lines
        import textwrap
        message = "<br>".join(textwrap.wrap(message, 72))
    fig = empty_figure(message if waiting else "This view cannot be drawn with the current choices.")
    blank = {"fig": fig, "text": "", "list": []}
    return (*(blank[k] for k in shape), "" if waiting else message, key)




# earlier private names (kept for callers outside app/)
_stage_call = stage_call


def register_members(app, context: AppContext, *, output: str, graph: str, describe,
                     what: str) -> None:
    """A click on a summarised view's band or cell lists the subjects in it under the view.

    ``describe(lines, look, click)`` gives ``(title, total, subject ids)`` of what was clicked,
    or None (a click on anything else, or a view drawn subject by subject)."""
    from .digest_figures import members_note, summarised
    from .figures import cohort_look

    @app.callback(Output(output, "children"), Input(graph, "clickData"),
                  *(State(i.component_id, i.component_property) for i in STORES),
                  prevent_initial_call=True)
    def members(click, data, roles, settings):
        def make():
            lines = stage_call(context, "subject_lines", data, roles, settings)
            if not summarised(lines):
                return ""
            got = describe(lines, cohort_look(stage_call(context, "cohort", data, roles,
                                                         settings)), click)
            return "" if got is None else members_note(*got)

        value, text, _ = attempt(make, what=what)
        return value if value is not None else text
