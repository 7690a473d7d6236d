"""Data & roles: the upload (or the demo), the column-role dropdowns and the first rows."""
from __future__ import annotations

from dash import dash_table, dcc, html

from analysis.settings import Settings

from .. import controls as ctl
from .. import ids
from ..components import busy, field, message, section, setting_field
from ..datastore import size_text, upload_limit
from ..session import AppContext

ANCHOR = "section-data"
NAV = "Data & roles"


def upload_box(max_bytes: int | None = None) -> html.Div:
    """The upload area with its size limit said beside it. Files over the limit are refused in
    the browser before sending (``max_size``); assets/upload_limit.js reads the limit and the
    message from the data attributes here and shows it under the control."""
    max_bytes = upload_limit() if max_bytes is None else int(max_bytes)
    limit = size_text(max_bytes)
    too_large = (f"{{name}} is {{size}}; the page accepts files up to {limit}. Start the app "
                 "with the file instead (it is then read from disk, with no size limit): "
                 "cohortlens serve FILE")
    return html.Div(className="cl-upload-box", **{
        "data-max-bytes": str(max_bytes), "data-msg-id": ids.DATA_UPLOAD_MSG,
        "data-too-large": too_large}, children=[
        dcc.Upload(id=ids.DATA_UPLOAD, className="cl-upload", multiple=False, max_size=max_bytes,
                   accept=".csv,.tsv,.txt,.parquet,.pq",
                   children=html.Div(["Drop a file here or ",
                                      html.Span("choose one", className="cl-link")])),
        html.Div(id=ids.DATA_UPLOAD_LIMIT, className="cl-hint",
                 children=f"Files up to {limit}. Larger files: cohortlens serve FILE"),
    ])


def layout(settings: Settings | None = None,
           max_upload_bytes: int | None = None) -> html.Section:
    role_rows = [
        ("subject", "Subject identifier", False, None),
        ("time", "Time or visit date", False,
         "Numbers (time since the origin) or calendar dates."),
        ("event_date", "Event date (time origin)", False,
         "Optional: the per-subject anchoring date, e.g. transplant date."),
        ("response", "Response (measured repeatedly)", False, None),
        ("covariates", "Baseline covariates", True,
         "The first is the primary one unless chosen otherwise under Analysis choices."),
        ("followup_end", "End of follow-up (optional)", False,
         "Per subject: when its follow-up was due to end (date or time), so that leaving early "
         "is told apart from the end of the data."),
    ]
    def pick(r, multi):
        """A role's dropdown, with a small display-label field beside it when it has one."""
        drop = dcc.Dropdown(id=ids.ROLE_INPUT[r], multi=multi, options=[],
                            placeholder="choose a column…", clearable=True)
        if r not in ids.ROLE_LABEL:
            return drop
        return html.Div(className="cl-role-pick", children=[
            drop, html.Div(title=("Display label used in titles, axes, tables and statements "
                                  "instead of the column name" +
                                  (" (the primary covariate's)" if multi else "")),
                           children=dcc.Input(id=ids.ROLE_LABEL[r], type="text", value="",
                                              debounce=True, placeholder="label",
                                              className="cl-input cl-label-input"))])

    return section(ANCHOR, "Data & column roles",
                   "Upload a CSV or Parquet table with one row per visit. It is read in memory "
                   "on this computer and never saved to disk.",
                   html.Div(className="cl-data-row", children=[
                       upload_box(max_upload_bytes),
                       html.Div(className="cl-data-meta", children=[
                           html.Div(id=ids.DATA_NAME, className="cl-data-name"),
                           html.Button("Use the demo registry", id=ids.DATA_USE_DEMO,
                                       className="cl-btn cl-btn-quiet"),
                       ]),
                   ]),
                   message(ids.DATA_UPLOAD_MSG),
                   html.Div(className="cl-roles", children=[
                       *[field(label, pick(r, multi), ids.ROLE_MSG[r], hint)
                         for r, label, multi, hint in role_rows[:2]],
                       # read with the time role: how year-last dates in the time and
                       # event-date columns are read
                       setting_field("date_order", ctl.control_values(settings or Settings())),
                       *[field(label, pick(r, multi), ids.ROLE_MSG[r], hint)
                         for r, label, multi, hint in role_rows[2:]]]),
                   html.Div(id=ids.ROLES_STATUS, className="cl-status"),
                   html.Details(className="cl-preview", open=True, children=[
                       html.Summary("First rows of the table"),
                       busy(dash_table.DataTable(id=ids.DATA_PREVIEW, page_size=6,
                                                 style_table={"overflowX": "auto"},
                                                 style_cell={"fontFamily": "inherit",
                                                             "fontSize": "15px",
                                                             "padding": "4px 8px"},
                                                 style_header={"fontWeight": "600"})),
                   ]))


def register(app, context: AppContext) -> None:
    """Nothing of its own: the upload, the demo button, the previews and the roles store are
    the hub's (app/hub.py)."""
