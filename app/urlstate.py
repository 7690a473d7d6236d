"""Every setting, the column roles, the data key and the view choices in the URL query string.

A copied link reopens the same view: :func:`encode` writes only what differs
from the server's start-up defaults; :func:`decode` validates each parameter on
its own, reports what it could not use and falls back to the default for it.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from urllib.parse import parse_qs, parse_qsl, urlencode

from analysis.errors import CohortError
from analysis.settings import DECLARED, Roles, Settings

#: view choices that are not analysis settings (kept in the URL too)
VIEW_DEFAULTS: dict = {"draw": 40, "seed": 1, "order": "slope"}
LINE_ORDERS: tuple[str, ...] = ("slope", "intercept", "covariate", "subject")
MAX_DRAW = 500
MAX_SEED = 10**9

_LABEL_PARAM = "label"
_ROLE_PARAMS = {"subject": "col-subject", "time": "col-time", "response": "col-response",
                "event_date": "col-event", "covariates": "col-cov", "followup_end": "col-fu-end"}


#: presentation mode in the page address (``present=1``; anything else or absent: off)
PRESENT_PARAM = "present"


def present_flag(query: str | None) -> bool:
    """Whether a query string asks for presentation mode."""
    values = parse_qs((query or "").lstrip("?"), keep_blank_values=True).get(PRESENT_PARAM)
    return bool(values) and values[-1].strip().lower() in ("1", "true", "yes", "on")


def with_present(query: str | None, on: bool) -> str:
    """The same query string with presentation mode on or off (every other part kept, in
    order)."""
    pairs = [(k, v) for k, v in parse_qsl((query or "").lstrip("?"), keep_blank_values=True)
             if k != PRESENT_PARAM]
    if on:
        pairs.append((PRESENT_PARAM, "1"))
    return "?" + urlencode(pairs) if pairs else ""


def param_name(field_name: str) -> str:
    """The query parameter of a Settings field (kebab-case)."""
    return field_name.replace("_", "-")


@dataclass(frozen=True)
class UrlState:
    """What a query string asks for, after validation."""

    data_key: str | None
    roles: Roles | None
    settings: Settings
    view: dict = field(default_factory=lambda: dict(VIEW_DEFAULTS))
    subject: str | None = None
    stratum: str | None = None
    problems: tuple[str, ...] = ()
    present: bool = False          # presentation mode (app/presentation.py)


# ----------------------------------------------------------------- encode
def encode(*, data_key: str | None, roles: Roles | None, settings: Settings,
           base: Settings | None = None, base_roles: Roles | None = None,
           view: dict | None = None, subject: str | None = None,
           stratum: str | None = None, present: bool = False) -> str:
    """Query string ('?a=1&b=2', or '' when everything is at its default)."""
    base = base or Settings()
    pairs: list[tuple[str, str]] = []
    if data_key:
        pairs.append(("data", data_key))
    if roles is not None and roles != base_roles:
        for name, param in _ROLE_PARAMS.items():
            value = getattr(roles, name)
            if name == "covariates":
                pairs.extend((param, c) for c in value)
            elif value:
                pairs.append((param, value))
        # display labels: one "label=COLUMN=TEXT" each
        pairs.extend((_LABEL_PARAM, f"{c}={t}") for c, t in roles.labels)
    now, ref = settings.to_dict(), base.to_dict()
    for f in fields(Settings):
        if now[f.name] != ref[f.name]:
            pairs.append((param_name(f.name), _format_value(f.name, now[f.name])))
    for key, default in VIEW_DEFAULTS.items():
        value = (view or {}).get(key, default)
        if value != default:
            pairs.append((key, str(value)))
    if subject:
        pairs.append(("focus", str(subject)))
    if stratum:
        pairs.append(("stratum", str(stratum)))
    if present:
        pairs.append((PRESENT_PARAM, "1"))
    return "?" + urlencode(pairs) if pairs else ""


def _format_value(name: str, value) -> str:
    if value is None:
        return "none"
    if DECLARED[name].kind == "breaks":
        return ",".join(_num(v) for v in value)
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, float):
        return _num(value)
    return str(value)


def _num(v: float) -> str:
    return str(int(v)) if float(v).is_integer() else repr(float(v))


# ----------------------------------------------------------------- decode
def decode(query: str | None, *, base: Settings | None = None,
           base_roles: Roles | None = None, base_data: str | None = None) -> UrlState:
    """Parse and validate a query string; unusable parts are reported and left at their default."""
    base = base or Settings()
    params = parse_qs((query or "").lstrip("?"), keep_blank_values=True)
    problems: list[str] = []

    def one(name: str) -> str | None:
        values = params.get(name)
        return values[-1] if values else None

    data_key = one("data") or base_data
    roles = _decode_roles(params, base_roles, problems)

    changes: dict = {}
    for f in fields(Settings):
        text = one(param_name(f.name))
        if text is None:
            continue
        try:
            changes[f.name] = _parse_setting(f.name, text)
        except ValueError as exc:
            problems.append(f"The link's {param_name(f.name)}={text} was not used "
                            f"({DECLARED[f.name].label}: {exc}); the start-up value is kept.")
    settings = _combine(base, changes, problems)

    view = dict(VIEW_DEFAULTS)
    for key in ("draw", "seed"):
        text = one(key)
        if text is None:
            continue
        try:
            value = int(text)
            if not (1 <= value <= (MAX_DRAW if key == "draw" else 10**9)):
                raise ValueError
            view[key] = value
        except ValueError:
            upper = MAX_DRAW if key == "draw" else 10**9
            problems.append(f"link setting '{key}={text}': expected a whole number from 1 to "
                            f"{upper}; the default is used")
    order = one("order")
    if order is not None:
        if order in LINE_ORDERS:
            view["order"] = order
        else:
            problems.append(f"link setting 'order={order}': expected one of "
                            f"{', '.join(LINE_ORDERS)}; the default is used")
    return UrlState(data_key=data_key, roles=roles, settings=settings, view=view,
                    subject=one("focus") or None, stratum=one("stratum") or None,
                    problems=tuple(problems), present=present_flag(query))


def _decode_roles(params: dict, base_roles: Roles | None, problems: list) -> Roles | None:
    given = {name: params.get(param) for name, param in _ROLE_PARAMS.items()}
    if not any(given.values()):
        return base_roles
    d = {name: (v[-1] if v else None) for name, v in given.items() if name != "covariates"}
    d["covariates"] = tuple(c for c in (given["covariates"] or []) if c)
    missing = [n for n in ("subject", "time", "response") if not d.get(n)]
    if missing:
        problems.append("the link names column roles but not " + ", ".join(missing)
                        + "; choose them under Data")
        return None
    labels = {}
    for item in params.get(_LABEL_PARAM) or []:
        column, sep, text = item.partition("=")
        if sep and column:
            labels[column] = text
        else:
            problems.append(f"link display label '{item}': expected COLUMN=LABEL; left out")
    return Roles(subject=d["subject"], time=d["time"], response=d["response"],
                 covariates=d["covariates"], event_date=d.get("event_date") or None,
                 followup_end=d.get("followup_end") or None, labels=labels)


def _parse_setting(name: str, text: str):
    """A link parameter's value as its declaration reads it (ranges are left to Settings, but
    for the smallest count)."""
    text = text.strip()
    decl = DECLARED[name]
    kind = decl.kind
    if kind == "choice":
        if text not in decl.choices:
            raise ValueError(f"expected one of {', '.join(decl.choices)}")
        return text
    if kind == "count":
        try:
            value = int(text)
        except ValueError:
            raise ValueError("expected a whole number") from None
        if value < decl.lo:
            raise ValueError(f"expected a whole number >= {decl.lo:g}")
        return value
    if kind == "switch":
        if text.lower() in ("1", "true", "yes", "on"):
            return True
        if text.lower() in ("0", "false", "no", "off"):
            return False
        raise ValueError("expected 1 or 0")
    if kind == "number":
        if decl.optional and text.lower() in ("", "none"):
            return None
        return _finite(text)
    if kind in ("column", "date"):            # a date is checked by Settings
        return None if text.lower() in ("", "none") else text
    if kind == "center":
        return text if text in decl.choices else _finite(text)
    if kind == "breaks":
        if not text:
            return ()
        return tuple(_finite(t) for t in text.split(","))
    raise ValueError("unknown setting")  # pragma: no cover - every kind is handled above


def _finite(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise ValueError("expected a number") from None
    if not math.isfinite(value):
        raise ValueError("expected a finite number")
    return value


def _combine(base: Settings, changes: dict, problems: list) -> Settings:
    """Apply all changes if they are valid together; otherwise keep those that are, in order."""
    try:
        return base.replace(**changes)
    except CohortError:
        pass
    settings = base
    for name, value in changes.items():
        try:
            settings = settings.replace(**{name: value})
        except CohortError as exc:
            problems.append(f"The link's {param_name(name)} was not used: {exc} The start-up "
                            "value is kept.")
    return settings
