"""The state hub: the one callback that owns the URL, the loaded-data key, the role
dropdowns, the settings controls and the highlight (subject, group).

Dash only allows a circular link (URL ⇄ controls) inside a single callback, so
this is it. It dispatches on what triggered it to small pure functions:

* page load / back-forward  → decode the URL and set every control;
* upload / demo button      → store the table, offer its columns, keep roles that fit;
* any control or click      → write the URL (settings only when they are valid).
"""
from __future__ import annotations

import base64
import math

from dash import Input, Output, State, ctx, no_update

from analysis.errors import CohortError
from analysis.preparation.loading import read_table
from analysis.settings import DECLARED, Settings

from . import controls as ctl
from . import ids, urlstate
from .session import AppContext, attempt
from .views import render_key
from .text import clip_message, echo, option, renamed_note, short, shorten_columns

PREVIEW_ROWS = 6
_SETTING_KEYS = (*ids.SETTING_FIELDS, "center_value")
_SETTING_IDS = {**ids.SETTING_INPUT, "center_value": ids.SETTING_CENTER_VALUE}
#: settings whose dropdown lists the chosen covariate columns
_COLUMN_SETTINGS = tuple(n for n, d in DECLARED.items() if d.kind == "column")
_VIEW_IDS = {"draw": ids.COURSE_DRAW, "seed": ids.COURSE_SEED, "order": ids.LINES_ORDER}
_CLICK_GRAPHS = ids.SUBJECT_CLICK_GRAPHS


def register(app, context: AppContext) -> None:
    outputs = dict(
        search=Output(ids.PAGE_URL, "search"),
        data=Output(ids.STORE_DATA, "data"),
        title=Output(ids.PAGE_TITLE, "children"),
        data_name=Output(ids.DATA_NAME, "children"),
        upload_msg=Output(ids.DATA_UPLOAD_MSG, "children"),
        alert=Output(ids.PAGE_ALERT, "children"),
        preview=Output(ids.DATA_PREVIEW, "data"),
        preview_cols=Output(ids.DATA_PREVIEW, "columns"),
        role_options={r: Output(ids.ROLE_INPUT[r], "options") for r in ids.ROLE_FIELDS},
        roles={r: Output(ids.ROLE_INPUT[r], "value") for r in ids.ROLE_FIELDS},
        labels={r: Output(ids.ROLE_LABEL[r], "value") for r in ids.LABEL_ROLES},
        settings={k: Output(_SETTING_IDS[k], "value") for k in _SETTING_KEYS},
        view={k: Output(i, "value") for k, i in _VIEW_IDS.items()},
        covariate_options={f: Output(ids.SETTING_INPUT[f], "options")
                           for f in _COLUMN_SETTINGS},
        stratum=Output(ids.LINK_STRATA, "value"),
        subject=Output(ids.STORE_SUBJECT, "data"),
        # the stores the views read, written here with the controls they come from (no
        # second round trip relaying the controls to the stores)
        roles_store=Output(ids.STORE_ROLES, "data"),
        settings_store=Output(ids.STORE_SETTINGS, "data"),
        settings_msgs={f: Output(ids.SETTING_MSG[f], "children") for f in ids.SETTING_FIELDS},
        settings_status=Output(ids.SETTINGS_STATUS, "children"),
        stage_keys={s: Output(k, "data") for s, k in ids.STAGE_KEY.items()},
    )
    inputs = dict(
        search=Input(ids.PAGE_URL, "search"),
        upload=Input(ids.DATA_UPLOAD, "contents"),
        demo=Input(ids.DATA_USE_DEMO, "n_clicks"),
        reset=Input(ids.SETTINGS_RESET, "n_clicks"),
        roles={r: Input(ids.ROLE_INPUT[r], "value") for r in ids.ROLE_FIELDS},
        labels={r: Input(ids.ROLE_LABEL[r], "value") for r in ids.LABEL_ROLES},
        settings={k: Input(_SETTING_IDS[k], "value") for k in _SETTING_KEYS},
        view={k: Input(i, "value") for k, i in _VIEW_IDS.items()},
        stratum=Input(ids.LINK_STRATA, "value"),
        clicks={g: Input(g, "clickData") for g in _CLICK_GRAPHS},
        stratum_click=Input(ids.RATE_STRATA_GRAPH, "clickData"),
        clear=Input(ids.LINK_CLEAR, "n_clicks"),
    )
    state = dict(
        filename=State(ids.DATA_UPLOAD, "filename"),
        data=State(ids.STORE_DATA, "data"),
        subject=State(ids.STORE_SUBJECT, "data"),
        good=State(ids.STORE_SETTINGS, "data"),
        roles_now=State(ids.STORE_ROLES, "data"),
        stage_keys={s: State(k, "data") for s, k in ids.STAGE_KEY.items()},
    )

    @app.callback(output=outputs, inputs=inputs, state=state)
    def hub(search, upload, demo, reset, roles, labels, settings, view, stratum, clicks,
            stratum_click, clear, filename, data, subject, good, roles_now, stage_keys):
        out = route(search, upload, demo, reset, roles, labels, settings, view, stratum, clicks,
                    stratum_click, clear, filename, data, subject, good)
        if out is None:      # the address echoed back: nothing changed
            return _unchanged(outputs)
        write_stores(context, ctx.triggered_id, roles, labels, settings, out)
        write_stage_keys(context, out, data=data, roles=roles_now, settings=good,
                         current=stage_keys)
        return out

    def route(search, upload, demo, reset, roles, labels, settings, view, stratum, clicks,
              stratum_click, clear, filename, data, subject, good):
        out = _unchanged(outputs)
        trig = ctx.triggered_id
        roles = {**roles, "labels": dict(labels or {})}
        now = dict(data=data, roles=roles, settings=settings, view=view, stratum=stratum,
                   subject=subject, good=good, present=urlstate.present_flag(search))
        if (trig == ids.PAGE_URL and data is not None
                and _same_query(search, _encode(context, now))):
            # Location echoes every query this callback writes back as a new input:
            # nothing to restore (re-setting every control would undo the user's change)
            return None
        if (trig is None or trig == ids.PAGE_URL
                or (not data and trig not in (ids.DATA_UPLOAD, ids.DATA_USE_DEMO))):
            # also when a control fires before the first load's response arrived: Dash
            # drops that response as stale, so this call must load the page instead
            _from_url(context, search, out, current=data)
            return out
        if trig == ids.DATA_UPLOAD:
            if not _from_upload(context, upload, filename, now, out):
                return out
        elif trig == ids.DATA_USE_DEMO:
            _show_dataset(context, context.default_key, context.default_roles, out)
            now.update(data=out["data"], roles=_shown_roles(out), subject=None, stratum=None)
            out["subject"], out["stratum"] = None, None
            # the start-up table comes back with its own start-up choices
            _reset_for_new_data(settings, context.default_settings, out, now)
        elif trig == ids.SETTINGS_RESET:
            values = ctl.control_values(context.default_settings)
            out["settings"] = {k: values[k] for k in _SETTING_KEYS}
            now["settings"] = out["settings"]
        elif trig in ids.ROLE_LABEL.values():
            pass                                  # a display label: only the address changes
        elif trig in ids.ROLE_INPUT.values():
            _fit_covariate_choices(roles, settings, out, now)
            shown, _ = ctl.roles_from_controls(roles, known=context.default_roles)
            opts = _covariate_options(roles.get("covariates"), shown)
            out["covariate_options"] = {f: opts for f in _COLUMN_SETTINGS}
        elif trig in _CLICK_GRAPHS:
            picked = clicked_subject(clicks.get(trig))
            if picked is None or not _analysed_subject(context, data, roles, settings, picked,
                                                       good):
                return out   # a click on a mean curve, a smooth or a band names no subject
            now["subject"] = out["subject"] = picked
        elif trig == ids.RATE_STRATA_GRAPH:
            label = clicked_stratum(stratum_click)
            if label is None:
                return out
            now["stratum"] = out["stratum"] = None if label == stratum else label
        elif trig == ids.LINK_CLEAR:
            now["subject"] = now["stratum"] = out["subject"] = out["stratum"] = None
        out["search"] = _encode(context, now)
        return out


def write_stores(context: AppContext, trig, roles: dict, labels: dict, settings: dict,
                 out: dict) -> None:
    """Set the roles and settings stores (and the settings' messages) in ``out`` when a role,
    a display label or a setting control changed or ``out`` itself sets some: the views read
    the stores, so they start from this one response."""
    set_roles = {r: v for r, v in out["roles"].items() if v is not no_update}
    set_labels = {r: v for r, v in out["labels"].items() if v is not no_update}
    if (trig in ids.ROLE_INPUT.values() or trig in ids.ROLE_LABEL.values() or set_roles
            or set_labels):
        values = {r: set_roles.get(r, (roles or {}).get(r)) for r in ids.ROLE_FIELDS}
        values["labels"] = {r: set_labels.get(r, (labels or {}).get(r)) for r in ids.LABEL_ROLES}
        r, problems = ctl.roles_from_controls(values, known=context.default_roles)
        out["roles_store"] = {"roles": r.to_dict() if r else None, "problems": problems}
    set_settings = {k: v for k, v in out["settings"].items() if v is not no_update}
    if trig in _SETTING_IDS.values() or set_settings:
        values = {k: set_settings.get(k, (settings or {}).get(k)) for k in _SETTING_KEYS}
        s, problems = ctl.settings_from_controls(values, fallback=context.default_settings)
        out["settings_msgs"] = {f: problems.get(f, "") for f in ids.SETTING_FIELDS}
        if s is None:
            out["settings_status"] = ("Fix the marked choice; the views keep the last valid "
                                      "choices.")
        else:
            out["settings_store"] = s.to_dict()
            out["settings_status"] = ""


def write_stage_keys(context: AppContext, out: dict, *, data, roles, settings,
                     current: dict) -> None:
    """Set each stage's key store in ``out`` when what the stage's views draw from changes
    with this response (data, roles or that stage's settings); others stay, so their views
    are not called at all."""
    def now(name, before):
        value = out.get(name, no_update)
        return before if value is no_update else value

    data, roles = now("data", data), now("roles_store", roles)
    settings = now("settings_store", settings)
    out["stage_keys"] = {}
    for stage, before in current.items():
        key = render_key(context, stage, data, roles, settings)
        out["stage_keys"][stage] = no_update if key == before else key


def _unchanged(spec):
    if isinstance(spec, dict):
        return {k: _unchanged(v) for k, v in spec.items()}
    return no_update


# ------------------------------------------------------------------ dispatch targets
def _from_url(context: AppContext, search: str | None, out: dict, current=None) -> None:
    state = urlstate.decode(search, base=context.default_settings,
                            base_roles=context.default_roles, base_data=context.default_key)
    problems = list(state.problems)
    key = state.data_key
    if key not in context.datasets:
        problems.insert(0, "The link refers to a table this server does not hold (uploads are "
                           "kept in memory only, and not after a restart); showing the start-up "
                           "table instead. Upload the file again to continue.")
        key = context.default_key
        roles = context.default_roles
    else:
        roles = state.roles
    # this session's own name for the table when it already shows it (never another session's)
    same = isinstance(current, dict) and current.get("key") == key
    _show_dataset(context, key, roles, out, name=current.get("name") if same else None)
    values = ctl.control_values(state.settings)
    out["settings"] = {k: values[k] for k in _SETTING_KEYS}
    out["view"] = dict(state.view)
    out["stratum"] = state.stratum
    out["subject"] = state.subject
    out["alert"] = _problem_list(problems)


def _from_upload(context: AppContext, contents, filename, now: dict, out: dict) -> bool:
    if not contents:
        return False
    name = filename or "uploaded file"

    def load():
        raw = decode_upload(contents, name)
        frame, renamed = shorten_columns(read_table(raw, name=name))
        return context.datasets.add(frame, name=name), renamed

    loaded, message, _ = attempt(load, what=f"reading {name}")
    if loaded is None:
        out["upload_msg"] = clip_message(f"Could not use {echo(name)}: {message}")
        return False
    dataset, renamed = loaded
    current = now["roles"]
    roles, _ = ctl.roles_from_controls(current, known=context.default_roles)
    keep = ctl.keep_roles_that_fit(roles, dataset.frame.columns)
    _show_dataset(context, dataset.key, keep, out, name=name)
    out["upload_msg"] = clip_message(renamed_note(renamed))
    out["subject"], out["stratum"] = None, None
    now.update(data=out["data"], roles=_shown_roles(out), subject=None, stratum=None)
    # choices that described the previous table (its window, transform, centring, groups ...)
    # start again from the neutral defaults, and the page says which
    _reset_for_new_data(now["settings"], Settings(), out, now)
    return True


def _reset_for_new_data(values: dict, target: Settings, out: dict, now: dict) -> None:
    changed, notes = ctl.reset_per_dataset(values or {}, target)
    if not changed:
        return
    for k, v in changed.items():
        out["settings"][k] = v
    now["settings"] = {**(values or {}), **changed}
    out["alert"] = reset_note(notes)


def reset_note(notes: list[str]):
    """The visible note of what a new table put back to its default."""
    from dash import html

    return html.Div(className="cl-reset-note", children=[
        html.Strong("New data: these choices described the previous table and are back at "
                    "their defaults — "),
        html.Span("; ".join(notes) + ".")])


def _show_dataset(context: AppContext, key: str, roles, out: dict, name: str | None = None
                  ) -> None:
    """Offer a stored table's columns; ``name`` is this session's file name for it (kept in its
    browser store, since the shared store deduplicates uploads by content)."""
    dataset = context.datasets.get(key)
    name = name or dataset.name
    described = context.workbench.describe(dataset)   # once per table, not per page load
    options = ctl.role_options(described)
    roles = ctl.keep_roles_that_fit(roles, dataset.frame.columns)
    out["data"] = {"key": dataset.key, "name": name}
    out["title"] = short(name)
    n_rows = getattr(dataset, "n_rows", 0)       # a Dask-served dataset: frame is a sample
    subjects = ""
    if n_rows:
        subjects = f", {dataset.n_subjects:,} subjects" if dataset.n_subjects else ""
        subjects += " (partitioned Parquet on a Dask cluster; preview of the first file)"
    elif roles is not None:
        subjects = f", {dataset.frame[roles.subject].nunique():,} subjects"
    out["data_name"] = (f"{short(name)}: {n_rows or len(dataset.frame):,} rows, "
                        f"{dataset.frame.shape[1]} columns{subjects}")
    out["role_options"] = {r: options for r in ids.ROLE_FIELDS}
    out["roles"] = ctl.role_values(roles)
    out["labels"] = ctl.label_values(roles)
    # with their values in the same response, so the dropdowns never drop a choice
    # that their options do not list yet
    opts = _covariate_options(out["roles"]["covariates"], roles)
    out["covariate_options"] = {f: opts for f in _COLUMN_SETTINGS}
    out["preview"], out["preview_cols"] = preview(dataset.frame, described)
    out["upload_msg"] = ""


def _shown_roles(out: dict) -> dict:
    """The role controls' values as just set (dropdowns and display labels)."""
    return {**out["roles"], "labels": out["labels"]}


def _fit_covariate_choices(roles: dict, settings: dict, out: dict, now: dict) -> None:
    """When the covariate list changes, forget covariate choices that are no longer in it."""
    covs = set(roles.get("covariates") or [])
    changed = dict(settings)
    for f in _COLUMN_SETTINGS:
        if settings.get(f) and settings[f] not in covs:
            changed[f] = None
            out["settings"][f] = None
    now["settings"] = changed


def _settings_in_force(context: AppContext, values: dict, good):
    """The settings the controls show, or while one of them holds a bad value, the last good
    ones (the settings store), so that a group, a subject and the address still follow."""
    settings, _ = ctl.settings_from_controls(dict(values or {}),
                                             fallback=context.default_settings)
    if settings is None and isinstance(good, dict):
        try:
            settings = Settings.from_dict(good)
        except CohortError:
            settings = None
    return settings


def _encode(context: AppContext, now: dict):
    settings = _settings_in_force(context, now["settings"], now.get("good"))
    if settings is None:
        return no_update
    roles, _ = ctl.roles_from_controls(now["roles"], known=context.default_roles)
    key = (now["data"] or {}).get("key")
    view = {k: v for k, v in (now["view"] or {}).items() if v not in (None, "")}
    return urlstate.encode(
        data_key=None if key == context.default_key else key,
        roles=roles, base_roles=context.default_roles if key == context.default_key else None,
        settings=settings, base=context.default_settings, view=view,
        subject=now["subject"], stratum=now["stratum"], present=now.get("present", False))


# ------------------------------------------------------------------ small pure helpers
def _analysed_subject(context: AppContext, data, roles: dict, settings: dict, picked: str,
                      good=None) -> bool:
    """Whether ``picked`` is a subject of the analysed cohort (from the cached selection)."""
    r, _ = ctl.roles_from_controls(roles, known=context.default_roles)
    s = _settings_in_force(context, settings, good)
    dataset = context.datasets.get((data or {}).get("key"))
    if r is None or s is None or dataset is None:
        return False
    selection, _, _ = attempt(lambda: context.workbench.selection(dataset, r, s),
                              what="checking the clicked subject")
    return selection is not None and picked in set(map(str, selection.subject_ids))


def _covariate_options(covariates, roles=None) -> list[dict]:
    """Choices of the covariate and grouping dropdowns: the columns chosen as covariates, by
    their display labels when they have one."""
    name = roles.label if roles is not None else (lambda c: c)
    return [option(name(c) if name(c) == c else f"{name(c)} ({c})", c)
            for c in (covariates or [])]


def _same_query(a, b) -> bool:
    """Whether two query strings say the same (no_update means "nothing to write")."""
    if not isinstance(b, str):
        return False
    return (a or "").lstrip("?") == (b or "").lstrip("?")


def decode_upload(contents: str, name: str) -> bytes:
    """Bytes of a dcc.Upload data URL ('data:...;base64,....')."""
    try:
        _, b64 = contents.split(",", 1)
        return base64.b64decode(b64)
    except (ValueError, TypeError) as exc:
        raise CohortError(f"{name}: the browser sent an unreadable upload ({exc})") from None


def preview(frame, described) -> tuple[list[dict], list[dict]]:
    """First rows as display strings, with column headers naming each column's kind."""
    head = frame.head(PREVIEW_ROWS)
    columns = [{"name": [short(c["name"]), c["kind"]], "id": str(i)}
               for i, c in enumerate(described)]
    rows = []
    for _, row in head.iterrows():
        rows.append({str(i): short(_cell(v)) for i, v in enumerate(row.tolist())})
    return rows, columns


def _cell(v) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return ""
    try:
        import pandas as pd
        if pd.isna(v):
            return ""
    except (TypeError, ValueError):
        pass
    return str(v)


def clicked_subject(click: dict | None) -> str | None:
    """The subject id carried in a clicked point's customdata (first element if a list)."""
    if not click or not click.get("points"):
        return None
    cd = click["points"][0].get("customdata")
    if isinstance(cd, (list, tuple)):
        cd = cd[0] if cd else None
    return None if cd is None else str(cd)


def clicked_stratum(click: dict | None) -> str | None:
    """The group label of a clicked box/point in the slopes-by-group view."""
    if not click or not click.get("points"):
        return None
    p = click["points"][0]
    cd = p.get("customdata")
    if isinstance(cd, (list, tuple)) and len(cd) > 1:
        return str(cd[1])
    for key in ("x", "y"):
        v = p.get(key)
        if isinstance(v, str):
            return v
    return None


def _problem_list(problems):
    from dash import html

    if not problems:
        return ""
    return [html.Strong("Some parts of the link could not be used:"),
            html.Ul([html.Li(p) for p in problems])]
