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


#: column names longer than this are renamed when a table is loaded into the page (a dropdown
#: whose option values are thousands of characters long stalls the browser tab)
NAME_CHARS = 120


def shorten_columns(frame):
    """(frame, [(old, new), ...]): names over :data:`NAME_CHARS` cut and numbered by position
    ('<first 100 characters>… [column 3]'), so they stay unique and say where they came from."""
    renamed = []
    names = []
    for i, c in enumerate(frame.columns):
        s = str(c)
        if len(s) > NAME_CHARS:
            new = f"{s[:100]}… [column {i + 1}]"
            renamed.append((s, new))
            names.append(new)
        else:
            names.append(c)
    if not renamed:
        return frame, []
    out = frame.copy(deep=False)
    out.columns = names
    return out, renamed


def renamed_note(renamed) -> str:
    """What :func:`shorten_columns` did, for the page (each old name echoed at most 200 chars)."""
    if not renamed:
        return ""
    return (f"{len(renamed)} column name{'s' if len(renamed) > 1 else ''} longer than "
            f"{NAME_CHARS} characters {'were' if len(renamed) > 1 else 'was'} shortened for "
            "this page: " + "; ".join(f"'{echo(old)}' is now '{new}'" for old, new in renamed[:5])
            + (f" and {len(renamed) - 5} more" if len(renamed) > 5 else "") + ".")
