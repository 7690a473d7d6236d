"""Display lengths of names and cells on the page.

Column names and cells come from the user's file and can be thousands of characters long;
drawn whole they stretch dropdowns, axis titles and table headers until the tab stalls. The
page shows them cut to :data:`LABEL_CHARS` (the full name in the option's tooltip), and a
message echoes at most :data:`ECHO_CHARS` of any one name or cell.
"""
from __future__ import annotations

LABEL_CHARS = 60
ECHO_CHARS = 200
#: longest message shown as a whole (a message names a few columns, rows and values)
MESSAGE_CHARS = 1200


def short(text, limit: int = LABEL_CHARS) -> str:
    """``text`` as a string of at most ``limit`` characters (an ellipsis marks a cut)."""
    s = "" if text is None else str(text)
    return s if len(s) <= limit else s[:limit - 1] + "…"


def echo(text) -> str:
    """A name or cell as a message may quote it."""
    return short(text, ECHO_CHARS)


def clip_message(message: str) -> str:
    """A whole message cut to :data:`MESSAGE_CHARS`."""
    return short(message, MESSAGE_CHARS)


def option(label, value, full=None) -> dict:
    """A dropdown option with a display-length label and the full text as its tooltip."""
    full = str(label if full is None else full)
    return {"label": short(label), "value": value, "title": full}
