"""The small-group note beside the group controls of the page.

References: independent pandas counts of subjects per group; the thresholds (under 10
subjects or under 5% of the cohort) are common practice.
"""
from __future__ import annotations

import pandas as pd

from analysis.preparation.prepare import prepare
from analysis.settings import Roles, Settings
from app import ids
from app.sections.kept import small_group_note
from app.server import create_app


def cohort(groups: dict[str, int]):
    rows = []
    for g, n in groups.items():
        for i in range(n):
            for t in (0.0, 6.0):
                rows.append({"pid": f"{g}{i}", "t": t, "y": float(i + t), "site": g})
    frame = pd.DataFrame(rows)
    s = Settings(origin="as-is", unit="months", min_visits=1, require_covariate=False,
                 stratify_by="site")
    return frame, prepare(frame, Roles("pid", "t", "y", covariates=("site",)), s)


def test_note_names_small_groups_with_their_counts():
    frame, c = cohort({"north": 60, "south": 4, "west": 3})
    # reference: pandas count of distinct subjects per site
    per = frame.groupby("site")["pid"].nunique()
    note = small_group_note(c)
    assert f"south (n={per['south']})" in note and f"west (n={per['west']})" in note
    assert "north" not in note and "Under 10 subjects or 5% of the cohort" in note
    # the same groups are in the cohort warnings (attrition notes and report)
    assert sum("has only" in w for w in c.warnings) == int((per < 10).sum()) == 2


def test_no_note_when_groups_are_large():
    frame, c = cohort({"north": 30, "south": 25})
    per = frame.groupby("site")["pid"].nunique()        # reference: pandas count
    assert (per >= 10).all() and (per / per.sum() >= 0.05).all()
    assert small_group_note(c) == ""


def _kids(node):
    ch = getattr(node, "children", None)
    if ch is None or isinstance(ch, str):
        return []
    return list(ch) if isinstance(ch, (list, tuple)) else [ch]


def _ids_under(node):
    out = {getattr(node, "id", None)}
    for ch in _kids(node):
        out |= _ids_under(ch)
    return out


def _sibling_lists(node):
    kids = _kids(node)
    yield kids
    for ch in kids:
        yield from _sibling_lists(ch)


def test_note_sits_beside_the_group_count_and_is_filled_by_the_cohort_callback():
    app = create_app()
    layout = app.layout() if callable(app.layout) else app.layout
    group = next(k for k in _sibling_lists(layout)
                 if ids.STRATA_SIZE_NOTE in [getattr(c, "id", None) for c in k])
    at = [getattr(c, "id", None) for c in group].index(ids.STRATA_SIZE_NOTE)
    # the note follows the field holding the number-of-groups control (same fieldset)
    assert ids.SETTING_INPUT["n_strata"] in _ids_under(group[at - 1])
    # exactly one callback fills it (the cohort / attrition callback)
    assert sum(f"{ids.STRATA_SIZE_NOTE}.children" in k for k in app.callback_map) == 1
