"""Who is analysed: what each inclusion step removed, the status line and the group chips."""
from __future__ import annotations

import numpy as np
from dash import Input, Output, State, dash_table, html
from dash.dash_table.Format import Format

from analysis.errors import SettingsError
from analysis.settings import Roles
from analysis.preparation.strata import SMALL_GROUP_SHARE, SMALL_GROUP_SUBJECTS, small_groups

from .. import controls as ctl
from .. import ids, palette
from ..components import busy, section
from ..session import AppContext, attempt, role_of_column
from ..views import stage_call

ANCHOR = "section-kept"
NAV = "Who is analysed"


def layout(settings=None, max_upload_bytes=None):
    return section(ANCHOR, "Who is analysed",
                   "What each inclusion step removed, in order.",
                   busy(dash_table.DataTable(id=ids.KEPT_TABLE, style_as_list_view=True,
                                        style_cell={"fontFamily": "inherit", "fontSize": "16px",
                                                    "padding": "6px 10px", "textAlign": "right"},
                                        style_cell_conditional=[{"if": {"column_id": "step"},
                                                                 "textAlign": "left"}],
                                        style_header={"fontWeight": "600"})),
                   html.Ul(id=ids.KEPT_NOTES, className="cl-notes"))


def register(app, context: AppContext) -> None:
    """One callback: the cohort's attrition table, role/settings messages, status, chips."""
    @app.callback(
        output=dict(table=Output(ids.KEPT_TABLE, "data"), cols=Output(ids.KEPT_TABLE, "columns"),
                    notes=Output(ids.KEPT_NOTES, "children"),
                    role_msgs={r: Output(ids.ROLE_MSG[r], "children") for r in ids.ROLE_FIELDS},
                    settings_msg=Output(ids.SETTINGS_DATA_MSG, "children"),
                    status=Output(ids.ROLES_STATUS, "children"),
                    chips=Output(ids.LINK_STRATA, "options"),
                    size_note=Output(ids.STRATA_SIZE_NOTE, "children")),
        # called when the cohort stage's key changes (app/views.py stage_stores)
        inputs=dict(data=State(ids.STORE_DATA, "data"), roles=State(ids.STORE_ROLES, "data"),
                    settings=State(ids.STORE_SETTINGS, "data"),
                    stage_key=Input(ids.STAGE_KEY["cohort"], "data")))
    def cohort_panel(data, roles, settings, stage_key):
        out = dict(table=[], cols=[], notes=[], settings_msg="", status="", chips=[],
                   size_note="", role_msgs={r: "" for r in ids.ROLE_FIELDS})
        problems = (roles or {}).get("problems") or {}
        if problems:
            out["role_msgs"].update(problems)
            out["status"] = "The views appear once the subject, time and response are chosen."
            return out
        cohort, message, err = attempt(
            lambda: stage_call(context, "cohort", data, roles, settings),
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
    """One short line naming the small groups (see :func:`analysis.preparation.strata.small_groups`), or ""."""
    s = cohort.strata
    counts = s.counts
    small = small_groups(counts, int(s.codes.size))
    if small.size == 0:
        return ""
    names = ", ".join(f"{s.labels[j]} (n={int(counts[j]):,})" for j in small)
    return (f"Small group{'s' if small.size > 1 else ''}: {names}. Under {SMALL_GROUP_SUBJECTS} "
            f"subjects or {SMALL_GROUP_SHARE:.0%} of the cohort; consider fewer groups.")
