"""The settings file: every choice of an analysis (settings, column roles, model choices) as
one JSON document, written by the page's export and read by the page's import and by the
command line's ``--settings FILE.json``.

Schema (every part optional but ``settings``; a flat object of settings is read as
``{"settings": ...}``, so older files and a ``summarize`` output still work)::

    {"settings": {...Settings fields...},
     "roles":    {...Roles fields...},
     "models":   {...ModelChoices fields...}}

Reading checks each part with its own class and names the key that is wrong
(``settings.min_visits``, ``roles.subject``, ``models.correlation``).
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

from .errors import CohortError, SettingsError
from .settings import Roles, Settings

#: the top-level keys of a settings file (anything else, e.g. a summarize output's results,
#: is ignored when "settings" is present)
PARTS: tuple[str, ...] = ("settings", "roles", "models")


@dataclass(frozen=True)
class SettingsDocument:
    """A read settings file.

    Attributes
    ----------
    settings : dict
        The settings as written (a partial dict is completed by the reader's own base, e.g.
        the demo's settings on the command line); :meth:`full_settings` validates them.
    roles : Roles or None
    models : ModelChoices or None
    """

    settings: dict
    roles: Roles | None
    models: Any | None

    def full_settings(self, base: Settings | None = None) -> Settings:
        """The settings over ``base`` (default: the declared defaults), validated."""
        merged = {**(base or Settings()).to_dict(), **self.settings}
        return _settings(merged, "settings")


def settings_document(settings: Settings, roles: Roles | None = None, models=None) -> dict:
    """The JSON-ready document for these choices (the exported file's content)."""
    doc: dict = {"settings": settings.to_dict()}
    if roles is not None:
        doc["roles"] = roles.to_dict()
    if models is not None:
        doc["models"] = models.to_dict()
    return doc


def settings_text(settings: Settings, roles: Roles | None = None, models=None) -> str:
    """:func:`settings_document` as indented JSON text with a final newline."""
    return json.dumps(settings_document(settings, roles, models), indent=2,
                      allow_nan=False) + "\n"


def read_settings_document(source: str | bytes | dict, *, name: str = "settings file"
                           ) -> SettingsDocument:
    """Parse and check a settings file (its text, bytes or parsed object).

    Raises
    ------
    SettingsError
        Naming the file and the key that is wrong (``field`` is the settings field, "roles",
        "models" or "settings").
    """
    loaded = source
    if isinstance(source, (bytes, bytearray)):
        try:
            source = bytes(source).decode("utf-8-sig")
        except UnicodeDecodeError:
            raise SettingsError(f"{name}: not a text file (expected JSON in UTF-8)",
                                field="settings") from None
    if isinstance(source, str):
        try:
            loaded = json.loads(source)
        except json.JSONDecodeError as exc:
            raise SettingsError(f"{name}: not valid JSON (line {exc.lineno}, column "
                                f"{exc.colno}: {exc.msg})", field="settings") from None
    if not isinstance(loaded, dict):
        raise SettingsError(f"{name}: expected a JSON object with the keys "
                            f"{', '.join(repr(p) for p in PARTS)}, found a "
                            f"{json_kind(loaded)}", field="settings")
    if "settings" not in loaded:
        loaded = {"settings": loaded}                     # a flat object of settings
    part = loaded["settings"]
    if not isinstance(part, dict):
        raise SettingsError(f"{name}: key 'settings' must be a JSON object of setting: value "
                            f"pairs, found a {json_kind(part)}", field="settings")
    known = set(Settings.__dataclass_fields__)
    extra = sorted(map(str, set(part) - known))
    if extra:
        raise SettingsError(f"{name}: unknown key 'settings.{extra[0]}'; the known settings "
                            f"are {', '.join(sorted(known))}", field="settings")
    try:
        _settings({**Settings().to_dict(), **part}, "settings")
    except SettingsError as exc:
        raise SettingsError(f"{name}: {exc}", field=exc.field) from None
    roles = models = None
    if loaded.get("roles") is not None:
        roles = _roles(loaded["roles"], name)
    if loaded.get("models") is not None:
        models = _models(loaded["models"], name)
    return SettingsDocument(settings=dict(part), roles=roles, models=models)


# ------------------------------------------------------------------ per part
def _settings(d: dict, prefix: str) -> Settings:
    """Settings from a complete dict; a problem names its key ``settings.FIELD``."""
    try:
        return Settings.from_dict(d)
    except SettingsError as exc:
        field = getattr(exc, "field", None) or "settings"
        raise SettingsError(f"key '{prefix}.{field}': {exc}", field=field) from None
    except (TypeError, ValueError) as exc:
        raise SettingsError(f"key '{prefix}': {exc}", field="settings") from None


def _roles(d, name: str) -> Roles:
    if not isinstance(d, dict):
        raise SettingsError(f"{name}: key 'roles' must be a JSON object of role: column pairs, "
                            f"found a {json_kind(d)}", field="roles")
    known = set(Roles.__dataclass_fields__)
    for key in sorted(map(str, set(d) - known)):
        raise SettingsError(f"{name}: unknown key 'roles.{key}'; the known roles are "
                            f"{', '.join(sorted(known))}", field="roles")
    for key in ("subject", "time", "response"):
        if not d.get(key):
            raise SettingsError(f"{name}: key 'roles.{key}' is missing; it names the {key} "
                                "column", field="roles")
    for key in sorted(d):
        value = d[key]
        if key == "covariates":
            ok = isinstance(value, list) and all(isinstance(c, str) for c in value)
            kind = "a list of column names"
        elif key == "labels":
            ok = value is None or (isinstance(value, dict)
                                   and all(isinstance(v, str) for v in value.values()))
            kind = "an object of column: display label pairs"
        else:
            ok = value is None or isinstance(value, str)
            kind = "a column name (text)"
        if not ok:
            raise SettingsError(f"{name}: key 'roles.{key}' must be {kind}, found a "
                                f"{json_kind(value)}", field="roles")
    try:
        return Roles.from_dict(d)
    except CohortError as exc:
        raise SettingsError(f"{name}: key 'roles': {exc}", field="roles") from None


def _models(d, name: str):
    from .models.modelstage import ModelChoices

    if not isinstance(d, dict):
        raise SettingsError(f"{name}: key 'models' must be a JSON object of model choices, "
                            f"found a {json_kind(d)}", field="models")
    known = {f for f in ModelChoices.__dataclass_fields__}
    for key in sorted(map(str, set(d) - known)):
        raise SettingsError(f"{name}: unknown key 'models.{key}'; the known model choices are "
                            f"{', '.join(sorted(known))}", field="models")
    for key in sorted(d):                                 # each alone, to name the wrong key
        try:
            ModelChoices.from_dict({key: d[key]})
        except (CohortError, TypeError, ValueError) as exc:
            raise SettingsError(f"{name}: key 'models.{key}': {exc}", field="models") from None
    try:
        return ModelChoices.from_dict(d)
    except (CohortError, TypeError, ValueError) as exc:
        raise SettingsError(f"{name}: key 'models': {exc}", field="models") from None


def json_kind(value) -> str:
    """How JSON calls a parsed value ('list', 'text', 'number' ...)."""
    if isinstance(value, bool):
        return "true/false value"
    return {list: "list", str: "text", int: "number", float: "number", dict: "object",
            type(None): "null"}.get(type(value), type(value).__name__)
