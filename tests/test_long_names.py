"""Column names thousands of characters long are cut for display on the page (dropdown labels,
axis titles, table headers), with the full name kept as the option's value and tooltip.

Reference: the names the test itself builds and the display length app.text.LABEL_CHARS.
"""
from __future__ import annotations

import json

import numpy as np
import pandas as pd

from analysis.preparation.loading import Dataset, describe_columns
from analysis.pipeline import Workbench
from analysis.settings import Roles, Settings
from app import controls as ctl
from app import figures, hub
from app.sections import courses
from app.text import ECHO_CHARS, LABEL_CHARS, NAME_CHARS, echo, renamed_note, short, \
    shorten_columns


def _frame(n_chars: int) -> tuple[pd.DataFrame, Roles]:
    rng = np.random.default_rng(5)
    names = {k: k[0] * n_chars for k in ("subject", "time", "response", "marker")}
    n, visits = 40, 7
    df = pd.DataFrame({
        names["subject"]: np.repeat(np.arange(n), visits),
        names["time"]: np.tile(np.arange(visits, dtype=float), n),
        names["response"]: rng.normal(size=n * visits),
        names["marker"]: np.repeat(rng.uniform(1, 5, n), visits),
    })
    return df, Roles(names["subject"], names["time"], names["response"], (names["marker"],))


def test_short_cuts_to_the_display_length():
    assert short("x" * 6000) == "x" * (LABEL_CHARS - 1) + "…"
    assert short("abc") == "abc"
    assert len(echo("y" * 6000)) == ECHO_CHARS


def test_dropdowns_tables_and_figures_show_short_names():
    df, roles = _frame(6000)
    opts = ctl.role_options(describe_columns(df))
    assert all(len(o["label"]) < LABEL_CHARS + 40 for o in opts)
    assert {o["value"] for o in opts} == set(df.columns)          # values stay the full names
    assert {o["title"] for o in opts} == set(df.columns)
    cov_opts = hub._covariate_options(list(roles.covariates))
    assert cov_opts[0]["value"] == roles.covariates[0] and len(cov_opts[0]["label"]) <= LABEL_CHARS
    _, cols = hub.preview(df, describe_columns(df))
    assert all(len(c["name"][0]) <= LABEL_CHARS for c in cols)

    wb = Workbench()
    ds = Dataset.from_frame(df)
    s = Settings(min_visits=2)
    cohort = wb.cohort(ds, roles, s)
    fig = figures.variogram_figure(wb.variogram(ds, roles, s), look=figures.cohort_look(cohort))
    texts = json.dumps(fig.to_plotly_json()["layout"], default=str)
    assert "r" * (LABEL_CHARS + 1) not in texts and "m" * (LABEL_CHARS + 1) not in texts
    shown = courses.courses_figure(cohort.frame, full=cohort.frame, look=figures.cohort_look(cohort))
    layout = json.dumps(shown.to_plotly_json()["layout"], default=str)
    assert "r" * (LABEL_CHARS + 1) not in layout and "t" * (LABEL_CHARS + 1) not in layout


def test_long_column_names_are_renamed_on_loading_and_stay_unique():
    df, _ = _frame(6000)
    df["y" * 50] = 1.0                                   # a short name is left alone
    out, renamed = shorten_columns(df)
    assert len(renamed) == 4 and out.columns[-1] == "y" * 50
    assert all(len(c) <= NAME_CHARS for c in out.columns)
    assert len(set(out.columns)) == len(out.columns)
    assert [old for old, _ in renamed] == list(df.columns[:4])
    assert (out.to_numpy() == df.to_numpy()).all()         # same cells, in the same order
    note = renamed_note(renamed)
    assert "[column 1]" in note and len(note) < 4 * (ECHO_CHARS + 150)
