"""Courses over time: one panel per group, a reproducible sample of subject lines and the
group's binned mean (computed by :func:`analysis.exploration.summaries.group_means`)."""
from __future__ import annotations

import textwrap

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from dash import Input, Output, State, html
from plotly.subplots import make_subplots

from analysis.exploration.summaries import MEAN_BINS, group_means

from .. import ids
from .. import palette as pal
from ..components import graph, message, number, section
from ..figures import (GL_POINTS, PANEL_TITLE_SIZE, CohortLook, _finish, _present_strata,
                       _segments, _strength, cohort_look)
from ..session import AppContext
from ..urlstate import VIEW_DEFAULTS
from ..views import HIGHLIGHT, STORES, finish, render_key, skip_if_same, stage_call

ANCHOR = "section-course"
NAV = "Courses over time"


def layout(settings=None, max_upload_bytes=None):
    return section(ANCHOR, "Courses over time, by group",
                   "One panel per group; a reproducible random sample of subjects is drawn "
                   "in each, with the group's smoothed mean.",
                   html.Div(className="cl-view-controls", children=[
                       html.Label("Subjects drawn per group", className="cl-label"),
                       number(ids.COURSE_DRAW, VIEW_DEFAULTS["draw"], step=1, min_=1),
                       html.Label("Sample number", className="cl-label"),
                       number(ids.COURSE_SEED, VIEW_DEFAULTS["seed"], step=1, min_=1),
                       html.Span(id=ids.COURSE_NOTE, className="cl-note"),
                   ]),
                   message(ids.COURSE_MSG),
                   graph(ids.COURSE_GRAPH, 560))


def register(app, context: AppContext) -> None:
    @app.callback(Output(ids.COURSE_GRAPH, "figure"), Output(ids.COURSE_NOTE, "children"),
                  Output(ids.COURSE_MSG, "children"), Output(ids.VIEW_RENDERED["course"], "data"),
                  *STORES, *HIGHLIGHT, Input(ids.COURSE_DRAW, "value"),
                  Input(ids.COURSE_SEED, "value"), State(ids.VIEW_RENDERED["course"], "data"))
    def courses(data, roles, settings, subject, stratum, n_draw, seed, last):
        n_draw, seed = int(n_draw or 40), int(seed or 1)
        key = render_key(context, "cohort", data, roles, settings, subject, stratum, n_draw, seed)
        skip_if_same(key, last)

        def make():
            cohort = stage_call(context, "cohort", data, roles, settings)
            look = cohort_look(cohort)
            frame, means, per, firsts, index = course_base(context, cohort, look, data, roles,
                                                           settings)
            chosen, k, n = sample_subjects(frame, per_stratum=n_draw, seed=seed, keep=subject,
                                           firsts=firsts)
            shown = frame.iloc[subject_rows(cohort, chosen, index)]
            fig = courses_figure(shown, full=frame, look=look, highlight_subject=subject,
                                 highlight_stratum=stratum, means=means, subjects_per=per)
            return fig, f"{k} of {n} subjects drawn (sample {seed}); means use every subject."

        return finish(make, "drawing courses over time", key, ("fig", "text"))


def course_base(context, cohort, look: CohortLook, data, roles, settings):
    """(every visit with text subject ids, group means, subjects per group) of the cohort,
    computed once per cohort (a highlight or a new sample reuses them)."""
    def compute():
        frame = cohort.frame
        frame["subject"] = frame["subject"].astype(str)
        labels = list(look.strata) or _present_strata(look, frame["stratum_label"])
        per = frame.groupby("stratum_label", sort=False)["subject"].nunique()
        # one row per subject in first-visit order, as frame.drop_duplicates("subject") gives
        firsts = pd.DataFrame({"subject": frame["subject"].to_numpy()[cohort.panel.starts],
                               "stratum": np.asarray(cohort.strata.codes)})
        index = pd.Index(np.asarray(cohort.subject_ids).astype(str))
        index.get_indexer(index[:1])    # builds its lookup table once, here
        return frame, group_means(frame, strata=labels), per, firsts, index

    dataset, r, s = context.inputs(data, roles, settings)
    return context.workbench.derived("cohort", "course base", dataset, r, s, compute)


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


def sample_subjects(frame: pd.DataFrame, *, per_stratum: int, seed: int,
                    keep: str | None = None, firsts: pd.DataFrame | None = None
                    ) -> tuple[np.ndarray, int, int]:
    """A reproducible random sample of subjects, up to ``per_stratum`` from each group.

    Returns (chosen subject ids, number drawn, number available). ``keep`` (the
    highlighted subject) is always included. The same (data, seed) gives the same draw.
    ``firsts`` (subject, stratum: one row per subject in order of first appearance) saves
    finding them in ``frame``.
    """
    if firsts is None:
        firsts = frame.drop_duplicates("subject")[["subject", "stratum"]]
    rng = np.random.default_rng(seed)
    chosen = []
    for _, grp in firsts.groupby("stratum", sort=True):
        ids = grp["subject"].to_numpy()
        if len(ids) > per_stratum:
            ids = rng.choice(ids, size=per_stratum, replace=False)
        chosen.extend(ids.tolist())
    if keep is not None and keep not in chosen and bool(
            (firsts["subject"].astype(str) == keep).any()):
        chosen.append(keep)
    return np.asarray(chosen, dtype=object), len(chosen), len(firsts)


def panel_title(label: str, n: int, *, ncol: int, bold: bool = False) -> str:
    """``"1.0 – 10.7 · n = 265"``: a small-multiple title that fits its panel.

    The budget of characters per line shrinks with the number of panel columns
    (about 100 characters of :data:`PANEL_TITLE_SIZE` text across a ~1000 px
    graph); a longer title puts the count on its own line and wraps the label.
    """
    budget = max(12, int(100 / max(ncol, 1)))
    count = f"n = {n:,}"
    label = str(label)
    if len(label) + 3 + len(count) <= budget:
        lines = [f"{label} · {count}"]
    else:
        lines = textwrap.wrap(label, width=budget, break_long_words=False) or [label]
        lines.append(count)
    if bold:
        lines[0] = f"<b>{lines[0]}</b>"
    return "<br>".join(lines)


def courses_figure(shown: pd.DataFrame, *, full: pd.DataFrame, look: CohortLook,
                   highlight_subject=None, highlight_stratum=None,
                   n_bins: int = MEAN_BINS, means: pd.DataFrame | None = None,
                   subjects_per: pd.Series | None = None) -> go.Figure:
    """Response over time, one panel per group: sampled subject lines and the group mean.

    Parameters
    ----------
    shown : DataFrame
        Rows of the sampled subjects: subject, time, response, stratum_label.
    full : DataFrame
        Every included row (the group means use all subjects, not only the sample).
    look : CohortLook
    highlight_subject : str, optional
        Drawn bold in the highlight colour in its group's panel.
    highlight_stratum : str, optional
        Its panel keeps full strength; the others fade.
    means, subjects_per : optional
        ``group_means(full, ...)`` and subjects per group label, when already computed.
    """
    labels = list(look.strata) or _present_strata(look, full["stratum_label"])
    k = max(len(labels), 1)
    ncol = k if k <= 4 else (int(np.ceil(k / 2)) if k <= 8 else 4)
    nrow = int(np.ceil(k / ncol))
    if subjects_per is None:
        subjects_per = full.groupby("stratum_label", sort=False)["subject"].nunique()
    # the covariate and its unit are named once, in the figure title; each panel
    # title is the group's range and its subject count, wrapped only when too wide
    titles = [panel_title(lab, int(subjects_per.get(lab, 0)), ncol=ncol,
                          bold=highlight_stratum == lab) for lab in labels]
    title_lines = max(t.count("<br>") + 1 for t in titles) if titles else 1
    fig = make_subplots(rows=nrow, cols=ncol, shared_xaxes="all", shared_yaxes="all",
                        subplot_titles=titles, horizontal_spacing=0.045,
                        vertical_spacing=(0.12 + 0.04 * title_lines) if nrow > 1 else 0.1)
    for ann in fig.layout.annotations:
        ann.font = {"size": PANEL_TITLE_SIZE}

    shown = shown.assign(subject=shown["subject"].astype(str),
                         stratum_label=shown["stratum_label"].astype(str))
    shown = shown.sort_values(["stratum_label", "subject", "time"], kind="stable")
    if means is None:
        means = group_means(full, strata=labels, n_bins=n_bins)
    hl = None if highlight_subject is None else str(highlight_subject)
    hl_rows = None if hl is None else full[full["subject"].astype(str) == hl]
    hover = (f"subject %{{customdata}}<br>%{{x:.1f}} {look.time_unit}: %{{y:.1f}}"
             f" {look.response_unit}<extra></extra>")
    # WebGL traces are painted above SVG ones, so once the subject lines need WebGL,
    # the mean and the highlighted subject use it too (and stay on top)
    biggest = int(shown["stratum_label"].value_counts().max()) if len(shown) else 0
    kind = go.Scattergl if biggest > GL_POINTS else go.Scatter
    for i, lab in enumerate(labels):
        row, col = i // ncol + 1, i % ncol + 1
        colour = look.colour(lab)
        strength = _strength(look, lab, highlight_stratum)
        sub = shown[shown["stratum_label"] == lab]
        xs, ys, cd = _segments(sub["subject"].to_numpy(), sub["time"].to_numpy(),
                               sub["response"].to_numpy(), sub["subject"].to_numpy())
        fig.add_trace(kind(
            x=xs, y=ys, customdata=cd, mode="lines", name=look.group_title(lab),
            legendgroup=lab, showlegend=True,
            line={"color": pal.with_alpha(colour, 0.42 * strength), "width": 1.2},
            hovertemplate=hover), row=row, col=col)
        m = means[means["stratum_label"] == lab]
        if len(m):
            common = dict(x=m["time"].to_numpy(), y=m["response"].to_numpy(), mode="lines",
                          legendgroup=lab, showlegend=False, hoverinfo="skip")
            fig.add_trace(kind(**common, line={"color": "rgba(255,255,255,0.9)",
                                               "width": 8}), row=row, col=col)
            fig.add_trace(kind(
                x=m["time"].to_numpy(), y=m["response"].to_numpy(), mode="lines+markers",
                name=f"{look.group_title(lab)} mean", legendgroup=lab, showlegend=False,
                customdata=m["visits"].to_numpy(),
                line={"color": pal.with_alpha(colour, max(strength, 0.35)), "width": 4},
                marker={"size": 6, "color": pal.with_alpha(colour, max(strength, 0.35))},
                hovertemplate=(f"group mean {look.group_title(lab)}<br>%{{x:.1f}} "
                               f"{look.time_unit}: %{{y:.1f}} {look.response_unit}"
                               "<br>%{customdata} visits<extra></extra>")), row=row, col=col)
        if hl is not None:
            h = hl_rows[hl_rows["stratum_label"].astype(str) == lab]
            if len(h):
                h = h.sort_values("time")
                fig.add_trace(kind(
                    x=h["time"].to_numpy(), y=h["response"].to_numpy(), mode="lines+markers",
                    customdata=np.full(len(h), hl, dtype=object), name=f"subject {hl}",
                    line={"color": pal.HIGHLIGHT_COLOR, "width": 3.5},
                    marker={"size": 8, "color": pal.HIGHLIGHT_COLOR,
                            "line": {"color": "#ffffff", "width": 1}},
                    hovertemplate=hover), row=row, col=col)
    # a legend key for the mean line (drawn in every panel in its group's colour)
    fig.add_trace(go.Scatter(x=[None], y=[None], mode="lines", name="group mean, every subject",
                             line={"color": pal.REFERENCE_COLOR, "width": 4}, hoverinfo="skip"),
                  row=1, col=1)
    total = int(subjects_per.sum())
    drawn = int(shown["subject"].nunique())
    _finish(fig, f"{look.response} over time, by {look.stratifier_label}",
            subtitle=(f"thin lines: {drawn:,} of {total:,} subjects drawn · thick line: mean of "
                      f"every subject in the group, {len(set(means['bin'])) if len(means) else 0}"
                      f" time bins"),
            top=104 + 18 * title_lines, bottom=105)
    fig.update_xaxes(title_text="")
    fig.update_yaxes(title_text="")
    for c in range(1, ncol + 1):
        fig.update_xaxes(title_text=look.time_label, row=nrow, col=c)
    fig.update_yaxes(title_text=look.response_label, col=1)
    return fig
