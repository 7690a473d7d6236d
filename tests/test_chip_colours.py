"""Group chips in the selection bar show the same colour as their group in every figure.

The chips are plain-text radio labels; their colour swatch comes from CSS rules
generated from the palette (``app.palette.chip_css``) and kept in the style sheet
the browser loads. Reference for every check: the palette module itself
(``palette.stratum_colours``, the mapping every figure uses).
"""
from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

from app import ids, palette
from app.sections.kept import stratum_chips

SHEET = Path(__file__).resolve().parents[1] / palette.CSS_PATH
RULE = re.compile(r"^(?P<sel>[^{]+?)\s*\{\s*background:\s*(?P<colour>#[0-9A-Fa-f]{6});\s*\}$")
NTH = re.compile(r"label:nth-of-type\((?P<a>\d+)n\+(?P<b>\d+)\)::before$")
HAS_VALUE = re.compile(r'label:has\(input\[value="(?P<value>[^"]*)"\]\)::before$')


def _chip_block() -> str:
    css = SHEET.read_text()
    start, end = css.find(palette.CHIP_CSS_BEGIN), css.find(palette.CHIP_CSS_END)
    assert 0 <= start < end, "the style sheet holds the generated chip block"
    return css[start:end + len(palette.CHIP_CSS_END)]


def _rules(block: str) -> list[tuple[str, str]]:
    out = []
    for line in block.splitlines()[1:-1]:
        m = RULE.match(line.strip())
        assert m, f"unexpected line in the chip block: {line!r}"
        out.append((m["sel"], m["colour"].upper()))
    return out


def _swatch(rules, position: int, value: str) -> str | None:
    """Colour the rules give the chip at 1-based ``position`` with radio ``value``.

    A small evaluator of the two selector forms used: ``nth-of-type(an+b)`` (matches
    when position = a*k + b for some k >= 0) and ``:has(input[value="..."])``, which is
    the more specific of the two, so it wins whatever the order.
    """
    prefix = f"#{ids.LINK_STRATA} "
    by_position, by_value = None, None
    for sel, colour in rules:
        assert sel.startswith(prefix), sel
        tail = sel[len(prefix):]
        if m := NTH.match(tail):
            a, b = int(m["a"]), int(m["b"])
            if position >= b and (position - b) % a == 0:
                by_position = colour          # later rules of equal specificity win
        elif m := HAS_VALUE.match(tail):
            if m["value"] == value:
                by_value = colour
        else:
            raise AssertionError(f"selector form not understood: {sel!r}")
    return by_value or by_position


def _labels(n: int) -> list[str]:
    edges = np.round(np.geomspace(1.0, 320.0, n + 1), 1)
    return [f"{lo:.1f} – {hi:.1f}" for lo, hi in zip(edges[:-1], edges[1:])]


def test_style_sheet_holds_the_generated_block():
    # reference: palette.chip_css(), the generator (refresh with `python -m app.palette`)
    assert _chip_block() == palette.chip_css(f"#{ids.LINK_STRATA}")


@pytest.mark.parametrize("n", range(2, 9))
@pytest.mark.parametrize("no_value", [False, True])
def test_chip_swatches_match_the_figure_colours(n, no_value):
    rules = _rules(_chip_block())
    labels = _labels(n) + ([palette.NO_VALUE_LABEL] if no_value else [])
    want = {lab: c.upper() for lab, c in palette.stratum_colours(labels).items()}
    got = {lab: _swatch(rules, k + 1, lab) for k, lab in enumerate(labels)}
    assert got == want
    if no_value:
        assert got[palette.NO_VALUE_LABEL] == palette.NO_STRATUM_COLOR.upper()


class _Strata:
    def __init__(self, labels, codes):
        self.labels, self.codes = labels, np.asarray(codes)


class _Cohort:
    def __init__(self, labels, codes):
        self.strata = _Strata(labels, codes)


def test_chip_options_follow_stratum_order_with_no_value_last():
    # reference: counts by brute force over the codes list
    labels = _labels(3)
    codes = [0, 2, 2, -1, 1, 0, 0, -1, 2, 2]
    options = stratum_chips(_Cohort(labels, codes))
    assert [o["value"] for o in options] == labels + [palette.NO_VALUE_LABEL]
    for k, o in enumerate(options):
        code = -1 if o["value"] == palette.NO_VALUE_LABEL else k
        assert o["label"] == f"{o['value']} (n={sum(c == code for c in codes)})"
        assert isinstance(o["label"], str)      # plain text: components here break updates
    # the chip order is the order the CSS colours by, so chip k has figure colour k
    rules = _rules(_chip_block())
    want = palette.stratum_colours([o["value"] for o in options])
    for k, o in enumerate(options):
        assert _swatch(rules, k + 1, o["value"]) == want[o["value"]].upper()
