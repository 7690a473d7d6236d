"""Small page building blocks shared by the layout and every page section (Dash components only)."""
from __future__ import annotations

from dash import dcc, html

from analysis.settings import DECLARED

from . import controls as ctl
from . import ids

#: modebar: camera button saves PNG (2x); the SVG button beside each view saves SVG
GRAPH_CONFIG = {
    "displaylogo": False,
    "toImageButtonOptions": {"format": "png", "scale": 2},
    "modeBarButtonsToRemove": ["lasso2d", "select2d"],
}


def section(anchor: str, title: str, intro: str | None, *children, extra_class: str = ""):
    return html.Section(id=anchor, className=f"cl-section {extra_class}".strip(), children=[
        html.H2(title),
        *([html.P(intro, className="cl-intro")] if intro else []),
        *children,
    ])


def message(id_: str) -> html.Div:
    return html.Div(id=id_, className="cl-msg", role="alert")


def graph(id_: str, height: int = 460) -> html.Div:
    """A graph with a loading indicator (after 0.5 s) and an SVG export button."""
    return html.Div(className="cl-graph", children=[
        html.Button("SVG", id={"type": ids.EXPORT_SVG, "index": id_},
                    className="cl-btn cl-btn-quiet cl-svg",
                    title="Save this figure as SVG (the camera icon saves PNG)"),
        dcc.Loading(type="circle", delay_show=500, children=dcc.Graph(
            id=id_, config=GRAPH_CONFIG, style={"height": f"{height}px"},
            figure={"data": [], "layout": {"xaxis": {"visible": False},
                                           "yaxis": {"visible": False}}})),
    ])


def busy(*children) -> dcc.Loading:
    """A loading indicator (after 0.5 s) around output that a slow step fills."""
    return dcc.Loading(type="dot", delay_show=500, children=list(children))


def field(label: str, control, msg_id: str, hint: str | None = None) -> html.Div:
    return html.Div(className="cl-field", children=[
        html.Label(label, className="cl-label"),
        control,
        *([html.Small(hint, className="cl-hint")] if hint else []),
        message(msg_id),
    ])


def number(id_: str, value, *, step="any", min_=None, placeholder=None) -> dcc.Input:
    return dcc.Input(id=id_, type="number", value=value, step=step, min=min_, debounce=True,
                     placeholder=placeholder, className="cl-input")


def setting_field(name: str, v: dict) -> html.Div:
    """One setting's label, control, hint and message, as its declaration asks
    (``v``: the controls' values, :func:`app.controls.control_values`)."""
    decl = DECLARED[name]
    id_, kind = ids.SETTING_INPUT[name], decl.kind
    if kind == "switch":
        control = dcc.Checklist(id=id_, options=[{"label": decl.check_text, "value": ctl.ON}],
                                value=v[name], className="cl-check")
        return field("", control, ids.SETTING_MSG[name], decl.hint)
    options = ctl.choice_options(ctl.choice_labels(name)) if decl.choice_labels or \
        decl.choices else []
    if kind == "choice" and decl.radio:
        control = dcc.RadioItems(id=id_, options=options, value=v[name], className="cl-radio")
    elif kind in ("choice", "column", "center"):
        control = dcc.Dropdown(id=id_, options=options, value=v[name],
                               clearable=kind == "column", searchable=False,
                               placeholder=decl.placeholder)
        if kind == "center":
            control = html.Div(className="cl-pair", children=[
                control, number(ids.SETTING_CENTER_VALUE, v["center_value"], placeholder="value")])
    elif kind in ("count", "number"):
        control = number(id_, v[name], step=1 if kind == "count" else "any",
                         min_=decl.lo if kind == "count" else decl.panel_min,
                         placeholder=decl.placeholder)
    else:                                 # date, breaks: typed text
        control = dcc.Input(id=id_, type="text", value=v[name], debounce=True,
                            placeholder=decl.placeholder, className="cl-input")
    return field(decl.label, control, ids.SETTING_MSG[name], decl.hint)
