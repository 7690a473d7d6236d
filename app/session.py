"""What one running app holds (data store, result cache, start-up defaults) and the
helpers every callback uses to turn browser stores into analysis inputs and errors into messages.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import Any, Callable

from analysis.errors import CohortError, DataError
from analysis.preparation.loading import Dataset
from analysis.pipeline import Workbench
from analysis.settings import Roles, Settings

from .datastore import DataStore
from .text import clip_message

log = logging.getLogger("cohortlens.app")

NO_DATA = "The server no longer holds this table (it keeps the most recent uploads only): upload it again."
NO_ROLES = "Choose the subject, time and response columns under Data & column roles."


class NeedsInput(CohortError):
    """A view cannot be drawn until the user supplies something (data or roles)."""


@dataclass(frozen=True, eq=False)
class AppContext:
    """Everything one app instance shares between sessions: bounded, content-keyed caches only."""

    datasets: DataStore
    workbench: Workbench
    default_key: str
    default_roles: Roles | None
    default_settings: Settings

    def inputs(self, data: dict | None, roles: dict | None, settings: dict | None
               ) -> tuple[Dataset, Roles, Settings]:
        """(dataset, roles, settings) from the browser stores, or NeedsInput/CohortError."""
        dataset = self.datasets.get((data or {}).get("key"))
        if dataset is None:
            raise NeedsInput(NO_DATA if data else "Loading…")
        r = (roles or {}).get("roles")
        if not r:
            raise NeedsInput(NO_ROLES)
        s = Settings.from_dict(settings) if settings else self.default_settings
        return dataset, Roles.from_dict(r), s


def attempt(fn: Callable[[], Any], *, what: str) -> tuple[Any, str | None, CohortError | None]:
    """Run ``fn``; return (value, None, None) or (None, message, error).

    Input problems (CohortError) give their own message; anything else gives a
    generic message naming the exception type and is logged with its traceback.
    """
    try:
        return fn(), None, None
    except CohortError as exc:
        return None, clip_message(str(exc)), exc
    except Exception as exc:  # noqa: BLE001 - the page must never show a traceback
        log.exception("unexpected error while %s", what)
        return None, (f"Unexpected problem while {what} ({type(exc).__name__}); the details are "
                      "in the server log. Other views keep working."), None


def role_of_column(roles: Roles | None, err: CohortError | None) -> str | None:
    """Which role's control a DataError concerns (by its column), if any."""
    if roles is None or not isinstance(err, DataError) or not err.column:
        return None
    for role in ("subject", "time", "response", "event_date", "followup_end"):
        if getattr(roles, role) == err.column:
            return role
    if err.column in roles.covariates:
        return "covariates"
    return None
