"""Presentation mode: the page for a shared screen.

A toggle in the header and the page-address flag ``present=1`` (:mod:`app.urlstate`) hide the
settings column, enlarge the type and the figures, and let the keyboard step through the
sections one screen at a time (``assets/presentation.js``: Page Down, →, ↓ or the space bar
for the next section; Page Up, ←, ↑ for the previous one; Home for the top; Escape leaves).
The flag is the one source of truth: the toggle rewrites the address, and the look follows the
address, so a copied link opens in the same mode.
"""
from __future__ import annotations

import json

from dash import Input, Output, State, html

from . import ids, urlstate

TOGGLE = "present-toggle"
ON_TEXT = "Leave presentation"
OFF_TEXT = "Present"
OFF_TITLE = ("Presentation mode: hide the settings, enlarge text and figures, step through the "
             "sections with Page Down / Page Up or the arrow keys (also in the link: present=1)")
ON_TITLE = "Back to the working page (Escape)"


def toggle() -> html.Button:
    """The header's toggle button (its label follows the page address)."""
    return html.Button(OFF_TEXT, id=TOGGLE, className="cl-btn cl-btn-quiet cl-present-toggle",
                       title=OFF_TITLE)


def register(app, context=None) -> None:
    @app.callback(Output(ids.PAGE_URL, "search", allow_duplicate=True),
                  Input(TOGGLE, "n_clicks"), State(ids.PAGE_URL, "search"),
                  prevent_initial_call=True)
    def flip(n, search):
        return urlstate.with_present(search, not urlstate.present_flag(search))

    # the look follows the address: a class on <body> (styles in assets/cohortlens.css) and
    # the toggle's label; the keyboard script reads the same class
    app.clientside_callback(
        f"""function(search) {{
            const on = new URLSearchParams(search || "").get("{urlstate.PRESENT_PARAM}");
            const flag = on !== null && ["1", "true", "yes", "on"].includes(on.trim().toLowerCase());
            document.body.classList.toggle("cl-present", flag);
            window.dispatchEvent(new Event("resize"));
            return [flag ? {json.dumps(ON_TEXT)} : {json.dumps(OFF_TEXT)},
                    flag ? {json.dumps(ON_TITLE)} : {json.dumps(OFF_TITLE)}];
        }}""",
        Output(TOGGLE, "children"), Output(TOGGLE, "title"),
        Input(ids.PAGE_URL, "search"),
    )
