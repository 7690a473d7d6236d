"""Baseline covariate preparation: transform, centre, and cut into strata.

Every function takes one value per subject. Missing values (NaN, None) never
raise here; they get stratum code -1 and are reported by the callers as
"No value".

Interval convention for numeric strata
--------------------------------------
With edges ``e_0 < e_1 < ... < e_k`` stratum ``j`` holds the values
``e_j <= v < e_{j+1}`` (left-closed), except the last stratum which also holds
its upper edge: ``e_{k-1} <= v <= e_k``. So the smallest and the largest value
both belong to a stratum and every value belongs to exactly one.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .. import options as opt
from ..errors import DataError, SettingsError
from ..exploration.lagbins import edge_bin, equal_width_edges
from ..numbers import MINUS, compact, fixed  # noqa: F401  (MINUS: the minus of labels, importable here as before)
from ..settings import check_choice

#: separator between the ends of a range in a stratum label (spaced en dash)
RANGE_SEP = " – "
#: label of the stratum of subjects without a covariate value (code -1)
MISSING_LABEL = "No value"
#: a group with fewer subjects than this is flagged as small (common practice, not a
#: statistical rule: means, spreads and curves of under ~10 subjects are unstable)
SMALL_GROUP_SUBJECTS = 10
#: a group holding a smaller share of the subjects than this is flagged too (common practice)
SMALL_GROUP_SHARE = 0.05


@dataclass(frozen=True, eq=False)
class Strata:
    """Subjects assigned to strata of one baseline covariate.

    Attributes
    ----------
    codes : int64 array (n_subjects,)
        Stratum of each subject, 0..k-1; -1 when the covariate is missing.
    labels : tuple of str
        Display label of strata 0..k-1, e.g. ``"4.2 – 11.8 mg/g"``.
    edges : float array (k+1,) or None
        Cut points of a numeric covariate (None for a categorical one).
        Intervals are left-closed except the last, which is closed.
    kind : str
        ``"numeric"`` or ``"categorical"``.
    name : str
        Name of the covariate that was cut.
    notes : tuple of str
        Plain-language remarks for the user (collapsed quantile edges,
        empty strata, a covariate with a single value, small groups).
    """

    codes: np.ndarray
    labels: tuple[str, ...]
    edges: np.ndarray | None
    kind: str
    name: str
    notes: tuple[str, ...] = ()

    @property
    def n_strata(self) -> int:
        return len(self.labels)

    @property
    def counts(self) -> np.ndarray:
        """Subjects per stratum 0..k-1."""
        c = self.codes[self.codes >= 0]
        return np.bincount(c, minlength=self.n_strata).astype(np.int64)

    def to_frame(self) -> pd.DataFrame:
        """One row per stratum: stratum, label, lo, hi, subjects.

        ``lo``/``hi`` are the stratum's edges (NaN for categorical strata).
        When some subjects have no value, a last row with stratum -1 and
        label ``"No value"`` counts them.
        """
        k = self.n_strata
        if self.edges is not None:
            lo, hi = self.edges[:-1].astype(float), self.edges[1:].astype(float)
        else:
            lo = hi = np.full(k, np.nan)
        frame = pd.DataFrame({
            "stratum": np.arange(k, dtype=np.int64),
            "label": list(self.labels),
            "lo": lo,
            "hi": hi,
            "subjects": self.counts,
        })
        n_missing = int(np.sum(self.codes < 0))
        if n_missing:
            extra = pd.DataFrame({"stratum": [-1], "label": [MISSING_LABEL], "lo": [np.nan],
                                  "hi": [np.nan], "subjects": [n_missing]})
            frame = pd.concat([frame, extra], ignore_index=True)
        return frame


# --------------------------------------------------------------------------- public API
def transform_values(x, transform: str, *, name: str = "covariate") -> np.ndarray:
    """Apply a monotone transform to a per-subject covariate.

    Parameters
    ----------
    x : array_like of float
        Covariate values; NaN (missing) passes through unchanged.
    transform : {"none", "log", "log2", "log10"}
    name : str, keyword-only
        Column name used in the error message.

    Returns
    -------
    ndarray of float
        Transformed values.

    Raises
    ------
    SettingsError
        Unknown transform.
    DataError
        A log transform and some value <= 0 (the message gives how many and
        the smallest one).
    """
    check_choice(transform, opt.TRANSFORMS)
    x = np.asarray(x, dtype=float)
    if transform == "none":
        return x.copy()
    bad = x[~np.isnan(x) & (x <= 0)]
    if bad.size:
        word = "value is" if bad.size == 1 else "values are"
        raise DataError(
            f"'{name}': {transform} transform needs values > 0, but {bad.size} {word} <= 0 "
            f"(smallest {compact(float(bad.min()), 4)}); choose transform 'none' or "
            f"exclude those subjects",
            column=name,
        )
    fn = {"log": np.log, "log2": np.log2, "log10": np.log10}[transform]
    return fn(x)


def center_values(x, center, *, name: str = "covariate") -> tuple[np.ndarray, float]:
    """Subtract a centre from a per-subject covariate.

    Parameters
    ----------
    x : array_like of float
        Values (NaN = missing, ignored when computing the centre).
    center : {"none", "mean", "median"} or float
        What to subtract; a number is used as given.
    name : str, keyword-only
        Column name used in error messages.

    Returns
    -------
    centred : ndarray of float
        ``x - center_value``.
    center_value : float
        The value subtracted (0.0 for ``"none"``).

    Notes
    -----
    Centring changes the meaning of the intercept (the mean response of a
    subject at the centre value) but not the time-by-covariate slope.
    """
    x = np.asarray(x, dtype=float)
    if isinstance(center, bool):
        raise SettingsError(f"center == {center!r}, must be one of {list(opt.CENTER_WORDS)} or a number",
                            field="center")
    if isinstance(center, str):
        if center not in opt.CENTER_WORDS:
            raise SettingsError(
                f"center == {center!r}, must be one of {list(opt.CENTER_WORDS)} or a number",
                field="center")
        if center == "none":
            return x.copy(), 0.0
        ok = x[~np.isnan(x)]
        if ok.size == 0:
            raise DataError(f"'{name}' has no values, so its {center} cannot be computed",
                            column=name)
        value = float(np.mean(ok) if center == "mean" else np.median(ok))
    else:
        value = float(center)
        if not math.isfinite(value):
            raise SettingsError(f"center == {center!r}, must be a finite number", field="center")
    return x - value, value


def cut_strata(values, *, method: str, n: int = 4, breaks=(), name: str = "covariate",
               unit_label: str = "", transform: str = "none") -> Strata:
    """Cut a numeric per-subject covariate into ordered strata.

    Parameters
    ----------
    values : array_like of float (n_subjects,)
        Covariate value per subject; NaN = missing (stratum -1).
    method : {"equal-width", "quantile", "custom"}, keyword-only
        ``"equal-width"``: edges ``linspace(min, max, n+1)`` on the scale of
        ``transform`` (equal widths in log2 for ``"log2"``), reported back in
        the covariate's own units.
        ``"quantile"``: edges ``quantile(values, linspace(0, 1, n+1))``
        (linear interpolation, as ``np.quantile``); duplicate edges are merged
        and a note says so.
        ``"custom"``: edges ``(min, *breaks, max)``; every break must lie
        strictly between the smallest and largest observed value. Breaks are
        given in the covariate's own units whatever the transform.
    n : int
        Number of strata for equal-width and quantile cuts (>= 1).
    breaks : sequence of float
        Inner cut points for ``"custom"``, strictly increasing.
    name : str
        Covariate name (used in labels' notes and error messages).
    unit_label : str
        Appended to each label, e.g. ``"mg/g"``.
    transform : {"none", "log", "log2", "log10"}
        Scale on which equal-width strata are cut. Quantile strata are the
        same on any monotone scale and custom breaks are in the own units, so
        it changes only ``"equal-width"``.

    Returns
    -------
    Strata

    Notes
    -----
    Intervals are left-closed, ``e_j <= v < e_{j+1}``, except the last one,
    which is closed on both sides. Labels print the edges with the fewest
    decimals that keep neighbouring edges distinct.
    """
    check_choice(method, opt.STRATA_METHODS)
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise SettingsError(f"n_strata == {n!r}, must be an integer >= 1", field="n_strata")
    check_choice(transform, opt.TRANSFORMS)
    v = np.asarray(values, dtype=float)
    if v.ndim != 1:
        raise DataError(f"'{name}': expected one value per subject (1-D), got shape {v.shape}",
                        column=name)
    ok = ~np.isnan(v)
    if not ok.any():
        raise DataError(f"'{name}' has no values, so it cannot be cut into strata", column=name)
    if np.isinf(v[ok]).any():
        raise DataError(f"'{name}' has infinite values; expected finite numbers", column=name)
    lo, hi = float(v[ok].min()), float(v[ok].max())
    notes: list[str] = []
    # membership is decided on the scale the edges were cut on (cut_v vs cut_edges);
    # ``edges`` are the same cut points in the covariate's own units, for labels
    cut_v = v
    if method == "equal-width" and transform != "none":
        cut_v = transform_values(v, transform, name=name)
        cut_edges = equal_width_edges(float(cut_v[ok].min()), float(cut_v[ok].max()), n)
        edges = _untransform(cut_edges, transform)
        edges[0], edges[-1] = lo, hi
    elif method == "equal-width":
        edges = equal_width_edges(lo, hi, n)
    elif method == "quantile":
        edges = np.quantile(v[ok], np.linspace(0.0, 1.0, int(n) + 1))
    else:
        b = np.asarray(tuple(breaks), dtype=float)
        if b.size == 0:
            raise SettingsError("the custom method needs breaks, e.g. breaks=(1.5, 3.0)",
                                field="breaks")
        if np.any(np.diff(b) <= 0):
            raise SettingsError(f"breaks {b.tolist()} must be strictly increasing", field="breaks")
        for x in b:
            if not lo < x < hi:
                raise SettingsError(
                    f"break {compact(float(x), 6)} is outside the range of '{name}' "
                    f"({compact(lo, 6)} to {compact(hi, 6)}); breaks must lie strictly "
                    f"between the smallest and largest value", field="breaks")
        edges = np.concatenate(([lo], b, [hi]))
    edges = edges.astype(float)
    if cut_v is v:
        cut_edges = edges
    if lo == hi:
        edges = cut_edges = np.array([lo, hi])
        cut_v = v
        notes.append(f"'{name}' has a single value ({compact(lo, 6)}), so there is one stratum")
    else:
        unique, first = np.unique(cut_edges, return_index=True)
        if unique.size < edges.size:
            k = unique.size - 1
            notes.append(
                f"asked for {edges.size - 1} strata of '{name}' but tied values leave only "
                f"{k} distinct cut ranges; using {k} strata"
            )
        edges, cut_edges = edges[first], unique
    k = edges.size - 1
    codes = np.full(v.shape, -1, dtype=np.int64)
    codes[ok] = edge_bin(cut_v[ok], cut_edges)
    labels = _range_labels(edges, unit_label)
    counts = np.bincount(codes[ok], minlength=k)
    for j in np.flatnonzero(counts == 0):
        notes.append(f"stratum {labels[j]} of '{name}' has no subjects")
    notes.extend(small_group_notes(counts, labels, name=name, n_subjects=v.size))
    return Strata(codes=codes, labels=labels, edges=edges, kind="numeric", name=name,
                  notes=tuple(notes))


def categorical_strata(values, *, name: str) -> Strata:
    """One stratum per level of a categorical per-subject covariate.

    Parameters
    ----------
    values : array_like or pandas Categorical (n_subjects,)
        Level per subject; None/NaN/empty string = missing (stratum -1).
    name : str, keyword-only
        Covariate name.

    Returns
    -------
    Strata
        Levels in category order for a pandas Categorical, otherwise sorted
        (numerically if all levels are numbers, else as text).
    """
    s = pd.Series(values)
    if s.dtype == "category":
        levels = [c for c in s.cat.categories]
        miss = s.isna().to_numpy()
    else:
        miss = s.isna().to_numpy() | (s.astype(str).str.strip() == "").to_numpy()
        present = pd.unique(s[~miss])
        try:
            levels = sorted(present)
        except TypeError:
            levels = sorted(present, key=str)
    index = {lev: i for i, lev in enumerate(levels)}
    raw = s.to_numpy(dtype=object)
    codes = np.full(len(s), -1, dtype=np.int64)
    for i in np.flatnonzero(~miss):  # dictionary lookup per subject; no estimator here
        codes[i] = index[raw[i]]
    labels = tuple(str(lev) for lev in levels)
    counts = np.bincount(codes[codes >= 0], minlength=len(labels))
    notes = tuple(f"level '{lab}' of '{name}' has no subjects"
                  for lab, c in zip(labels, counts) if c == 0)
    notes += small_group_notes(counts, labels, name=name, n_subjects=len(s))
    return Strata(codes=codes, labels=labels, edges=None, kind="categorical", name=name,
                  notes=notes)


def _untransform(t: np.ndarray, transform: str) -> np.ndarray:
    """Inverse of :func:`transform_values` for a log transform."""
    return {"log": np.exp, "log2": np.exp2, "log10": lambda a: np.power(10.0, a)}[transform](t)


def small_groups(counts, n_subjects: int) -> np.ndarray:
    """Indices of groups that are small: 1 or more subjects but fewer than
    :data:`SMALL_GROUP_SUBJECTS`, or under :data:`SMALL_GROUP_SHARE` of ``n_subjects``.

    Both thresholds are common practice, not statistical rules. A single group
    (no split) is never flagged, and empty groups have their own note.
    """
    c = np.asarray(counts, dtype=np.int64)
    if c.size < 2 or n_subjects <= 0:
        return np.empty(0, dtype=np.int64)
    small = (c < SMALL_GROUP_SUBJECTS) | (c < SMALL_GROUP_SHARE * n_subjects)
    return np.flatnonzero(small & (c > 0))


def small_group_notes(counts, labels, *, name: str, n_subjects: int) -> tuple[str, ...]:
    """One warning per small group (see :func:`small_groups`), in plain words.

    Parameters
    ----------
    counts : int array (k,)
        Subjects per group.
    labels : sequence of str (k,)
    name : str, keyword-only
        Stratifier name.
    n_subjects : int
        Subjects in the cohort (with or without a value), the base of the share.
    """
    out = []
    for j in small_groups(counts, n_subjects):
        n = int(counts[j])
        share = 100.0 * n / n_subjects
        out.append(f"group {labels[j]} of '{name}' has only {n} subject{'s' if n != 1 else ''} "
                   f"({share:.3g}% of {n_subjects:,}); its summaries and mean curve rest on few "
                   f"subjects (small: under {SMALL_GROUP_SUBJECTS} subjects or under "
                   f"{SMALL_GROUP_SHARE:.0%} of the cohort); consider fewer groups")
    return tuple(out)


# --------------------------------------------------------------------------- labels
def _edge_texts(edges: np.ndarray) -> list[str]:
    """Texts for the edges with a shared number of decimals that keeps them distinct."""
    finite = edges[np.isfinite(edges)]
    big = np.max(np.abs(finite)) if finite.size else 0.0
    if big >= 1e7 or (0 < big < 1e-3):
        for sig in range(3, 10):
            texts = [compact(float(e), sig) for e in edges]
            if len(set(texts)) == len(texts):
                return texts
        return texts
    gaps = np.diff(edges)
    gap = float(gaps[gaps > 0].min()) if np.any(gaps > 0) else max(big, 1.0)
    # two significant digits of the smallest gap between neighbouring edges
    decimals = 1 - math.floor(math.log10(gap))
    for d in range(decimals, decimals + 8):
        texts = [fixed(float(e), d) for e in edges]
        if len(set(texts)) == len(texts):
            return texts
    return texts


def _range_labels(edges: np.ndarray, unit_label: str) -> tuple[str, ...]:
    texts = _edge_texts(edges)
    unit = f" {unit_label.strip()}" if unit_label and unit_label.strip() else ""
    return tuple(f"{a}{RANGE_SEP}{b}{unit}" for a, b in zip(texts[:-1], texts[1:]))
