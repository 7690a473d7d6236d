"""The mean (fixed-effects) part of a longitudinal model, chosen from options.

A :class:`MeanModel` says which terms enter: time (linear, or a natural cubic
spline), the transformed and centred primary baseline covariate ``x``, the
time × ``x`` interaction (the "does the covariate change the rate of change"
term), and baseline confounders. :func:`design` turns it into a design matrix
in panel row order, checking the covariates on the way.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..errors import ModelError
from ..preparation.panel import Panel
from ..splines import natural_spline_basis, spline_knots

#: Name of the intercept column.
INTERCEPT = "intercept"
#: Name of the linear time column.
TIME = "time"
#: Relative tolerance of the rank check (singular values below tol × largest).
_RANK_TOL = 1e-9


# --------------------------------------------------------------------------- options
@dataclass(frozen=True)
class MeanModel:
    """Which fixed-effect terms the model contains.

    Attributes
    ----------
    time : bool
        Include a time trend (linear unless ``time_spline_df`` is set).
    covariate : bool
        Include the primary covariate ``x`` (transformed and centred, one value per subject).
    interaction : bool
        Include time × ``x``: the difference in slope per unit of ``x``.
        Requires ``time`` and ``covariate`` (main effects are kept with their interaction).
    confounders : tuple of str
        Baseline columns adjusted for. Numeric columns enter as they are;
        other columns as treatment indicators against their most frequent level.
    time_spline_df : int or None
        If set (>= 1), time enters as a natural cubic spline with this many
        columns instead of a straight line. The interaction always uses
        *linear* time, so its coefficient remains "difference in average
        slope per unit of x" while the spline absorbs curvature of the
        reference trajectory.
    """

    time: bool = True
    covariate: bool = True
    interaction: bool = True
    confounders: tuple[str, ...] = ()
    time_spline_df: int | None = None

    def __post_init__(self):
        conf = self.confounders
        if isinstance(conf, str):
            conf = (conf,) if conf else ()
        object.__setattr__(self, "confounders", tuple(str(c) for c in conf))
        if len(set(self.confounders)) != len(self.confounders):
            raise ModelError(f"confounders {list(self.confounders)} list a column twice")
        df = self.time_spline_df
        if df is not None:
            if isinstance(df, bool) or not isinstance(df, (int, np.integer)):
                raise ModelError(f"time_spline_df == {df!r}, must be a whole number >= 1 or None")
            if df < 1:
                raise ModelError(f"time_spline_df == {df}, must be >= 1")
            object.__setattr__(self, "time_spline_df", int(df))
        if self.interaction and not (self.time and self.covariate):
            raise ModelError("the time × covariate interaction needs both the time and the "
                             "covariate terms in the model; switch them on or drop the interaction")

    def describe(self, covariate_name: str = "x") -> str:
        """Plain-text description, e.g. for a report.

        Parameters
        ----------
        covariate_name : str
            How to call the primary covariate.

        Returns
        -------
        str
        """
        parts = ["an intercept"]
        if self.time:
            if self.time_spline_df and self.time_spline_df > 1:
                parts.append(f"a natural cubic spline in time ({self.time_spline_df} df)")
            else:
                parts.append("a linear time trend")
        if self.covariate:
            parts.append(f"{covariate_name} at baseline")
        if self.interaction:
            extra = " (with linear time)" if self.time_spline_df and self.time_spline_df > 1 else ""
            parts.append(f"its interaction with time{extra}, i.e. a slope that depends on "
                         f"{covariate_name}")
        if self.confounders:
            parts.append("adjustment for " + ", ".join(self.confounders))
        text = ", ".join(parts[:-1]) + " and " + parts[-1] if len(parts) > 1 else parts[0]
        return "Mean model: " + text + "."

    def to_json(self) -> dict:
        """Plain dict of the options (JSON-serialisable)."""
        return {"time": self.time, "covariate": self.covariate, "interaction": self.interaction,
                "confounders": list(self.confounders), "time_spline_df": self.time_spline_df}

    @classmethod
    def from_json(cls, d: dict) -> "MeanModel":
        """Inverse of :meth:`to_json`."""
        d = dict(d)
        d["confounders"] = tuple(d.get("confounders") or ())
        return cls(**d)


@dataclass(frozen=True, eq=False)
class Design:
    """A fixed-effects design matrix and what its columns mean.

    Attributes
    ----------
    X : ndarray (n_obs, p)
        Design in panel row order.
    names : tuple of str
        Column (term) names.
    interaction_index : int or None
        Column of the time × covariate term.
    interaction_term : str or None
        Its name, e.g. "time × x".
    covariate_term : str or None
        Name of the covariate main effect.
    time_terms : tuple of str
        Names of the time columns (one when linear, ``time_spline_df`` with a spline).
    model : MeanModel
    knots : tuple of float
        Spline knots (empty without a spline).
    reference_levels : dict
        Reference level of each categorical confounder.
    """

    X: np.ndarray
    names: tuple
    interaction_index: int | None
    interaction_term: str | None
    covariate_term: str | None
    time_terms: tuple
    model: MeanModel
    knots: tuple = ()
    reference_levels: dict = field(default_factory=dict)

    def to_frame(self) -> pd.DataFrame:
        """Design as a DataFrame with the term names as columns."""
        return pd.DataFrame(self.X, columns=list(self.names))


# --------------------------------------------------------------------------- public API
def design(panel: Panel, baseline: pd.DataFrame, model: MeanModel = MeanModel(), *,
           covariate_name: str = "x") -> Design:
    """Build the fixed-effects design matrix of a mean model.

    Parameters
    ----------
    panel : Panel
        The visits (row order of the result).
    baseline : DataFrame
        One row per panel subject, in subject-code order, holding
        ``covariate_name`` and every confounder column.
    model : MeanModel
    covariate_name : str
        Baseline column of the transformed, centred primary covariate.

    Returns
    -------
    Design

    Raises
    ------
    ModelError
        Baseline length does not match the panel; a used column is missing,
        entirely missing, has no variation, or has missing values for some
        subjects (use :func:`complete_subjects` to drop them); or the columns
        are collinear (the message names them).

    Notes
    -----
    Row j of subject i: (1, t_ij, x_i, t_ij·x_i, c_i) — or the spline basis
    N_1(t_ij)..N_df(t_ij) in place of t_ij. Categorical confounders are coded
    as indicators 1[c_i = level] for every level but the most frequent one
    (ties: the first in sorted order).
    """
    if not isinstance(model, MeanModel):
        raise ModelError(f"model must be a MeanModel, got {type(model).__name__}")
    if len(baseline) != panel.n_subjects:
        raise ModelError(f"baseline table has {len(baseline)} rows but the panel has "
                         f"{panel.n_subjects} subjects; give one row per subject in panel order")
    _check_complete(baseline, model, covariate_name)
    codes = panel.codes
    t = panel.time
    cols: list[np.ndarray] = [np.ones(panel.n_obs)]
    names: list[str] = [INTERCEPT]
    time_terms: tuple = ()
    knots: tuple = ()
    if model.time:
        if model.time_spline_df and model.time_spline_df > 1:
            knots = spline_knots(t, model.time_spline_df, rule="observations")
            basis = natural_spline_basis(t, knots)
            knots = tuple(float(v) for v in knots)
            time_terms = tuple(f"time (spline {k + 1})" for k in range(basis.shape[1]))
            cols.extend(basis.T)
        else:
            cols.append(t.astype(float))
            time_terms = (TIME,)
        names.extend(time_terms)
        if np.ptp(t) == 0:
            raise ModelError("time has no variation (every visit at the same time); "
                             "a time trend cannot be estimated")
    cov_term = None
    x = None
    if model.covariate:
        x = _numeric_column(baseline, covariate_name)
        if np.ptp(x) == 0:
            raise ModelError(f"covariate '{covariate_name}' has no variation (every subject "
                             f"has {x[0]:g}); its effect cannot be estimated")
        cols.append(x[codes])
        names.append(covariate_name)
        cov_term = covariate_name
    inter_idx = inter_term = None
    if model.interaction:
        inter_term = f"{TIME} × {covariate_name}"
        inter_idx = len(cols)
        cols.append(t * x[codes])
        names.append(inter_term)
    refs = {}
    for c in model.confounders:
        block, labels, ref = confounder_columns(baseline, c)
        if ref is not None:
            refs[c] = ref
        cols.extend(block[codes].T)
        names.extend(labels)
    X = np.column_stack(cols)
    names_t = tuple(names)
    if len(set(names_t)) != len(names_t):
        dup = sorted({n for n in names_t if names_t.count(n) > 1})
        raise ModelError(f"term names repeat: {dup}; a confounder has the same name as another term")
    check_rank(X, names_t)
    return Design(X=X, names=names_t, interaction_index=inter_idx, interaction_term=inter_term,
                  covariate_term=cov_term, time_terms=time_terms, model=model, knots=knots,
                  reference_levels=refs)


def complete_subjects(baseline: pd.DataFrame, model: MeanModel = MeanModel(), *,
                      covariate_name: str = "x") -> np.ndarray:
    """Which subjects have a value for every covariate the model uses.

    Parameters
    ----------
    baseline : DataFrame
        One row per subject.
    model : MeanModel
    covariate_name : str

    Returns
    -------
    ndarray of bool (n_subjects,)
        True where the subject can enter the model.

    Raises
    ------
    ModelError
        A used column is absent from ``baseline``.
    """
    keep = np.ones(len(baseline), dtype=bool)
    for c in used_columns(model, covariate_name):
        _require_column(baseline, c)
        keep &= ~_missing(baseline[c])
    return keep


def used_columns(model: MeanModel, covariate_name: str = "x") -> tuple[str, ...]:
    """Baseline columns the model reads (primary covariate first)."""
    cols = ([covariate_name] if model.covariate else []) + list(model.confounders)
    return tuple(dict.fromkeys(cols))


def confounder_columns(baseline: pd.DataFrame, column: str):
    """Per-subject columns of one confounder.

    Parameters
    ----------
    baseline : DataFrame
    column : str

    Returns
    -------
    block : ndarray (n_subjects, k)
    labels : list of str
        Term names: the column name for a numeric confounder, else
        "column: level vs reference" for each non-reference level.
    reference : str or None
        Reference level of a categorical confounder (its most frequent level).
    """
    _require_column(baseline, column)
    s = baseline[column]
    if _is_numeric(s):
        v = s.to_numpy(dtype=float)
        if np.ptp(v) == 0:
            raise ModelError(f"confounder '{column}' has no variation (every subject has "
                             f"{v[0]:g}); remove it from the model")
        return v[:, None], [column], None
    vals = s.astype(object).map(str).to_numpy(dtype=object)
    levels, counts = np.unique(vals, return_counts=True)
    if levels.size < 2:
        raise ModelError(f"confounder '{column}' has a single level ({levels[0]!r}) among the "
                         "included subjects; remove it from the model")
    ref = levels[int(np.argmax(counts))]  # np.unique sorts: ties go to the first level
    others = [lv for lv in levels if lv != ref]
    block = np.column_stack([(vals == lv).astype(float) for lv in others])
    return block, [f"{column}: {lv} vs {ref}" for lv in others], str(ref)


def check_rank(X: np.ndarray, names) -> None:
    """Raise ModelError naming the columns that make ``X`` rank deficient.

    Columns are added one at a time (after scaling to unit norm); the first
    that does not raise the rank is reported together with the earlier
    columns its linear combination uses.
    """
    X = np.asarray(X, dtype=float)
    norms = np.linalg.norm(X, axis=0)
    if np.any(norms == 0):
        j = int(np.flatnonzero(norms == 0)[0])
        raise ModelError(f"design column '{names[j]}' is all zero among the included subjects")
    Z = X / norms
    sv = np.linalg.svd(Z, compute_uv=False)
    if sv[-1] > _RANK_TOL * sv[0] * max(Z.shape):
        return
    for j in range(1, Z.shape[1]):
        A = Z[:, :j]
        coef, *_ = np.linalg.lstsq(A, Z[:, j], rcond=None)
        resid = Z[:, j] - A @ coef
        if np.linalg.norm(resid) < 1e-7:
            used = [names[i] for i in np.flatnonzero(np.abs(coef) > 1e-6)]
            raise ModelError(
                f"design columns are collinear: '{names[j]}' is a linear combination of "
                f"{used}; remove one of them (e.g. a confounder that duplicates another)")
    raise ModelError("design matrix is numerically rank deficient; check the confounders "
                     f"{list(names)}")


# --------------------------------------------------------------------------- helpers
def _check_complete(baseline, model, covariate_name):
    for c in used_columns(model, covariate_name):
        _require_column(baseline, c)
        miss = _missing(baseline[c])
        if miss.all():
            raise ModelError(f"column '{c}' has no values for any included subject")
        if miss.any():
            n = int(miss.sum())
            raise ModelError(
                f"column '{c}' is missing for {n} of {len(miss)} subjects; drop them first "
                "(complete_subjects() gives the mask of subjects with every value)")


def _require_column(baseline, c):
    if c not in baseline.columns:
        raise ModelError(f"column '{c}' is not among the baseline covariates "
                         f"{[str(k) for k in baseline.columns]}")


def _missing(s: pd.Series) -> np.ndarray:
    miss = np.array(s.isna().to_numpy(dtype=bool), copy=True)
    if _is_numeric(s):
        miss = miss | ~np.isfinite(s.to_numpy(dtype=float, na_value=np.nan))
    return miss


def _is_numeric(s: pd.Series) -> bool:
    return pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_bool_dtype(s)


def _numeric_column(baseline, c) -> np.ndarray:
    s = baseline[c]
    if not _is_numeric(s):
        raise ModelError(f"covariate '{c}' must be numeric (dtype {s.dtype}); a categorical "
                         "primary covariate cannot enter the slope interaction")
    return s.to_numpy(dtype=float, na_value=np.nan)
