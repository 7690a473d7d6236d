"""Build and run the dashboard.

``create_app`` wires a fresh app around one bounded data store and one cached
:class:`~analysis.pipeline.Workbench`; nothing is loaded until the first page asks.
``run_server`` binds 127.0.0.1 unless told otherwise and never turns on Dash's
debug mode unless asked.
"""
from __future__ import annotations

import logging
from pathlib import Path

import dash
import numpy as np
from dash import MATCH, Input, Output, State, dash_table, html, no_update
from dash.dash_table.Format import Format

from analysis.errors import SettingsError
from analysis.loading import Dataset, read_table
from analysis.pipeline import Workbench
from analysis.settings import Roles, Settings
from analysis.strata import SMALL_GROUP_SHARE, SMALL_GROUP_SUBJECTS, small_groups

from . import controls as ctl
from . import hub, ids, palette, views
from .sections import models as models_view
from .datastore import (DEFAULT_CACHE_MB, DEMO_KEY, MAX_REQUEST_BYTES, DataStore, demo_dataset,
                        upload_limit)
from .layout import build_layout
from .session import AppContext, attempt, role_of_column
from .text import renamed_note, short, shorten_columns

ASSETS = Path(__file__).resolve().parents[1] / "assets"
log = logging.getLogger("cohortlens.app")


def create_app(*, dataset: Dataset | None = None, roles: Roles | None = None,
               settings: Settings | None = None, workbench: Workbench | None = None,
               datastore: DataStore | None = None,
               max_request_bytes: int = MAX_REQUEST_BYTES,
               cache_mb: float = DEFAULT_CACHE_MB) -> dash.Dash:
    """A Dash app showing ``dataset`` (default: the invented demo registry) with these roles/settings.

    With no dataset the demo registry is used with its own roles and settings
    (loaded lazily on the first request). ``roles=None`` with a dataset makes the
    page ask for the column roles. ``max_request_bytes`` bounds one HTTP request; the page
    refuses files that would not fit (before sending them) and says so beside the upload.
    ``cache_mb`` is the memory budget of uploads and cached results together: half for the
    uploaded tables, half for the results (least recently used dropped first).
    """
    budget = int(cache_mb * 2**20)
    datastore = datastore or DataStore(max_bytes=max(1, budget // 2))
    if dataset is None:
        from analysis.demo import demo_roles, demo_settings

        key = datastore.pin(DEMO_KEY, demo_dataset)
        roles = roles or demo_roles()
        settings = settings or demo_settings()
    else:
        key = datastore.pin(dataset.key, dataset)
    context = AppContext(datasets=datastore, workbench=workbench or Workbench(
                             max_entries=128, max_bytes=max(1, budget - budget // 2)),
                         default_key=key, default_roles=roles,
                         default_settings=settings or Settings())
    app = dash.Dash(__name__, title="cohortlens", assets_folder=str(ASSETS),
                    suppress_callback_exceptions=False, update_title=None)
    max_upload = upload_limit(max_request_bytes)
    app.layout = lambda: build_layout(context.default_settings, max_upload_bytes=max_upload)
    app.server.config["MAX_CONTENT_LENGTH"] = max_request_bytes
    hub.register(app, context)
    _register_panels(app, context)
    views.register(app, context)
    models_view.register(app, context)
    app._cohortlens = context  # for tests: the app's caches
    return app


def _register_panels(app, context: AppContext) -> None:
    setting_inputs = {k: Input(ids.SETTING_INPUT[k], "value") for k in ids.SETTING_FIELDS}
    setting_inputs["center_value"] = Input(ids.SETTING_CENTER_VALUE, "value")

    @app.callback(output=dict(store=Output(ids.STORE_SETTINGS, "data"),
                              msgs={f: Output(ids.SETTING_MSG[f], "children")
                                    for f in ids.SETTING_FIELDS},
                              status=Output(ids.SETTINGS_STATUS, "children")),
                  inputs=dict(values=setting_inputs))
    def settings_store(values):
        settings, problems = ctl.settings_from_controls(values,
                                                        fallback=context.default_settings)
        msgs = {f: problems.get(f, "") for f in ids.SETTING_FIELDS}
        if settings is None:
            return dict(store=no_update, msgs=msgs,
                        status="Fix the marked choice; the views keep the last valid choices.")
        return dict(store=settings.to_dict(), msgs=msgs, status="")

    @app.callback(Output(ids.STORE_ROLES, "data"),
                  *[Input(ids.ROLE_INPUT[r], "value") for r in ids.ROLE_FIELDS])
    def roles_store(*values):
        roles, problems = ctl.roles_from_controls(dict(zip(ids.ROLE_FIELDS, values)),
                                                  known=context.default_roles)
        return {"roles": roles.to_dict() if roles else None, "problems": problems}

    @app.callback(
        output=dict(table=Output(ids.KEPT_TABLE, "data"), cols=Output(ids.KEPT_TABLE, "columns"),
                    notes=Output(ids.KEPT_NOTES, "children"),
                    role_msgs={r: Output(ids.ROLE_MSG[r], "children") for r in ids.ROLE_FIELDS},
                    settings_msg=Output(ids.SETTINGS_DATA_MSG, "children"),
                    status=Output(ids.ROLES_STATUS, "children"),
                    chips=Output(ids.LINK_STRATA, "options"),
                    size_note=Output(ids.STRATA_SIZE_NOTE, "children")),
        inputs=dict(data=Input(ids.STORE_DATA, "data"), roles=Input(ids.STORE_ROLES, "data"),
                    settings=Input(ids.STORE_SETTINGS, "data")))
    def cohort_panel(data, roles, settings):
        out = dict(table=[], cols=[], notes=[], settings_msg="", status="", chips=[],
                   size_note="", role_msgs={r: "" for r in ids.ROLE_FIELDS})
        problems = (roles or {}).get("problems") or {}
        if problems:
            out["role_msgs"].update(problems)
            out["status"] = "The views appear once the subject, time and response are chosen."
            return out
        cohort, message, err = attempt(
            lambda: views._stage_call(context, "cohort", data, roles, settings),
            what="selecting the cohort")
        if cohort is None:
            r = Roles.from_dict(roles["roles"]) if (roles or {}).get("roles") else None
            role = role_of_column(r, err)
            if role:
                out["role_msgs"][role] = message
            elif isinstance(err, SettingsError):
                field = err.field
                out["settings_msg"] = (f"{ctl.FIELD_LABELS[field]}: {ctl.plain_message(message)}"
                                       if field in ctl.FIELD_LABELS else message)
            else:
                out["status"] = message
            return out
        frame = cohort.attrition.to_frame()
        out["table"] = frame.to_dict("records")
        counts = {"type": "numeric", "format": Format().group(True)}   # 1,062 like the status
        out["cols"] = [{"name": n, "id": c, **(counts if c != "step" else {})} for c, n in (
            ("step", "Inclusion step"), ("subjects", "Subjects kept"),
            ("observations", "Visits kept"), ("subjects_removed", "Subjects removed"),
            ("observations_removed", "Visits removed"))]
        out["notes"] = [html.Li(w) for w in cohort.warnings]
        out["chips"] = stratum_chips(cohort)
        out["size_note"] = small_group_note(cohort)
        out["status"] = (f"{cohort.panel.n_subjects:,} subjects and {cohort.panel.n_obs:,} visits "
                         f"are analysed. Time: {cohort.time_label}.")
        return out

    @app.callback(Output(ids.LINK_CARD, "children"),
                  Input(ids.STORE_DATA, "data"), Input(ids.STORE_ROLES, "data"),
                  Input(ids.STORE_SETTINGS, "data"), Input(ids.STORE_SUBJECT, "data"))
    def subject_card(data, roles, settings, subject):
        if not subject:
            return html.Span("Click a subject in any view to follow it everywhere.",
                             className="cl-hint")
        card, message, _ = attempt(lambda: _card(context, data, roles, settings, subject),
                                   what="describing the selected subject")
        return card if card is not None else html.Span(message, className="cl-msg")

    @app.callback(Output(ids.PAGE_CAUTION, "style"), Input(ids.PAGE_CAUTION_CLOSE, "n_clicks"),
                  prevent_initial_call=True)
    def hide_caution(n):
        return {"display": "none"} if n else no_update

    app.clientside_callback(
        """function(n, id) {
            if (!n) { return window.dash_clientside.no_update; }
            const el = document.querySelector('#' + CSS.escape(id.index) + ' .js-plotly-plot');
            if (el && window.Plotly) {
                window.Plotly.downloadImage(el, {format: 'svg', filename: id.index});
            }
            return 'Saved as SVG';
        }""",
        Output({"type": ids.EXPORT_SVG, "index": MATCH}, "title"),
        Input({"type": ids.EXPORT_SVG, "index": MATCH}, "n_clicks"),
        State({"type": ids.EXPORT_SVG, "index": MATCH}, "id"),
        prevent_initial_call=True,
    )


def stratum_chips(cohort) -> list[dict]:
    """Group chips in stratum-code order ("No value" last): label with its subject count.

    Labels stay plain text (components as option labels break the renderer on
    update); each chip's colour swatch comes from the style sheet by position,
    see :func:`app.palette.chip_css`. The value is the group label.
    """
    labels = list(cohort.strata.labels)
    codes = np.asarray(cohort.strata.codes)
    counts = np.bincount(codes[codes >= 0], minlength=len(labels))
    out = [{"label": f"{lab} (n={int(n):,})", "value": lab} for lab, n in zip(labels, counts)]
    if (codes < 0).any():
        out.append({"label": f"{palette.NO_VALUE_LABEL} (n={int((codes < 0).sum()):,})",
                    "value": palette.NO_VALUE_LABEL})
    return out


def small_group_note(cohort) -> str:
    """One short line naming the small groups (see :func:`analysis.strata.small_groups`), or ""."""
    s = cohort.strata
    counts = s.counts
    small = small_groups(counts, int(s.codes.size))
    if small.size == 0:
        return ""
    names = ", ".join(f"{s.labels[j]} (n={int(counts[j]):,})" for j in small)
    return (f"Small group{'s' if small.size > 1 else ''}: {names}. Under {SMALL_GROUP_SUBJECTS} "
            f"subjects or {SMALL_GROUP_SHARE:.0%} of the cohort; consider fewer groups.")


def _card(context, data, roles, settings, subject):
    cohort = views._stage_call(context, "cohort", data, roles, settings)
    lines = views._stage_call(context, "subject_lines", data, roles, settings)
    frame = cohort.frame
    mine = frame[frame["subject"].astype(str) == str(subject)]
    row = lines[lines["subject"].astype(str) == str(subject)]
    if mine.empty or row.empty:
        return html.Span(f"Subject {subject} is not in the analysed cohort with these choices.",
                         className="cl-hint")
    r = row.iloc[0]

    def fmt(v, spec=".3g"):
        try:
            return format(float(v), spec)
        except (TypeError, ValueError):
            return "—"

    se = f" (SE {fmt(r['slope_se'])})" if "slope_se" in row.columns else ""
    cov = cohort.covariate
    head = html.Div(className="cl-card-head", children=[
        html.Strong(f"Subject {short(subject)}"),
        html.Span(f"group {short(r['stratum_label'])}"),
        *([html.Span(f"{short(cov)} = {short(r['covariate'])}")] if cov else []),
        html.Span(f"{len(mine)} visits"),
        html.Span(f"fitted line: {fmt(r['intercept'])} + {fmt(r['slope'])}{se} × time"),
    ])
    visits = dash_table.DataTable(
        data=[{"time": round(float(t), 2), "response": round(float(y), 2)}
              for t, y in zip(mine["time"], mine["response"])],
        columns=[{"name": short(cohort.time_label), "id": "time"},
                 {"name": short(cohort.roles.response), "id": "response"}],
        fill_width=False,
        style_table={"maxHeight": "8rem", "overflowY": "auto"},
        style_cell={"fontFamily": "inherit", "fontSize": "14px", "padding": "2px 8px"})
    return [head, html.Div(visits, className="cl-card-visits")]


# ------------------------------------------------------------------ running
def run_server(*, data_path=None, roles: Roles | None = None, settings: Settings | None = None,
               host: str = "127.0.0.1", port: int = 8050, debug: bool = False,
               cache_mb: float = DEFAULT_CACHE_MB) -> None:
    """Serve the dashboard until interrupted (loopback only unless ``host`` says otherwise)."""
    from analysis.demo import DEMO_CSV

    logging.basicConfig(level=logging.INFO, format="%(levelname)s %(name)s: %(message)s")
    if data_path is None or Path(data_path) == DEMO_CSV:
        app = create_app(roles=roles, settings=settings, cache_mb=cache_mb)
    else:
        frame, renamed = shorten_columns(read_table(data_path))
        if renamed:
            print(f"cohortlens: {renamed_note(renamed)}")
        app = create_app(dataset=Dataset.from_frame(frame, name=Path(data_path).name),
                         roles=roles, settings=settings, cache_mb=cache_mb)
    if host not in ("127.0.0.1", "localhost", "::1"):
        print(f"cohortlens: WARNING binding {host}: other computers on the network can reach "
              "this dashboard and its data.")
    print(f"cohortlens: open http://{'127.0.0.1' if host == '0.0.0.0' else host}:{port}/ "
          "(Ctrl+C stops it). Exploratory research statistics, not for individual care "
          "decisions.", flush=True)
    app.run(host=host, port=port, debug=bool(debug))
