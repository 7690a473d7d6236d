"""Settings panel and role mapping: control values ⇄ Settings / Roles (pure functions).

The panel's controls are typed loosely (numbers may be None or text); these
functions turn them into a validated :class:`Settings` or per-control messages,
and back again when a link restores a view.
"""
from __future__ import annotations

import math

from analysis.errors import CohortError
from analysis.settings import PER_DATASET, DECLARED, Roles, Settings, allowed_text

from . import ids
from .text import short

ON = "on"

#: the panel's label of each setting (as declared in analysis.settings)
FIELD_LABELS = {name: decl.label for name, decl in DECLARED.items()}
#: controls whose value is a number typed by the user (None when blank)
NUMBER_FIELDS = tuple(n for n, d in DECLARED.items() if d.kind in ("count", "number"))
INT_FIELDS = tuple(n for n, d in DECLARED.items() if d.kind == "count")
CHECK_FIELDS = tuple(n for n, d in DECLARED.items() if d.kind == "switch")
#: fields that must have a value (blank means "use the default")
REQUIRED_NUMBERS = tuple(n for n in NUMBER_FIELDS if not DECLARED[n].optional)


def choice_labels(name: str) -> dict:
    """The page's wording of each choice of setting ``name``, in the page's order."""
    decl = DECLARED[name]
    return dict(decl.choice_labels or {c: c for c in decl.choices})


def control_values(settings: Settings) -> dict:
    """The value of each settings control that shows ``settings``."""
    d = settings.to_dict()
    out = {}
    for f in ids.SETTING_FIELDS:
        v = d[f]
        kind = DECLARED[f].kind
        if kind == "switch":
            out[f] = [ON] if v else []
        elif kind == "breaks":
            out[f] = ", ".join(_num(b) for b in v)
        elif kind == "center":
            out[f] = v if isinstance(v, str) else "value"
        else:
            out[f] = v
    out["center_value"] = None if isinstance(d["center"], str) else d["center"]
    return out


def settings_from_controls(values: dict, *, fallback: Settings | None = None
                           ) -> tuple[Settings | None, dict[str, str]]:
    """Build Settings from control values.

    Returns (settings or None, {field: message}); settings is None when any
    control holds something unusable.
    """
    fallback = fallback or Settings()
    messages: dict[str, str] = {}
    d: dict = {}
    for f in ids.SETTING_FIELDS:
        v = values.get(f)
        try:
            d[f] = _field_value(f, v, values, fallback)
        except ValueError as exc:
            messages[f] = str(exc)
    if messages:
        return None, messages
    try:
        return Settings.from_dict(d), {}
    except CohortError as exc:
        field = getattr(exc, "field", None)
        if field in DECLARED and not d[field] and DECLARED[field].needed_text:
            # another choice needs this blank one (custom groups need break points)
            return None, {field: DECLARED[field].needed_text}
        return None, {field if field in ids.SETTING_FIELDS else ids.SETTING_FIELDS[0]:
                      plain_message(str(exc))}


def _field_value(f: str, v, values: dict, fallback: Settings):
    kind = DECLARED[f].kind
    if kind == "switch":
        return bool(v) and ON in v
    if kind in ("count", "number"):
        step = DECLARED[f].panel_step
        needs = (f"{FIELD_LABELS[f]} must be {allowed_text(f)}"
                 f"{f', in steps of {_num(step)}' if step else ''}.")
        if v is None or v == "":
            # the browser sends an empty box, and a typed value outside the box's range, as
            # blank: say what is allowed
            if f in REQUIRED_NUMBERS:
                raise ValueError(needs)
            return None
        try:
            num = float(v)
        except (TypeError, ValueError):
            raise ValueError(needs) from None
        if not math.isfinite(num):
            raise ValueError(needs)
        if kind == "count":
            if not num.is_integer():
                raise ValueError(needs)
            return int(num)
        return num
    if kind == "breaks":
        text = (v or "").strip()
        if not text:
            return ()
        out = []
        for part in text.replace(";", ",").split(","):
            part = part.strip()
            if not part:
                continue
            try:
                out.append(float(part))
            except ValueError:
                raise ValueError(f"Break points: '{part}' is not a number; write them like "
                                 "10, 20, 40."
                                 ) from None
        return tuple(out)
    if kind == "center":
        if v == "value":
            cv = values.get("center_value")
            if cv is None or cv == "":
                raise ValueError("Centre at needs the value to centre at, a number.")
            return float(cv)
        return v or "none"
    if kind == "column":
        return v or None
    if kind == "date":
        return (v or "").strip() or None
    return v if v is not None else getattr(fallback, f)


def reset_per_dataset(values: dict, target: Settings) -> tuple[dict, list[str]]:
    """Control values with every setting that describes one table (declared ``per_dataset``)
    put back to ``target``'s, and a note per setting that changed ("Window to: 60 → none").

    ``values`` are the panel's control values (:func:`control_values`, plus ``center_value``);
    returns only the changed controls and the notes.
    """
    fresh = control_values(target)
    changed, notes = {}, []
    for name in PER_DATASET:
        keys = (name, "center_value") if DECLARED[name].kind == "center" else (name,)
        if all(_same_value(values.get(k), fresh[k]) for k in keys):
            continue
        for k in keys:
            changed[k] = fresh[k]
        notes.append(f"{FIELD_LABELS[name]}: {_shown(name, values, keys)} → "
                     f"{_shown(name, fresh, keys)}")
    return changed, notes


def _same_value(a, b) -> bool:
    blank = (None, "", [])
    if a in blank and b in blank:
        return True
    try:
        return float(a) == float(b)
    except (TypeError, ValueError):
        return a == b


def _shown(name: str, values: dict, keys) -> str:
    """A control's value in the panel's words (a choice's label, a number, "none")."""
    v = values.get(name)
    if DECLARED[name].kind == "center" and v == "value":
        v = values.get("center_value")
    if v in (None, "", []):
        return "none"
    labels = choice_labels(name) if DECLARED[name].choices else {}
    if isinstance(v, str) and v in labels:
        return labels[v]
    if isinstance(v, (int, float)) and not isinstance(v, bool):
        return _num(v)
    return str(v)


def plain_message(message: str) -> str:
    """A settings message as the panel shows it: the declarations already word their messages
    with the panel's labels (analysis.settings); an older "name ==" form still reads as one."""
    for f in ids.SETTING_FIELDS:
        message = message.replace(f"{f} ==", f"{FIELD_LABELS[f]} is")
    return message


def _num(v: float) -> str:
    return str(int(v)) if float(v).is_integer() else f"{v:g}"


# ------------------------------------------------------------------- roles
def role_values(roles: Roles | None) -> dict:
    """The value of each role dropdown that shows ``roles``."""
    if roles is None:
        return {r: ([] if r == "covariates" else None) for r in ids.ROLE_FIELDS}
    return {"subject": roles.subject, "time": roles.time, "event_date": roles.event_date,
            "response": roles.response, "covariates": list(roles.covariates),
            "followup_end": roles.followup_end}


def roles_from_controls(values: dict, *, known: Roles | None = None
                        ) -> tuple[Roles | None, dict[str, str]]:
    """Roles from dropdown values, or None and a message beside each missing role.

    The dropdowns name columns only; units come from ``known`` (the start-up roles)
    for the response and primary covariate when the same columns are chosen.
    """
    messages = {}
    for r, word in (("subject", "the subject identifier"), ("time", "time or visit date"),
                    ("response", "the measured response")):
        if not values.get(r):
            messages[r] = f"Choose the column that holds {word}."
    if messages:
        return None, messages
    picked = [values["subject"], values["time"], values["response"]]
    if len(set(picked)) < 3:
        return None, {"response": "Subject, time and response must be three different columns."}
    covs = tuple(c for c in (values.get("covariates") or []) if c not in picked)
    units = {}
    if known is not None:
        if known.response == values["response"]:
            units["response_unit"] = known.response_unit
        if covs and known.covariates and known.covariates[0] == covs[0]:
            units["covariate_unit"] = known.covariate_unit
    roles = Roles(subject=values["subject"], time=values["time"], response=values["response"],
                  covariates=covs, event_date=values.get("event_date") or None,
                  followup_end=values.get("followup_end") or None, **units)
    return roles.__class__(**{**roles.__dict__,
                              "labels": _labels(roles, values.get("labels"), known)}), {}


def _label_column(roles: Roles, role: str) -> str | None:
    """The column a role's label field names (the primary covariate for the covariates)."""
    if role == "covariates":
        return roles.covariates[0] if roles.covariates else None
    return getattr(roles, role)


def _labels(roles: Roles, typed: dict | None, known: Roles | None) -> dict:
    """Display labels: the start-up roles' labels of the chosen columns, then what the label
    fields say (a field left blank means the column name)."""
    used = set(roles.columns())
    out = {c: t for c, t in (known.labels if known is not None else ()) if c in used}
    if typed is None:
        return out
    for role in ids.LABEL_ROLES:
        column = _label_column(roles, role)
        if column is None:
            continue
        text = (typed.get(role) or "").strip()
        if text:
            out[column] = text
        else:
            out.pop(column, None)
    return out


def label_values(roles: Roles | None) -> dict:
    """The value of each role's label field that shows ``roles`` (blank: the column name)."""
    out = {}
    for role in ids.LABEL_ROLES:
        column = None if roles is None else _label_column(roles, role)
        label = None if column is None else roles.label(column)
        out[role] = "" if label in (None, column) else label
    return out


def keep_roles_that_fit(roles: Roles | None, columns) -> Roles | None:
    """The same roles if every named column exists in ``columns``, else None."""
    if roles is None:
        return None
    cols = set(columns)
    return roles if set(roles.columns()) <= cols else None


def role_options(described: list[dict]) -> list[dict]:
    """Dropdown options naming each column with its kind and missing count."""
    out = []
    for c in described:
        miss = f", {c['n_missing']} missing" if c["n_missing"] else ""
        out.append({"label": f"{short(c['name'])}  ({c['kind']}{miss})", "value": c["name"],
                    "title": str(c["name"])})
    return out


def choice_options(labels: dict) -> list[dict]:
    return [{"label": text, "value": value} for value, text in labels.items()]
