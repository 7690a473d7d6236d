"""Errors raised for bad input: each names the column, the rows and what was expected."""
from __future__ import annotations


class CohortError(ValueError):
    """Base class of every user-facing input problem; ``str(err)`` is the message to show."""


class SettingsError(CohortError):
    """A setting has a value outside its allowed range or choices.

    Attributes
    ----------
    field : str or None
        The :class:`~analysis.settings.Settings` field concerned (the page shows the message
        beside that control), or None when no single setting is to blame.
    """

    def __init__(self, message: str, *, field: str | None = None):
        super().__init__(message)
        self.field = field


class DataError(CohortError):
    """The data do not fit the chosen roles.

    Attributes
    ----------
    column : str or None
        The column concerned (the UI shows the message beside that role's control).
    rows : tuple of int
        First few offending row numbers (built from the 0-based data-row ``positions``), counted from 1 as in a spreadsheet
        (the header is row 1, so the first data row is row 2).
    """

    def __init__(self, message: str, *, column: str | None = None, positions=()):
        super().__init__(message)
        self.column = column
        self.rows = tuple(int(r) + 2 for r in positions)


class ModelError(CohortError):
    """A model cannot be fitted as asked (too few subjects, no variation, singular design)."""


class NotOnCluster(CohortError):
    """A result that reads every visit at once, asked of a cohort whose visits stay on Dask
    workers (``serve --engine dask``); the page shows the message in the view."""


def row_list(rows, limit: int = 5) -> str:
    """'rows 2, 5, 9 and 3 more' from 0-based data-row positions (spreadsheet numbering)."""
    rows = [int(r) + 2 for r in rows]
    shown = ", ".join(str(r) for r in rows[:limit])
    more = len(rows) - limit
    word = "row" if len(rows) == 1 else "rows"
    return f"{word} {shown}" + (f" and {more} more" if more > 0 else "")


def rows_hold(rows, examples, limit: int = 5) -> str:
    """'rows 2, 5 hold 'x', 'y'' / 'row 4 holds 'x'' from 0-based positions and example values."""
    verb = "holds" if len(rows) == 1 else "hold"
    return f"{row_list(rows, limit)} {verb} " + ", ".join(quoted(v) for v in examples)


#: longest cell value or column name echoed in a message
ECHO_LIMIT = 200


def clip(value, limit: int = ECHO_LIMIT) -> str:
    """``str(value)`` cut to ``limit`` characters with an ellipsis, for echoing input in messages."""
    text = str(value)
    return text if len(text) <= limit else text[: limit - 1] + "…"


def quoted(value, limit: int = ECHO_LIMIT) -> str:
    """``repr`` of a cell value (a string is quoted), cut like :func:`clip`."""
    if hasattr(value, "item") and not isinstance(value, str):  # numpy scalar: as plain Python
        value = value.item()
    text = repr(value) if not isinstance(value, str) else repr(clip(value, limit))
    return clip(text, limit + 2)
