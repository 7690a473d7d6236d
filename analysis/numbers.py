"""Number formatting for every text the analysis and the page show, defined once.

Two families:

- display text (:func:`format_number`, :func:`fmt`, :func:`fmt_p`, :func:`interval`,
  :func:`compact`, :func:`fixed`): significant figures without trailing zeros and a true
  minus sign (U+2212). Stratum labels made by :func:`compact`/:func:`fixed` and effect
  statements already carried the true minus into the JSON before these were gathered here,
  so the JSON output is unchanged.
- :func:`plain_number`: Python's own format spec with the ASCII hyphen-minus, for texts that
  were written that way into the CLI JSON (attrition steps, the dropout horizon rule) and must
  stay byte-identical; only infinities are written as ∞.

:func:`parse_number` reads any of them back.
"""
from __future__ import annotations

import math

#: the minus sign of display texts (U+2212)
MINUS = "−"
#: text of a missing or non-finite value in display tables
MISSING_TEXT = "—"


def format_number(v: float, digits: int = 3) -> str:
    """``digits`` significant figures (trailing zeros dropped), true minus, no exponent for ordinary sizes.

    Exponent notation (``1.23e+08``) only below 1e-5 or from 1e7 in magnitude.
    """
    v = float(v)
    if v == 0:
        return "0"
    mag = math.floor(math.log10(abs(v)))
    if -5 <= mag < 7:
        decimals = max(digits - 1 - mag, 0)
        s = f"{v:.{decimals}f}"
        if "." in s:
            s = s.rstrip("0").rstrip(".")
    else:
        s = f"{v:.{digits - 1}e}"
    return s.replace("-", MINUS)


def parse_number(text: str) -> float:
    """Inverse of the formatters here (true minus and ∞ accepted)."""
    return float(text.replace(MINUS, "-").replace("∞", "inf"))


def fmt(v, digits: int = 4) -> str:
    """Table cell: :func:`format_number`; "—" for NaN/inf, "" for None, other objects as ``str``."""
    try:
        f = float(v)
    except (TypeError, ValueError):
        return "" if v is None else str(v)
    if not math.isfinite(f):
        return MISSING_TEXT
    return format_number(f, digits)


def signed_term(v, digits: int = 4) -> str:
    """A term after another in a sum: ``"+ 0.113"`` or ``"− 0.113"`` (never ``"+ -0.113"``)."""
    try:
        f = float(v)
    except (TypeError, ValueError):
        return f"+ {fmt(v, digits)}"
    return f"{MINUS if f < 0 else '+'} {fmt(abs(f), digits)}"


def fmt_p(p) -> str:
    """p-values: three significant figures, '< 0.0001' (no-break space) below that."""
    try:
        f = float(p)
    except (TypeError, ValueError):
        return ""
    if not math.isfinite(f):
        return MISSING_TEXT
    return "<\u00a00.0001" if f < 1e-4 else format_number(f, 3)


def interval(lo, hi, digits: int = 4) -> str:
    """'lo to hi' with :func:`fmt`."""
    return f"{fmt(lo, digits)} to {fmt(hi, digits)}"


def compact(x: float, sig: int = 3) -> str:
    """Short number: up to ``sig`` significant digits (``g`` rule), no trailing zeros, true minus.

    Unlike :func:`format_number` it switches to an exponent (``1.5e7``, no ``+`` or leading
    zeros) as Python's ``g`` does; used where few characters matter (group labels).
    """
    if x == 0:
        return "0"
    text = f"{x:.{sig}g}"
    if "e" in text:
        mant, exp = text.split("e")
        text = f"{mant}e{int(exp)}"
    return text.replace("-", MINUS)


def fixed(x: float, decimals: int) -> str:
    """``x`` rounded to ``10**-decimals`` (decimals may be negative), thousands separated, true minus."""
    x = round(x, decimals)
    d = max(decimals, 0)
    text = f"{x:,.{d}f}" if abs(x) >= 10_000 else f"{x:.{d}f}"
    if text.lstrip("-").strip("0.") == "":
        text = text.lstrip("-")
    return text.replace("-", MINUS)


def plain_number(v: float, spec: str = "g") -> str:
    """``format(v, spec)`` with the ASCII minus; ±∞ as "∞"/"−∞" (texts kept as the JSON had them)."""
    v = float(v)
    if v == math.inf:
        return "∞"
    if v == -math.inf:
        return MINUS + "∞"
    return format(v, spec)
