"""Bridge from view results to figures.

The views call these entry points with a prepared cohort and a result; this
module turns the cohort into the names, units and colours every figure shares
(:class:`app.figures.CohortLook`) and calls the pure figure function. Also: the
reproducible subject sample and the group colours used outside figures.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import plotly.graph_objects as go

from . import figures
from . import palette
from .text import short


def stratum_colours(labels) -> dict:
    """The same colour for a group label everywhere ("No value" is neutral grey)."""
    return dict(palette.stratum_colours(list(labels)))


def sample_subjects(frame: pd.DataFrame, *, per_stratum: int, seed: int,
                    keep: str | None = None) -> tuple[np.ndarray, int, int]:
    """A reproducible random sample of subjects, up to ``per_stratum`` from each group.

    Returns (chosen subject ids, number drawn, number available). ``keep`` (the
    highlighted subject) is always included. The same (data, seed) gives the same draw.
    """
    firsts = frame.drop_duplicates("subject")[["subject", "stratum"]]
    rng = np.random.default_rng(seed)
    chosen = []
    for _, grp in firsts.groupby("stratum", sort=True):
        ids = grp["subject"].to_numpy()
        if len(ids) > per_stratum:
            ids = rng.choice(ids, size=per_stratum, replace=False)
        chosen.extend(ids.tolist())
    if keep is not None and keep in set(firsts["subject"].astype(str)) and keep not in chosen:
        chosen.append(keep)
    return np.asarray(chosen, dtype=object), len(chosen), len(firsts)


def empty(message: str) -> go.Figure:
    return figures.empty_figure(message)


# ------------------------------------------------------------------ cohort → look
def _labels(cohort) -> list[str]:
    labels = list(cohort.strata.labels)
    if (cohort.strata.codes < 0).any():
        labels.append(palette.NO_VALUE_LABEL)
    return labels


def look(cohort) -> figures.CohortLook:
    """Names, units and colours of one prepared cohort, for every figure."""
    labels = _labels(cohort)
    roles = cohort.roles
    codes = np.asarray(cohort.strata.codes)
    counts = np.bincount(codes[codes >= 0], minlength=cohort.strata.n_strata)
    count_map = {lab: int(c) for lab, c in zip(cohort.strata.labels, counts)}
    if palette.NO_VALUE_LABEL in labels:
        count_map[palette.NO_VALUE_LABEL] = int((codes < 0).sum())
    cov_unit = getattr(roles, "covariate_unit", "") or ""
    stratifier = cohort.strata.name or "group"
    # names from the user's file are cut to a display length (axis titles, legends)
    return figures.CohortLook(
        strata=tuple(labels),
        colours=stratum_colours(labels),
        time_label=short(cohort.time_label),
        time_unit=cohort.settings.unit,
        response=short(roles.response),
        response_unit=short(getattr(roles, "response_unit", "") or "", 30),
        stratifier=short(stratifier),
        stratifier_unit=short(cov_unit, 30) if stratifier == cohort.covariate else "",
        covariate=None if cohort.covariate is None else short(cohort.covariate),
        covariate_unit=short(cov_unit, 30),
        transform=cohort.settings.transform,
        counts=count_map,
    )


# ------------------------------------------------------------------ view entry points
def courses(shown, *, full, cohort, highlight_subject=None, highlight_stratum=None):
    return figures.courses_figure(shown, full=full, look=look(cohort),
                                  highlight_subject=highlight_subject,
                                  highlight_stratum=highlight_stratum)


def variogram(vg, *, cohort, model_curves=None):
    """Semivariogram; ``model_curves`` is a list of (name, lags, values) from fitted models."""
    return figures.variogram_figure(vg, look=look(cohort), model_curves=model_curves)


def lag_heatmap(lc, *, cohort):
    return figures.lag_heatmap_figure(lc, look=look(cohort))


def intervals(lines, *, cohort, order, highlight_subject=None, highlight_stratum=None):
    return figures.intervals_figure(lines, look=look(cohort), order=order or "slope",
                                    highlight_subject=highlight_subject,
                                    highlight_stratum=highlight_stratum)


def slopes_by_stratum(lines, *, cohort, highlight_subject=None, highlight_stratum=None):
    return figures.slopes_by_stratum_figure(lines, look=look(cohort),
                                            highlight_subject=highlight_subject,
                                            highlight_stratum=highlight_stratum)


def slope_vs_covariate(lines, smooth, *, cohort, highlight_subject=None, highlight_stratum=None):
    return figures.slope_vs_covariate_figure(lines, smooth, look=look(cohort),
                                             highlight_subject=highlight_subject,
                                             highlight_stratum=highlight_stratum)


def visits(lines, *, cohort, highlight_subject=None, highlight_stratum=None):
    return figures.visits_figure(lines, look=look(cohort), highlight_subject=highlight_subject,
                                 highlight_stratum=highlight_stratum)


def dropout(result, *, cohort, highlight_stratum=None):
    return figures.dropout_figure(result, look=look(cohort), highlight_stratum=highlight_stratum)
