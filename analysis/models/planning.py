"""Plan the size of a next study from a fitted covariance.

Given the within-subject covariance fitted to this cohort, a planned visit
schedule, expected dropout and the size of the time × covariate effect the
team wants to detect, how many subjects does a new study need?

Model per subject (the project's mean model without confounders, see
:mod:`analysis.models.mean_model`): columns intercept, time, x, time × x, with the
covariance ``V`` of the chosen working structure evaluated at the planned
visit times (:mod:`analysis.models.mixed.structures`).

Expected information
--------------------
A subject who is still in follow-up at the planned time ``t_j`` has visit
``j``; with a constant dropout hazard ``λ`` per time unit (times counted from
the origin) that happens with probability ``S_j = exp(−λ t_j)``. The
completed visits are the first ``k`` ones ("pattern k") with probability
``p_k = S_k − S_{k+1}`` (``S_{K+1} = 0``); pattern 0 contributes nothing.
The expected GLS information of one subject with covariate value ``x`` is
``Σ_k p_k X_kᵀ V_k⁻¹ X_k`` with ``X_k = [A_k, x A_k]``, ``A_k = [1, t]`` the
first ``k`` rows and ``V_k`` the leading ``k × k`` block of ``V``. Since it is
quadratic in ``x``, averaging over the covariate distribution needs only
``E[x]`` and ``E[x²]``::

    I = C ⊗ B̄,   C = [[1, E x], [E x, E x²]],   B̄ = Σ_k p_k A_kᵀ V_k⁻¹ A_k.

All patterns are computed from one Cholesky factor ``V = LLᵀ``: the factor of
the leading block ``V_k`` is the leading block of ``L``, so with
``W = L⁻¹A`` (rows ``w_j``) ``A_kᵀV_k⁻¹A_k = Σ_{j≤k} w_j w_jᵀ`` and therefore
``B̄ = Σ_j S_j w_j w_jᵀ`` (a cumulative sum over the patterns, regrouped).
For ``n`` subjects ``Var(β̂) = (n I)⁻¹``; the time × x entry is
``[B̄⁻¹]_{time,time} / (n Var x)``.

Power
-----
Two-sided Wald z-test at level α of the time × x coefficient ``δ``:
``power(n) = Φ(|δ|/se(n) − z_{1−α/2}) + Φ(−|δ|/se(n) − z_{1−α/2})`` with
``se(n) = sqrt(v₁/n)``. This is a large-sample normal approximation: the
covariance is treated as known (no allowance for estimating it) and no
t refinement of the reference distribution is made, so for small studies the
real power is somewhat lower. :func:`simulate_power` checks it by refitting
simulated cohorts with the project's own REML engine.

References
----------
Diggle, Heagerty, Liang & Zeger (2002), Analysis of Longitudinal Data, §2.4.
Fitzmaurice, Laird & Ware (2011), Applied Longitudinal Analysis, ch. 20.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import linalg as sla
from scipy import stats

from ..errors import ModelError, SettingsError
from ..jsonsafe import json_safe
from .mixed.structures import CORRELATIONS, PARAMETER_ORDER, correlation_function, spec_for

#: Study designs: a continuous covariate drawn like this cohort's, or two equal groups coded 0/1.
DESIGNS: tuple[str, ...] = ("continuous", "two-groups")
#: Term names of the planning mean model, in column order.
TERMS: tuple[str, ...] = ("intercept", "time", "x", "time × x")
#: Column of the time × covariate coefficient.
INTERACTION = 3
#: Points of the power curve.
CURVE_POINTS = 30

CAUTIONS: tuple[str, ...] = (
    "The plan inherits this cohort's fitted covariance and its biases (who was included, "
    "how visits were timed, who dropped out); a different population or schedule may vary "
    "more or less.",
    "The effect to detect is the team's decision on what change in slope matters; it is not "
    "estimated here.",
    "Large-sample normal approximation with the covariance treated as known: small studies "
    "have somewhat less power than shown. Check it by simulation.",
    "Exploratory research statistics: not a substitute for a trial statistician's review and "
    "sign-off, and not for individual care decisions.",
)


# ----------------------------------------------------------------------------- covariance
@dataclass(frozen=True)
class CovarianceModel:
    """A fitted working covariance: structure, correlation shape and natural parameters.

    Attributes
    ----------
    structure : str
        One of :data:`analysis.models.mixed.STRUCTURES`.
    correlation : str or None
        "exponential" or "gaussian" for structures with a serial process, else None.
    parameters : tuple of (str, float)
        Natural variance parameters in :data:`analysis.models.mixed.PARAMETER_ORDER`
        (``intercept_var``, ``slope_var``, ``intercept_slope_cov``, ``serial_var``,
        ``range``, ``error_var``: those of the structure), on the cohort's time scale.
    name : str
        Display name (e.g. the candidate's name); the structure when empty.
    """

    structure: str
    correlation: str | None
    parameters: tuple
    name: str = ""

    def __post_init__(self):
        spec = spec_for(self.structure)
        params = dict(self.parameters)
        missing = [k for k in spec.parameters if k not in params]
        if missing:
            raise ModelError(f"covariance {self.structure!r} needs the variance parameter(s) "
                             f"{missing}; got {sorted(params)}")
        extra = sorted(set(params) - set(spec.parameters))
        if extra:
            raise ModelError(f"variance parameter(s) {extra} do not belong to structure "
                             f"{self.structure!r}; its parameters are {list(spec.parameters)}")
        clean = []
        for k in PARAMETER_ORDER:
            if k not in params:
                continue
            v = params[k]
            try:
                v = float(v)
            except (TypeError, ValueError):
                raise ModelError(f"variance parameter {k} == {v!r}, must be a number") from None
            if not np.isfinite(v) or (k != "intercept_slope_cov" and v < 0):
                raise ModelError(f"variance parameter {k} == {v!r}, must be a finite number "
                                 + ("" if k == "intercept_slope_cov" else ">= 0"))
            clean.append((k, v))
        if spec.serial:
            if self.correlation not in CORRELATIONS:
                raise ModelError(f"correlation {self.correlation!r} is not known for the serial "
                                 f"process; choose one of {list(CORRELATIONS)}")
            if params["range"] <= 0:
                raise ModelError(f"variance parameter range == {params['range']!r}, must be > 0")
        corr = self.correlation if spec.serial else None
        object.__setattr__(self, "parameters", tuple(clean))
        object.__setattr__(self, "correlation", corr)
        object.__setattr__(self, "name", str(self.name or self.structure))

    @classmethod
    def of(cls, structure: str, variance: dict, correlation: str | None = "exponential",
           name: str = "") -> "CovarianceModel":
        """Build from a dict of natural parameters (as ``MixedFit.variance``)."""
        return cls(structure, correlation, tuple(dict(variance).items()), name)

    @classmethod
    def from_fit(cls, fit, name: str = "") -> "CovarianceModel":
        """From a :class:`analysis.models.mixed.MixedFit` (its structure, correlation and variance)."""
        return cls.of(fit.structure, fit.variance, fit.correlation, name or fit.label)

    @classmethod
    def from_json(cls, d: dict) -> "CovarianceModel":
        """From :meth:`to_json`, or a model entry of ``MixedFit.to_json`` / ``ModelSet.to_json``
        (where each variance value is ``{"estimate": ...}``)."""
        var = {k: (v["estimate"] if isinstance(v, dict) else v)
               for k, v in (d.get("variance") or {}).items()}
        return cls.of(d["structure"], var, d.get("correlation"), d.get("name") or "")

    @property
    def variance(self) -> dict:
        """Natural parameters as a dict."""
        return dict(self.parameters)

    def covariance(self, times) -> np.ndarray:
        """``V`` at visit times ``t`` (same time unit as the fit).

        Notes
        -----
        ``V_jk = z_jᵀ G z_k + σ² ρ(|t_j − t_k|) + τ² 1[j = k]`` with ``z = 1`` (random
        intercept) or ``z = (1, t)`` (intercept and slope), as in
        :func:`analysis.models.mixed.likelihood.covariance_stack`.
        """
        t = np.asarray(times, dtype=float)
        v = self.variance
        V = np.zeros((t.size, t.size))
        V += v.get("intercept_var", 0.0)
        if "slope_var" in v:
            V += v["intercept_slope_cov"] * (t[:, None] + t[None, :])
            V += v["slope_var"] * np.outer(t, t)
        if "serial_var" in v:
            V += v["serial_var"] * correlation_function(np.abs(t[:, None] - t[None, :]),
                                                        v["range"], self.correlation)
        V[np.diag_indices(t.size)] += v["error_var"]
        return V

    def to_json(self) -> dict:
        return {"name": self.name, "structure": self.structure, "correlation": self.correlation,
                "variance": self.variance}


def _as_covariance(model) -> CovarianceModel:
    if isinstance(model, CovarianceModel):
        return model
    if isinstance(model, dict):
        return CovarianceModel.from_json(model)
    if hasattr(model, "variance") and hasattr(model, "structure"):
        return CovarianceModel.from_fit(model)
    raise ModelError(f"cannot read a fitted covariance from {type(model).__name__}; give a "
                     "CovarianceModel, a fitted mixed model or its JSON dict")


# ----------------------------------------------------------------------------- inputs
def _floats(values, what):
    try:
        arr = np.asarray(values, dtype=float).ravel()
    except (TypeError, ValueError):
        raise SettingsError(f"{what} must be numbers") from None
    return arr


@dataclass(frozen=True)
class PlanInputs:
    """What the next study looks like and what it should detect.

    Attributes
    ----------
    covariance : CovarianceModel
        The fitted within-subject covariance the plan assumes.
    effect : float
        The effect to detect. ``design="continuous"``: the time × x coefficient on the
        covariate's analysis scale (change in slope per time unit per unit of x).
        ``design="two-groups"``: the difference in slopes between the groups (per time unit).
    schedule : tuple of float
        Planned visit times since the origin, strictly increasing, >= 0, at least two.
    design : {"continuous", "two-groups"}
    covariate : tuple of float
        ``"continuous"`` only: covariate values on the analysis scale (e.g. this cohort's
        transformed, centred x); the plan uses their mean and variance.
    alpha : float
        Two-sided significance level, in (0, 1).
    power : float
        Target power, in (alpha, 1).
    dropout_rate : float
        Constant dropout hazard per time unit (>= 0): visit j is completed with
        probability exp(−rate·t_j).
    """

    covariance: CovarianceModel
    effect: float
    schedule: tuple
    design: str = "continuous"
    covariate: tuple = ()
    alpha: float = 0.05
    power: float = 0.8
    dropout_rate: float = 0.0

    def __post_init__(self):
        object.__setattr__(self, "covariance", _as_covariance(self.covariance))
        if self.design not in DESIGNS:
            raise SettingsError(f"design {self.design!r} is not known; choose one of "
                                f"{list(DESIGNS)}")
        for name, lo, what in (("alpha", 0.0, "0"), ("power", None, "alpha")):
            v = getattr(self, name)
            lo = self.alpha if lo is None else lo
            if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)) \
                    or not (lo < float(v) < 1.0):
                raise SettingsError(f"{name} == {v!r}, must be a number strictly between "
                                    f"{what} ({lo:g}) and 1")
            object.__setattr__(self, name, float(v))
        eff = self.effect
        if isinstance(eff, bool) or not isinstance(eff, (int, float, np.integer, np.floating)) \
                or not np.isfinite(eff) or eff == 0:
            raise SettingsError(f"effect == {eff!r}, must be a finite non-zero number (the "
                                "slope difference the study should detect)")
        object.__setattr__(self, "effect", float(eff))
        rate = self.dropout_rate
        if isinstance(rate, bool) or not isinstance(rate, (int, float, np.integer, np.floating)) \
                or not np.isfinite(rate) or rate < 0:
            raise SettingsError(f"dropout_rate == {rate!r}, must be a finite number >= 0 "
                                "(dropouts per subject per time unit)")
        object.__setattr__(self, "dropout_rate", float(rate))
        t = _floats(self.schedule, "schedule (planned visit times)")
        if t.size < 2:
            raise SettingsError(f"schedule has {t.size} visit time(s); plan at least two to "
                                "estimate a slope")
        if not np.all(np.isfinite(t)) or t.min() < 0:
            raise SettingsError(f"schedule {t.tolist()} must hold finite times >= 0 since the "
                                "origin")
        if np.any(np.diff(t) <= 0):
            raise SettingsError(f"schedule {t.tolist()} must be strictly increasing (one visit "
                                "per time)")
        object.__setattr__(self, "schedule", tuple(float(v) for v in t))
        x = _floats(self.covariate, "covariate values")
        if self.design == "continuous":
            x = x[np.isfinite(x)]
            if x.size < 2 or np.ptp(x) == 0:
                raise SettingsError("the continuous design needs covariate values with some "
                                    f"variation (got {x.size} finite value(s)"
                                    + (f", all {x[0]:g}" if x.size else "") + ")")
        elif x.size:
            raise SettingsError("covariate values are used only by the continuous design; the "
                                "two-groups design codes the groups 0 and 1 in equal numbers")
        object.__setattr__(self, "covariate", tuple(float(v) for v in x))

    @property
    def covariate_moments(self) -> tuple[float, float]:
        """(E x, Var x) of the covariate distribution (population variance)."""
        if self.design == "two-groups":
            return 0.5, 0.25
        x = np.asarray(self.covariate)
        return float(x.mean()), float(x.var())

    def to_json(self) -> dict:
        mean, var = self.covariate_moments
        return json_safe({
            "design": self.design, "effect": self.effect,
            "effect_meaning": ("difference in slopes between two equal groups (per time unit)"
                               if self.design == "two-groups" else
                               "time × x coefficient: change in slope per time unit per unit of "
                               "x on its analysis scale"),
            "alpha": self.alpha, "power": self.power, "test": "two-sided Wald z-test",
            "schedule": list(self.schedule), "dropout_rate": self.dropout_rate,
            "dropout_model": "constant hazard from the origin: visit at t completed with "
                             "probability exp(-rate*t)",
            "covariate": {"n_values": len(self.covariate) if self.design == "continuous" else None,
                          "mean": mean, "variance": var},
            "covariance": self.covariance.to_json(),
        })


# ----------------------------------------------------------------------------- information
def visit_probabilities(schedule, dropout_rate: float) -> np.ndarray:
    """P(visit j completed) = exp(−rate·t_j) for each planned time."""
    return np.exp(-float(dropout_rate) * np.asarray(schedule, dtype=float))


def pattern_probabilities(schedule, dropout_rate: float) -> np.ndarray:
    """P(exactly the first k visits completed), k = 0..K (length K + 1, sums to 1)."""
    s = visit_probabilities(schedule, dropout_rate)
    upper = np.concatenate(([1.0], s))
    lower = np.concatenate((s, [0.0]))
    return upper - lower


def time_information(covariance: CovarianceModel, schedule, dropout_rate: float = 0.0
                     ) -> np.ndarray:
    """Expected information B̄ = Σ_k p_k A_kᵀV_k⁻¹A_k of (intercept, time), one subject.

    Parameters
    ----------
    covariance : CovarianceModel
    schedule : sequence of float
    dropout_rate : float

    Returns
    -------
    ndarray (2, 2)

    Raises
    ------
    ModelError
        The covariance is not positive definite at the planned times.
    """
    t = np.asarray(schedule, dtype=float)
    V = covariance.covariance(t)
    try:
        L = np.linalg.cholesky(V)
    except np.linalg.LinAlgError:
        raise ModelError(f"the covariance {covariance.name!r} is not positive definite at the "
                         f"planned visit times {t.tolist()}; a variance component is at or near "
                         "zero — choose another fitted structure") from None
    A = np.column_stack([np.ones_like(t), t])
    W = sla.solve_triangular(L, A, lower=True)
    S = visit_probabilities(t, dropout_rate)
    return W.T @ (S[:, None] * W)


def subject_information(inputs: PlanInputs) -> np.ndarray:
    """Expected per-subject information of (intercept, time, x, time × x), 4 × 4.

    ``I = C ⊗ B̄`` with ``C = [[1, E x], [E x, E x²]]``, averaged over dropout
    patterns and the covariate distribution (see the module notes).
    """
    B = time_information(inputs.covariance, inputs.schedule, inputs.dropout_rate)
    m1, var = inputs.covariate_moments
    C = np.array([[1.0, m1], [m1, var + m1 * m1]])
    return np.kron(C, B)


def power_at(subjects, effect: float, unit_variance: float, alpha: float) -> np.ndarray:
    """Two-sided Wald z-test power at ``subjects`` (array) for Var(β̂) = unit_variance / n."""
    n = np.asarray(subjects, dtype=float)
    se = np.sqrt(unit_variance / n)
    z = stats.norm.isf(alpha / 2)
    d = abs(effect) / se
    return stats.norm.cdf(d - z) + stats.norm.cdf(-d - z)


def _smallest_n(effect, unit_variance, alpha, power, step, floor):
    """Smallest multiple of ``step`` (>= floor) reaching ``power`` (power rises with n)."""
    z = stats.norm.isf(alpha / 2) + stats.norm.ppf(power)
    approx = z * z * unit_variance / effect**2  # the one-tail solution: enough, maybe 1 step over
    hi = max(step * math.ceil(approx / step), floor)
    if not np.isfinite(approx) or hi > 10**12:
        raise ModelError(f"the plan needs more than 10^12 subjects (about {approx:.3g}); the "
                         "effect is far too small for this covariance and schedule")
    lo = floor  # invariant: answer in [lo, hi], power(hi) >= target
    while lo < hi:
        mid = lo + step * ((hi - lo) // (2 * step))
        if power_at(mid, effect, unit_variance, alpha) >= power:
            hi = mid
        else:
            lo = mid + step
    return int(hi)


def minimum_subjects(inputs: PlanInputs) -> int:
    """Fewest subjects the structure can be fitted to (2 per random effect + 1, and the 4 fixed
    effects), rounded up to even for two groups."""
    n = max(spec_for(inputs.covariance.structure).min_subjects, len(TERMS))
    return n + (n % 2 if inputs.design == "two-groups" else 0)


# ----------------------------------------------------------------------------- result
@dataclass(frozen=True, eq=False)
class StudyPlan:
    """How many subjects a planned study needs, and its power at other sizes.

    Attributes
    ----------
    inputs : PlanInputs
    subjects_needed : int
        Total subjects to enrol (all groups); even for two groups. Subjects who drop out
        before the first visit count here (they contribute nothing).
    per_group : int or None
        subjects_needed / 2 for two groups.
    standard_error : float
        SE of the time × x estimator at ``subjects_needed``.
    achieved_power : float
        Power at ``subjects_needed`` (>= the target).
    unit_variance : float
        Var(β̂_{time×x}) × n: the variance for one subject.
    power_curve : tuple of (int, float)
        (subjects, power) over a grid up to about twice the needed size.
    information : ndarray (4, 4)
        Expected per-subject information of (intercept, time, x, time × x).
    visit_probability : ndarray (K,)
        P(visit j completed).
    pattern_probability : ndarray (K + 1,)
        P(exactly the first k visits completed), k = 0..K.
    expected_visits : float
    minimum : int
        Fewest subjects the model can be fitted to; ``subjects_needed`` is at least this.
    cautions : tuple of str
    """

    inputs: PlanInputs
    subjects_needed: int
    per_group: int | None
    standard_error: float
    achieved_power: float
    unit_variance: float
    power_curve: tuple
    information: np.ndarray
    visit_probability: np.ndarray
    pattern_probability: np.ndarray
    expected_visits: float
    minimum: int
    cautions: tuple = field(default=CAUTIONS)

    @property
    def assumptions(self) -> dict:
        """Every input, the variance parameters used and the approximation made."""
        a = self.inputs.to_json()
        a["approximation"] = ("large-sample normal (Wald z) with the covariance treated as "
                              "known; no t refinement")
        a["mean_model"] = list(TERMS)
        a["minimum_subjects"] = self.minimum
        return a

    def to_frame(self) -> pd.DataFrame:
        """The power curve: columns subjects, power."""
        return pd.DataFrame(list(self.power_curve), columns=["subjects", "power"])

    def to_json(self) -> dict:
        return json_safe({
            "subjects_needed": self.subjects_needed,
            "per_group": self.per_group,
            "standard_error": self.standard_error,
            "achieved_power": self.achieved_power,
            "power_curve": [{"subjects": n, "power": p} for n, p in self.power_curve],
            "visit_probability": self.visit_probability,
            "pattern_probability": self.pattern_probability,
            "expected_visits": self.expected_visits,
            "assumptions": self.assumptions,
            "cautions": list(self.cautions),
        })


def _curve_grid(needed: int, floor: int, step: int) -> np.ndarray:
    top = max(2 * needed, floor + step * (CURVE_POINTS - 1))
    grid = np.linspace(floor, top, CURVE_POINTS)
    grid = step * np.ceil(grid / step)
    return np.unique(np.concatenate([grid, [needed]])).astype(int)


def plan_study(inputs: PlanInputs) -> StudyPlan:
    """Subjects needed to detect ``inputs.effect`` with the target power.

    Parameters
    ----------
    inputs : PlanInputs

    Returns
    -------
    StudyPlan

    Raises
    ------
    ModelError
        The covariance is not positive definite at the planned times, or the effect
        is too small to plan for.

    Notes
    -----
    ``Var(β̂_{time×x}) = [(n I)⁻¹]_{44}`` from the expected per-subject GLS
    information ``I`` (:func:`subject_information`), and the smallest ``n``
    (a multiple of 2 for two groups, at least :func:`minimum_subjects`) with
    two-sided Wald z-test power >= the target. Large-sample normal
    approximation; see the module notes.
    """
    info = subject_information(inputs)
    try:
        cov1 = np.linalg.inv(info)
    except np.linalg.LinAlgError:
        raise ModelError("the planned design does not identify the time × x coefficient") from None
    unit_var = float(cov1[INTERACTION, INTERACTION])
    step = 2 if inputs.design == "two-groups" else 1
    floor = minimum_subjects(inputs)
    n = _smallest_n(inputs.effect, unit_var, inputs.alpha, inputs.power, step, floor)
    grid = _curve_grid(n, floor, step)
    curve = tuple((int(k), float(p)) for k, p in
                  zip(grid, power_at(grid, inputs.effect, unit_var, inputs.alpha)))
    s = visit_probabilities(inputs.schedule, inputs.dropout_rate)
    return StudyPlan(
        inputs=inputs, subjects_needed=n, per_group=n // 2 if step == 2 else None,
        standard_error=math.sqrt(unit_var / n),
        achieved_power=float(power_at(n, inputs.effect, unit_var, inputs.alpha)),
        unit_variance=unit_var, power_curve=curve, information=info, visit_probability=s,
        pattern_probability=pattern_probabilities(inputs.schedule, inputs.dropout_rate),
        expected_visits=float(s.sum()), minimum=floor)


# ----------------------------------------------------------------------------- per model
@dataclass(frozen=True, eq=False)
class PlanComparison:
    """Subjects needed under each fitted candidate covariance, side by side.

    Attributes
    ----------
    rows : tuple of dict
        One per model: name, structure, correlation, subjects_needed, per_group,
        standard_error, error (message when the plan could not be made, else None).
    """

    rows: tuple

    def to_frame(self) -> pd.DataFrame:
        return pd.DataFrame(list(self.rows), columns=["name", "structure", "correlation",
                                                      "subjects_needed", "per_group",
                                                      "standard_error", "error"])

    def to_json(self) -> dict:
        return json_safe({"per_model": list(self.rows)})


def compare_plans(inputs: PlanInputs, models) -> PlanComparison:
    """Plan the same study under every fitted covariance in ``models``.

    Parameters
    ----------
    inputs : PlanInputs
        Everything but the covariance is used (its ``covariance`` is replaced).
    models : iterable or dict
        :class:`CovarianceModel`, fitted :class:`analysis.models.mixed.MixedFit` or their JSON dicts;
        a dict maps display names to them (e.g. ``ModelSet.fits``).

    Returns
    -------
    PlanComparison
    """
    rows = []
    named = models.items() if isinstance(models, dict) else ((None, m) for m in models)
    for label, m in named:
        cov = _as_covariance(m)
        if label:
            cov = CovarianceModel(cov.structure, cov.correlation, cov.parameters, str(label))
        row = {"name": cov.name, "structure": cov.structure, "correlation": cov.correlation,
               "subjects_needed": None, "per_group": None, "standard_error": None, "error": None}
        try:
            p = plan_study(PlanInputs(**{**_fields(inputs), "covariance": cov}))
            row.update(subjects_needed=p.subjects_needed, per_group=p.per_group,
                       standard_error=p.standard_error)
        except ModelError as err:
            row["error"] = str(err)
        rows.append(row)
    return PlanComparison(tuple(rows))


def _fields(inputs: PlanInputs) -> dict:
    return {k: getattr(inputs, k) for k in inputs.__dataclass_fields__}


# ----------------------------------------------------------------------------- simulation
def simulate_planned_cohort(inputs: PlanInputs, subjects: int, rng: np.random.Generator):
    """Draw one cohort of the planned design from the fitted covariance.

    Returns ``(panel, X)``: the visits kept after dropout (subjects with no visit left out)
    and the design (intercept, time, x, time × x). The mean is zero except the time × x
    coefficient ``inputs.effect`` (REML and GLS are invariant to the other coefficients).
    Two groups: exactly half the subjects have x = 1. Continuous: x resampled with
    replacement from ``inputs.covariate``. Dropout time ~ Exp(rate); visit j is kept when
    the subject is still in follow-up at t_j. Noise ``e = L u`` with ``V = LLᵀ``: its first
    k entries have covariance ``V_k``, so truncation after dropout is exact.
    """
    from ..preparation.panel import Panel

    t = np.asarray(inputs.schedule)
    K = t.size
    if inputs.design == "two-groups":
        x = (np.arange(subjects) >= subjects // 2).astype(float)
    else:
        x = rng.choice(np.asarray(inputs.covariate), size=subjects, replace=True)
    L = np.linalg.cholesky(inputs.covariance.covariance(t))
    e = rng.standard_normal((subjects, K)) @ L.T
    y = inputs.effect * x[:, None] * t[None, :] + e
    if inputs.dropout_rate > 0:
        leave = rng.exponential(1.0 / inputs.dropout_rate, size=subjects)
        keep = t[None, :] < leave[:, None]
    else:
        keep = np.ones((subjects, K), dtype=bool)
    present = keep.any(axis=1)
    code = np.cumsum(present) - 1
    rows_s, rows_j = np.nonzero(keep)
    panel = Panel.from_codes(code[rows_s], t[rows_j], y[rows_s, rows_j])
    xr = x[rows_s]
    tr = t[rows_j]
    X = np.column_stack([np.ones(tr.size), tr, xr, tr * xr])
    return panel, X


@dataclass(frozen=True, eq=False)
class PowerCheck:
    """Empirical power of the planned design from simulated, refitted cohorts.

    Attributes
    ----------
    subjects : int
        Subjects per simulated cohort (enrolled, before dropout).
    reps : int
        Replications fitted (failed fits excluded).
    empirical_power : float
        Share of fits with two-sided Wald p < alpha for time × x.
    mcse : float
        Monte-Carlo SE sqrt(p(1 − p)/reps).
    analytic_power : float
        :func:`power_at` at ``subjects``.
    z : float
        (empirical − analytic) / mcse (NaN when mcse is 0).
    mean_se, empirical_sd : float
        Mean model-based SE of the estimate and SD of the estimates across replications.
    analytic_se : float
    n_failed, n_not_converged : int
    seconds : float
        Wall time of the simulation.
    """

    subjects: int
    reps: int
    empirical_power: float
    mcse: float
    analytic_power: float
    z: float
    mean_se: float
    empirical_sd: float
    analytic_se: float
    n_failed: int
    n_not_converged: int
    seconds: float

    def to_json(self) -> dict:
        return json_safe(dict(self.__dict__))


def simulate_power(inputs: PlanInputs, *, subjects: int | None = None, reps: int = 200,
                   seed: int = 0, method: str = "reml") -> PowerCheck:
    """Check the analytic power by simulation and refitting.

    Parameters
    ----------
    inputs : PlanInputs
    subjects : int, optional
        Cohort size; default the plan's ``subjects_needed``.
    reps : int
        Replications (>= 1).
    seed : int
    method : {"reml", "ml"}

    Returns
    -------
    PowerCheck

    Notes
    -----
    Each replication draws a cohort with :func:`simulate_planned_cohort`, fits the
    same structure and correlation with :func:`analysis.models.mixed.fit_mixed` and
    counts a rejection when the model-based Wald p-value of time × x is below
    alpha. Fits that raise are counted in ``n_failed`` and left out.
    """
    import time as _time

    from .mixed import fit_mixed

    if isinstance(reps, bool) or int(reps) != reps or reps < 1:
        raise SettingsError(f"reps == {reps!r}, must be a whole number >= 1")
    info = subject_information(inputs)
    unit_var = float(np.linalg.inv(info)[INTERACTION, INTERACTION])
    if subjects is None:
        subjects = plan_study(inputs).subjects_needed
    subjects = int(subjects)
    if subjects < minimum_subjects(inputs):
        raise SettingsError(f"subjects == {subjects}, must be >= {minimum_subjects(inputs)}")
    cov = inputs.covariance
    rng = np.random.default_rng(seed)
    start = _time.perf_counter()
    reject, est, se = [], [], []
    failed = not_conv = 0
    for _ in range(int(reps)):
        panel, X = simulate_planned_cohort(inputs, subjects, rng)
        try:
            fit = fit_mixed(panel, X, names=TERMS, structure=cov.structure,
                            correlation=cov.correlation or "exponential", method=method)
        except ModelError:
            failed += 1
            continue
        not_conv += not fit.converged
        row = fit.fixed_frame().iloc[INTERACTION]
        reject.append(row["p"] < inputs.alpha)
        est.append(row["estimate"])
        se.append(row["se"])
    seconds = _time.perf_counter() - start
    r = len(reject)
    p = float(np.mean(reject)) if r else float("nan")
    mcse = math.sqrt(p * (1 - p) / r) if r else float("nan")
    analytic = float(power_at(subjects, inputs.effect, unit_var, inputs.alpha))
    return PowerCheck(
        subjects=subjects, reps=r, empirical_power=p, mcse=mcse, analytic_power=analytic,
        z=(p - analytic) / mcse if r and mcse > 0 else float("nan"),
        mean_se=float(np.mean(se)) if r else float("nan"),
        empirical_sd=float(np.std(est, ddof=1)) if r > 1 else float("nan"),
        analytic_se=math.sqrt(unit_var / subjects), n_failed=failed, n_not_converged=not_conv,
        seconds=seconds)
