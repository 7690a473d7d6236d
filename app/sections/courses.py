"""Courses over time: one panel per group, a reproducible sample of subject lines and the
group's binned mean (computed by :func:`analysis.exploration.summaries.group_means`)."""
from __future__ import annotations

import numpy as np
import pandas as pd
from dash import Input, Output, State, html

from analysis.exploration.summaries import group_means
from analysis.preparation.strata import MISSING_LABEL

from .. import ids
from ..components import graph, message, number, section
from ..figures import CohortLook, _present_strata, cohort_look
from ..figures import courses_figure, panel_title, sample_subjects  # noqa: F401  (Dash-free: the report draws it too)
from ..session import AppContext
from ..urlstate import MAX_DRAW, MAX_SEED, VIEW_DEFAULTS
from ..views import (HIGHLIGHT, finish, on_cluster, render_key, skip_if_same, stage_call,
                     stage_stores)

ANCHOR = "section-course"
NAV = "Courses over time"


def layout(settings=None, max_upload_bytes=None):
    return section(ANCHOR, "Courses over time, by group",
                   "One panel per group; a reproducible random sample of subjects is drawn "
                   "in each, with the group's binned mean (the mean of every subject's visits in each "
                   "time bin).",
                   html.Div(className="cl-view-controls", children=[
                       html.Label("Subjects drawn per group", className="cl-label"),
                       number(ids.COURSE_DRAW, VIEW_DEFAULTS["draw"], step=1, min_=1,
                              max_=MAX_DRAW),
                       html.Label("Sample number", className="cl-label"),
                       number(ids.COURSE_SEED, VIEW_DEFAULTS["seed"], step=1, min_=1,
                              max_=MAX_SEED),
                       html.Span(id=ids.COURSE_NOTE, className="cl-note"),
                   ]),
                   message(ids.COURSE_MSG),
                   graph(ids.COURSE_GRAPH, 560))


def register(app, context: AppContext) -> None:
    @app.callback(Output(ids.COURSE_GRAPH, "figure"), Output(ids.COURSE_NOTE, "children"),
                  Output(ids.COURSE_MSG, "children"), Output(ids.VIEW_RENDERED["course"], "data"),
                  *stage_stores("cohort"), *HIGHLIGHT, Input(ids.COURSE_DRAW, "value"),
                  Input(ids.COURSE_SEED, "value"), State(ids.VIEW_RENDERED["course"], "data"))
    def courses(data, roles, settings, _stage_key, subject, stratum, n_draw, seed, last):
        n_draw, seed = int(n_draw or 40), int(seed or 1)
        key = render_key(context, "cohort", data, roles, settings, subject, stratum, n_draw, seed)
        skip_if_same(key, last)

        def make():
            return draw_courses(context, data, roles, settings, subject, stratum, n_draw, seed)

        return finish(make, "drawing courses over time", key, ("fig", "text"))


def draw_courses(context, data, roles, settings, subject, stratum, n_draw: int,
                 seed: int):
    """(figure, note) of the courses view for the stores' values."""
    cohort = stage_call(context, "cohort", data, roles, settings)
    look = cohort_look(cohort)
    frame, means, per, firsts, index = course_base(context, cohort, look, data, roles,
                                                   settings)
    chosen, k, n = sample_subjects(frame, per_stratum=n_draw, seed=seed, keep=subject,
                                   firsts=firsts)
    if frame is None:     # serve --engine dask: the drawn subjects' visits fetched
        from analysis.cluster.workbench import cluster_visits_of

        dataset, r, s = context.inputs(data, roles, settings)
        frame = shown = cluster_visits_of(context.workbench, r, s, chosen)
    else:
        shown = frame.iloc[subject_rows(cohort, chosen, index)]
    fig = courses_figure(shown, full=frame, look=look, highlight_subject=subject,
                         highlight_stratum=stratum, means=means, subjects_per=per)
    return fig, f"{k} of {n} subjects drawn (sample {seed}); means use every subject."


def course_base(context, cohort, look: CohortLook, data, roles, settings):
    """(every visit with text subject ids, group means, subjects per group) of the cohort,
    computed once per cohort (a highlight or a new sample reuses them)."""
    def compute():
        frame = visit_frame(cohort)
        labels = list(look.strata) or _present_strata(look, frame["stratum_label"])
        # subjects per group label, from the one group code per subject
        codes = np.asarray(cohort.strata.codes)
        names = frame["stratum_label"].cat.categories
        count = np.bincount(np.where(codes < 0, len(names) - 1, codes), minlength=len(names))
        per = pd.Series(count, index=names.astype(str))
        per = per[per > 0]
        # one row per subject in first-visit order, as frame.drop_duplicates("subject") gives
        subject = frame["subject"].cat
        firsts = pd.DataFrame({"subject": np.asarray(subject.categories, dtype=object)[
                                   subject.codes.to_numpy()[cohort.panel.starts]],
                               "stratum": codes})
        index = pd.Index(np.asarray(cohort.subject_ids).astype(str), dtype=object)
        index.get_indexer(index[:1])    # builds its lookup table once, here
        return frame, group_means(frame, strata=labels), per, firsts, index

    dataset, r, s = context.inputs(data, roles, settings)
    if on_cluster(context, dataset):
        return context.workbench.derived("cohort", "course base", dataset, r, s,
                                         lambda: cluster_course_base(context, cohort, look, r, s))
    return context.workbench.derived("cohort", "course base", dataset, r, s, compute)


def visit_frame(cohort) -> pd.DataFrame:
    """The cohort's visits in panel row order (subject as text, time, response, stratum,
    stratum_label), built for speed at a million rows: subject and group label are
    categorical on the panel's codes (one text per subject and per group, not per visit;
    :data:`analysis.preparation.strata.MISSING_LABEL` for group code -1)."""
    p = cohort.panel
    codes = np.asarray(cohort.strata.codes)
    names = tuple(map(str, cohort.strata.labels)) + (MISSING_LABEL,)
    row_codes = codes[p.codes]
    ids_ = pd.Index(np.asarray(cohort.subject_ids).astype(str), dtype=object)
    return pd.DataFrame({
        "subject": pd.Categorical.from_codes(p.codes, categories=ids_),
        "time": p.time,
        "response": p.y,
        "stratum": row_codes,
        "stratum_label": pd.Categorical.from_codes(
            np.where(row_codes < 0, len(names) - 1, row_codes), categories=list(names)),
    })


def cluster_course_base(context, cohort, look: CohortLook, roles, settings):
    """:func:`course_base` of a Dask-served cohort (``serve --engine dask``): no table of every
    visit (None in its place); the group means are summed on the workers and the rest is
    read from the per-subject tables."""
    from analysis.cluster.workbench import cluster_group_means

    ids_text = np.asarray(cohort.subject_ids).astype(str)
    codes = np.asarray(cohort.strata.codes)
    names = np.asarray(tuple(cohort.strata.labels) + (MISSING_LABEL,), dtype=object)
    own = pd.Series(names[codes].astype(str))
    labels = list(look.strata) or _present_strata(look, own)
    per = pd.Series(ids_text).groupby(own.to_numpy(), sort=False).nunique()
    firsts = pd.DataFrame({"subject": ids_text, "stratum": codes})
    index = pd.Index(ids_text)
    index.get_indexer(index[:1])
    means = cluster_group_means(context.workbench, roles, settings, labels)
    return None, means, per, firsts, index


def subject_rows(cohort, chosen, index: pd.Index | None = None) -> np.ndarray:
    """Positions, in ``cohort.frame`` (panel row order), of every visit of the ``chosen``
    subject ids (text), ascending. ``index``: the subject ids as text, when already made."""
    p = cohort.panel
    index = pd.Index(np.asarray(cohort.subject_ids).astype(str)) if index is None else index
    code = index.get_indexer(np.asarray(chosen, dtype=str))
    code = np.sort(code[code >= 0])
    if code.size == 0:
        return np.zeros(0, dtype=np.int64)
    counts = p.counts[code]
    offsets = np.arange(counts.sum()) - np.repeat(np.cumsum(counts) - counts, counts)
    return np.repeat(p.starts[code], counts) + offsets
