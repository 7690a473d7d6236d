"""Page structure: header with caution, the analysis choices and the sections in page order.

Pure functions from start-up defaults to components; no data are read here. Each section's
own part of the page is its module's ``layout`` (:mod:`app.sections`).
"""
from __future__ import annotations

from dash import dcc, html

from analysis.settings import DECLARED, Settings

from . import controls as ctl
from . import ids
from .components import GRAPH_CONFIG, message, setting_field  # noqa: F401  (GRAPH_CONFIG: importable here as before)
from .sections import SECTIONS as PAGE_SECTIONS
from . import presentation, travel
from .urlstate import MAX_DRAW

CAUTION = ("Exploratory research statistics — not for individual care decisions. "
           "Use de-identified data under your institution's approvals.")

#: (anchor, navigation label) of each section with an entry, in page order
SECTIONS = tuple((m.ANCHOR, m.NAV) for m in PAGE_SECTIONS if m.NAV)


def build_layout(settings: Settings, *, max_upload_bytes: int | None = None) -> html.Div:
    """The whole page, controls showing ``settings`` until the link or the user changes them;
    the upload refuses files over ``max_upload_bytes`` (default: what the server accepts)."""
    return html.Div(className="cl-page", children=[
        dcc.Location(id=ids.PAGE_URL, refresh=False),
        dcc.Store(id=ids.STORE_DATA),
        dcc.Store(id=ids.STORE_ROLES),
        dcc.Store(id=ids.STORE_SETTINGS),
        *[dcc.Store(id=k) for k in ids.STAGE_KEY.values()],
        dcc.Store(id=ids.STORE_SUBJECT),
        *[dcc.Store(id=v) for v in ids.VIEW_RENDERED.values()],
        header(),
        html.Div(className="cl-body", children=[
            html.Aside(settings_panel(settings), className="cl-side"),
            html.Main(className="cl-main", children=[
                html.Div(id=ids.PAGE_ALERT, className="cl-alert", role="status"),
                *[m.layout(settings, max_upload_bytes) for m in PAGE_SECTIONS],
                html.Footer(CAUTION, className="cl-foot"),
            ]),
        ]),
    ])


def header() -> html.Header:
    return html.Header(className="cl-head", children=[
        html.Div(className="cl-brand", children=[
            html.Span("cohortlens", className="cl-logo"),
            html.H1(id=ids.PAGE_TITLE, children="—"),
        ]),
        html.Nav(className="cl-nav", children=[
            html.A(m.NAV, href=f"#{m.ANCHOR}") for m in PAGE_SECTIONS if m.NAV]),
        presentation.toggle(),
        html.Div(id=ids.PAGE_CAUTION, className="cl-caution", role="note", children=[
            html.Span("Caution", className="cl-caution-tag"),
            html.Span(CAUTION),
            html.Button("Hide", id=ids.PAGE_CAUTION_CLOSE, className="cl-btn cl-btn-quiet",
                        title="Hide this note (it stays in the page footer)"),
        ]),
    ])


# ------------------------------------------------------------------ settings panel
def settings_panel(settings: Settings) -> html.Div:
    """Every setting with a panel group, grouped as declared (analysis.settings), in field
    order; consecutive fields with the same ``pair`` sit side by side."""
    v = ctl.control_values(settings)
    groups: dict[str, list] = {}
    for name, decl in DECLARED.items():
        if decl.group is None:
            continue
        items = groups.setdefault(decl.group, [])
        block = setting_field(name, v)
        last = items[-1] if items else None
        if decl.pair and isinstance(last, tuple) and last[0] == decl.pair:
            last[1].append(block)
        else:
            items.append((decl.pair, [block]) if decl.pair else block)
        if name in _AFTER:
            items.append(_AFTER[name]())

    def unpair(item):
        return html.Div(className="cl-pair", children=item[1]) if isinstance(item, tuple) else item

    return html.Div(className="cl-settings", children=[
        html.H2("Analysis choices"),
        html.Div(id=ids.SETTINGS_STATUS, className="cl-status"),
        message(ids.SETTINGS_DATA_MSG),
        *[html.Fieldset(className="cl-group", children=[html.Legend(title),
                                                         *map(unpair, items)])
          for title, items in groups.items()],
        html.Button("Back to start-up choices", id=ids.SETTINGS_RESET, className="cl-btn"),
        travel.controls(),
    ])


#: what the panel shows after a setting's field (not itself a setting)
_AFTER = {"n_strata": lambda: html.Div(id=ids.STRATA_SIZE_NOTE, className="cl-warn-note",
                                       role="status")}


__all__ = ["build_layout", "GRAPH_CONFIG", "CAUTION", "MAX_DRAW", "SECTIONS"]
