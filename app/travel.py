"""Settings travel: save the page's choices (settings, column roles, model choices) as the JSON
file the command line reads with ``--settings FILE.json``, and open such a file in the page.

Opening a file goes through the page address: the file's choices are written into the query
string exactly as a shared link would carry them, and the state hub (:mod:`app.hub`) sets
every control from it. The model choices, which the address does not carry, are set on the
Models controls directly. A file that cannot be used leaves everything as it was and says which
key is wrong, beside the control.
"""
from __future__ import annotations

import re

from dash import Input, Output, State, dcc, html, no_update

from analysis.errors import ModelError, SettingsError
from analysis.models.modelstage import ModelChoices
from analysis.settings import Roles
from analysis.settings_file import read_settings_document, settings_text

from . import controls as ctl
from . import ids, urlstate
from .components import message
from .hub import decode_upload
from .sections.models import choices_from_controls
from .session import AppContext, attempt
from .text import echo

EXPORT = "travel-export"
DOWNLOAD = "travel-download"
IMPORT = "travel-import"
MSG = "travel-msg"
NOTE = "travel-note"
#: the Models controls a file sets (value of each, by ModelChoices field)
MODEL_CONTROLS = {"structures": ids.MODELS_STRUCTURES, "correlation": ids.MODELS_CORRELATION,
                  "method": ids.MODELS_METHOD, "time_spline_df": ids.MODELS_SPLINE_DF}
#: largest settings file the page reads (a real one is a few KB)
MAX_FILE_BYTES = 1_000_000


def controls() -> html.Div:
    """The save button and the open-a-file box, for the settings panel."""
    return html.Div(className="cl-travel", children=[
        html.Div(className="cl-travel-row", children=[
            html.Button("Save choices", id=EXPORT, className="cl-btn cl-btn-quiet",
                        title="Download the settings, column roles and model choices as a JSON "
                              "file (the command line reads it with --settings FILE.json)"),
            dcc.Upload(id=IMPORT, className="cl-travel-open", accept=".json,application/json",
                       max_size=MAX_FILE_BYTES, multiple=False,
                       children=html.Span("Open a choices file",
                                          title="Apply a saved choices file (JSON) to the "
                                                "loaded table")),
        ]),
        dcc.Download(id=DOWNLOAD),
        html.Small(id=NOTE, className="cl-hint", role="status"),
        message(MSG),
    ])


# ------------------------------------------------------------------ pure helpers
def export_text(context: AppContext, data, roles, settings, model_values: dict
                ) -> tuple[str, str, str]:
    """(file name, JSON text, note) of the current choices; the model choices are left out (and
    the note says so) when the Models controls do not make a valid set."""
    _, r, s = context.inputs(data, roles, settings)
    try:
        choices = choices_from_controls(**model_values)
        note = ""
    except (ModelError, TypeError, ValueError) as exc:
        choices, note = None, f" Model choices left out: {exc}"
    name = (data or {}).get("name") or "data"
    stem = re.sub(r"[^A-Za-z0-9_-]+", "-", name.rsplit(".", 1)[0]).strip("-") or "data"
    file_name = f"cohortlens-choices-{stem}.json"
    return file_name, settings_text(s, r, choices), f"Saved {file_name}.{note}"


def import_query(context: AppContext, raw: bytes, name: str, data, roles, search
                 ) -> tuple[str, ModelChoices | None, str]:
    """(new page address, model choices or None, note) for a settings file's bytes.

    Raises SettingsError naming the file and the wrong key; roles must name columns of the
    loaded table.
    """
    doc = read_settings_document(raw, name=name)
    settings = doc.full_settings(context.default_settings)
    key = (data or {}).get("key")
    dataset = context.datasets.get(key)
    if dataset is None:
        raise SettingsError("Load the table first; a choices file applies to the loaded table.",
                            field="roles")
    current = Roles.from_dict((roles or {}).get("roles")) if (roles or {}).get("roles") else None
    new_roles = doc.roles or current
    if new_roles is not None:
        columns = set(map(str, dataset.frame.columns))
        for role in ("subject", "time", "response", "event_date", "followup_end", "covariates"):
            value = getattr(new_roles, role)
            for column in (value if isinstance(value, tuple) else (value,)):
                if column and column not in columns:
                    raise SettingsError(f"{name}: key 'roles.{role}' names the column "
                                        f"'{echo(column)}', which the loaded table does not have",
                                        field="roles")
    state = urlstate.decode(search, base=context.default_settings,
                            base_roles=context.default_roles, base_data=context.default_key)
    default = key == context.default_key
    query = urlstate.encode(
        data_key=None if default else key, roles=new_roles,
        base_roles=context.default_roles if default else None, settings=settings,
        base=context.default_settings, view=state.view, present=state.present)
    parts = ["settings"] + (["column roles"] if doc.roles else []) + \
        (["model choices"] if doc.models else [])
    return query, doc.models, f"Applied {', '.join(parts)} from {echo(name)}."


_KEY_MESSAGE = re.compile(r"^(?P<head>.*?key 'settings\.(?P<field>\w+)'): (?P<rest>.*)$",
                          re.DOTALL)


def page_message(message: str) -> str:
    """A settings-file message as the panel says it: the wrong key with its control's label,
    the rest in the panel's words (``min_visits == 0`` → ``fewest visits per subject is 0``)."""
    m = _KEY_MESSAGE.match(message)
    if not m or m["field"] not in ctl.FIELD_LABELS:
        return message
    label = ctl.FIELD_LABELS[m["field"]]
    rest = ctl.plain_message(m["rest"])
    # messages worded for the page already name the control; say the label once
    named = f" ({label})" if label.lower() not in rest.lower() else ""
    return f"{m['head']}{named}: {rest}"


# ------------------------------------------------------------------ callbacks
def register(app, context: AppContext) -> None:
    model_states = dict(structures=State(ids.MODELS_STRUCTURES, "value"),
                        correlation=State(ids.MODELS_CORRELATION, "value"),
                        method=State(ids.MODELS_METHOD, "value"),
                        confounders=State(ids.MODELS_CONFOUNDERS, "value"),
                        spline_df=State(ids.MODELS_SPLINE_DF, "value"))

    @app.callback(output=dict(file=Output(DOWNLOAD, "data"), note=Output(NOTE, "children"),
                              msg=Output(MSG, "children")),
                  inputs=dict(n=Input(EXPORT, "n_clicks"), data=State(ids.STORE_DATA, "data"),
                              roles=State(ids.STORE_ROLES, "data"),
                              settings=State(ids.STORE_SETTINGS, "data"), models=model_states),
                  prevent_initial_call=True)
    def save(n, data, roles, settings, models):
        value, msg, _ = attempt(lambda: export_text(context, data, roles, settings, models),
                                what="saving the choices")
        if value is None:
            return dict(file=no_update, note="", msg=msg)
        name, text, note = value
        return dict(file=dict(content=text, filename=name, type="application/json"), note=note,
                    msg="")

    model_outputs = {f: Output(i, "value", allow_duplicate=True)
                     for f, i in MODEL_CONTROLS.items()}
    model_outputs["confounders"] = Output(ids.MODELS_CONFOUNDERS, "value", allow_duplicate=True)

    @app.callback(output=dict(search=Output(ids.PAGE_URL, "search", allow_duplicate=True),
                              models=model_outputs, note=Output(NOTE, "children",
                                                                allow_duplicate=True),
                              msg=Output(MSG, "children", allow_duplicate=True),
                              # emptied, so that opening the same file again applies it again
                              reset=Output(IMPORT, "contents")),
                  inputs=dict(contents=Input(IMPORT, "contents"),
                              filename=State(IMPORT, "filename"),
                              data=State(ids.STORE_DATA, "data"),
                              roles=State(ids.STORE_ROLES, "data"),
                              search=State(ids.PAGE_URL, "search")),
                  prevent_initial_call=True)
    def open_file(contents, filename, data, roles, search):
        unchanged = {f: no_update for f in model_outputs}
        if not contents:
            return dict(search=no_update, models=unchanged, note=no_update, msg=no_update,
                        reset=no_update)
        name = filename or "choices file"
        value, msg, _ = attempt(
            lambda: import_query(context, decode_upload(contents, name), name, data, roles,
                                 search), what=f"reading {name}")
        if value is None:
            return dict(search=no_update, models=unchanged, note="",
                        msg=f"Nothing was changed. {page_message(msg)}", reset=None)
        query, choices, note = value
        models = unchanged
        if choices is not None:
            d = choices.to_dict()
            models = {f: d[f] for f in model_outputs}
        return dict(search=query, models=models, note=note, msg="", reset=None)
