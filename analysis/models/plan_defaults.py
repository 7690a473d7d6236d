"""Plan the next study from this cohort: the defaults read from the cohort and the fitted models.

:mod:`analysis.models.planning` computes a plan from explicit inputs. This module
fills those inputs from what the workbench already has, each by a rule that
is written down here and repeated in the plan's assumptions:

* **covariance** — the preferred fitted model of the model set (lowest AIC
  among converged fits, :attr:`analysis.models.modelling.ModelSet.preferred`), or the
  fitted candidate named by the user;
* **effect** — that model's time × x estimate (continuous design); for two
  equal groups the slope difference between the cohort's upper and lower
  quartile of x, i.e. the estimate × the interquartile range of x;
* **schedule** — :func:`typical_schedule` of the cohort's visit times;
* **dropout rate** — :func:`dropout_hazard`: leavers per unit of follow-up time
  (the constant-hazard, exponential estimate) from the loss-to-follow-up
  classification; 0 when leaving cannot be told apart from the end of the
  data (no dates and no follow-up end), said in the notes;
* **covariate distribution** — the cohort's transformed, centred x (the scale
  the time × x coefficient is on).

Anything the user gives replaces the default; the result records which.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import ModelError, SettingsError
from ..jsonsafe import json_safe
from .planning import CovarianceModel, PlanInputs, compare_plans, plan_study

#: Most visits in the default schedule (a handful; a convention of this tool).
MAX_PLAN_VISITS = 6
#: The rounding step of the default schedule is the smallest 1, 2 or 5 × 10^k at least the
#: follow-up window divided by this (a convention of this tool).
SCHEDULE_STEPS = 30

SCHEDULE_RULE = (f"default schedule: as many visits as the median subject has (2 to "
                 f"{MAX_PLAN_VISITS}), at evenly spaced quantiles of all visit times from the "
                 f"first to the last, each rounded to a round step (1, 2 or 5 × 10^k, at least "
                 f"1/{SCHEDULE_STEPS} of the follow-up window); repeated times merged")
DROPOUT_RULE = ("default dropout rate: subjects who left early divided by their total follow-up "
                "time from the origin (leavers to their last visit, the others to their "
                "potential follow-up or the horizon, as in the retention curve) — the "
                "constant-hazard (exponential) estimate")


def nice_step(width: float) -> float:
    """Smallest 1, 2 or 5 × 10^k that is >= ``width`` (> 0)."""
    width = float(width)
    if not math.isfinite(width) or width <= 0:
        return 1.0
    k = math.floor(math.log10(width))
    for m in (1.0, 2.0, 5.0, 10.0):
        step = m * 10.0 ** k
        if step >= width * (1 - 1e-12):
            return step
    return 10.0 ** (k + 1)


def typical_schedule(times, visits_per_subject, *, max_visits: int = MAX_PLAN_VISITS
                     ) -> tuple[float, ...]:
    """The cohort's typical visit schedule (see :data:`SCHEDULE_RULE`).

    Parameters
    ----------
    times : array_like
        Every visit time since the origin (negative times are taken as 0).
    visits_per_subject : array_like
        Number of visits of each subject.
    max_visits : int

    Returns
    -------
    tuple of float
        Strictly increasing times >= 0, at least two.

    Raises
    ------
    SettingsError
        Fewer than two distinct visit times.
    """
    t = np.clip(np.asarray(times, dtype=float), 0.0, None)
    t = t[np.isfinite(t)]
    if t.size == 0 or np.ptp(t) == 0:
        raise SettingsError("the cohort's visits do not span any time, so there is no typical "
                            "schedule; give the planned visit times")
    k = int(np.median(np.asarray(visits_per_subject)))
    k = min(max(k, 2), int(max_visits))
    q = np.quantile(t, np.linspace(0.0, 1.0, k))
    step = nice_step(np.ptp(t) / SCHEDULE_STEPS)
    rounded = np.unique(np.round(q / step) * step)
    if rounded.size < 2:
        rounded = np.array([q[0], q[-1]])
    return tuple(float(v) for v in rounded)


@dataclass(frozen=True)
class DropoutRate:
    """Constant dropout hazard estimated from this cohort.

    Attributes
    ----------
    rate : float
        Leavers per subject per time unit (0 when unavailable).
    events : int
        Subjects who left early.
    person_time : float
        Total follow-up time at risk.
    available : bool
        False when leaving cannot be told apart from the end of the data.
    rule : str
    """

    rate: float
    events: int
    person_time: float
    available: bool
    rule: str


def dropout_hazard(dropout) -> DropoutRate:
    """Events / person-time from a :class:`analysis.exploration.summaries.Dropout`.

    Notes
    -----
    For a constant hazard λ and right-censored follow-up the likelihood is
    ``λ^d exp(−λ T)``, maximised by ``λ = d / T`` with ``d`` leavers and ``T`` the
    total time at risk. Time at risk of a subject is its last visit if it left,
    else ``min(potential follow-up, horizon)`` (the retention curve's times),
    counted from the origin.
    """
    if dropout is None or not dropout.classified:
        return DropoutRate(0.0, 0, float("nan"), False,
                           "dropout rate 0: leaving early cannot be told apart from the end of "
                           "the data here (no calendar dates or follow-up end column), so no "
                           "dropout is assumed — set one if the next study expects losses")
    s = dropout.subjects
    left = s["left_early"].to_numpy(bool)
    last = s["last_time"].to_numpy(float)
    pot = s["potential_followup"].to_numpy(float)
    at_risk = np.where(left, last, np.minimum(pot, dropout.horizon))
    total = float(np.clip(at_risk, 0.0, None).sum())
    d = int(left.sum())
    rate = d / total if total > 0 else 0.0
    return DropoutRate(rate, d, total, True,
                       DROPOUT_RULE + f" = {d} / {total:.4g} = {rate:.4g}")


def cohort_covariate(cohort) -> np.ndarray:
    """The cohort's transformed, centred primary covariate (finite values), or empty."""
    x = getattr(cohort, "x", None)
    if x is None:
        return np.empty(0)
    x = np.asarray(x, dtype=float)
    return x[np.isfinite(x)]


def fitted_covariances(models) -> dict:
    """Every successful fit of a model set as a :class:`CovarianceModel`, by name."""
    return {name: CovarianceModel.from_fit(fit, name) for name, fit in models.fits.items()}


def effect_of(models, name: str) -> float | None:
    """The time × x estimate of the fit ``name`` (None without an interaction term)."""
    term = models.design.interaction_term
    fit = models.fits.get(name)
    if term is None or fit is None:
        return None
    frame = fit.fixed_frame()
    row = frame[frame["term"] == term] if "term" in frame.columns else frame.loc[[term]]
    return float(row["estimate"].iloc[0]) if len(row) else None


@dataclass(frozen=True, eq=False)
class CohortPlan:
    """A plan made from this cohort, with the defaults it used.

    Attributes
    ----------
    model : str
        Name of the fitted model whose covariance the plan assumes.
    inputs : PlanInputs
    plan : StudyPlan
    comparison : PlanComparison
        The same study under every fitted candidate.
    sources : dict
        Per input (model, effect, schedule, dropout_rate, covariate): "given" or the rule used.
    notes : tuple of str
    """

    model: str
    inputs: PlanInputs
    plan: object
    comparison: object
    sources: dict
    notes: tuple = ()

    def to_json(self, simulation=None) -> dict:
        """The CLI's ``plan`` JSON (see the README)."""
        p = self.plan.to_json()
        assumptions = dict(p["assumptions"])
        assumptions["model"] = self.model
        assumptions["sources"] = dict(self.sources)
        out = {
            "subjects_needed": p["subjects_needed"], "per_group": p["per_group"],
            "standard_error": p["standard_error"], "achieved_power": p["achieved_power"],
            "power_curve": p["power_curve"],
            "per_model": self.comparison.to_json()["per_model"],
            "expected_visits": p["expected_visits"],
            "visit_probability": p["visit_probability"],
            "assumptions": assumptions, "cautions": p["cautions"], "notes": list(self.notes),
        }
        if simulation is not None:
            out["simulation"] = {"reps": simulation.reps, "power": simulation.empirical_power,
                                 "mc_se": simulation.mcse, "subjects": simulation.subjects,
                                 "analytic_power": simulation.analytic_power,
                                 "n_failed": simulation.n_failed,
                                 "n_not_converged": simulation.n_not_converged}
        return json_safe(out)


def plan_from_cohort(cohort, models, dropout=None, *, model: str | None = None,
                     effect: float | None = None, schedule=None, design: str = "continuous",
                     alpha: float = 0.05, power: float = 0.8,
                     dropout_rate: float | None = None) -> CohortPlan:
    """Plan the next study with this cohort's defaults for every input not given.

    Parameters
    ----------
    cohort : PreparedCohort
    models : ModelSet
        The fitted candidates.
    dropout : Dropout, optional
        The cohort's loss-to-follow-up summary (for the default dropout rate).
    model : str, optional
        Name of a fitted candidate; default the preferred one.
    effect, schedule, dropout_rate : optional
        Override the defaults (see the module notes).
    design, alpha, power
        As :class:`analysis.models.planning.PlanInputs`.

    Returns
    -------
    CohortPlan

    Raises
    ------
    ModelError
        No fitted model, or ``model`` is not one of them.
    SettingsError
        An input is unusable, or a default cannot be made (e.g. no interaction estimate).
    """
    covs = fitted_covariances(models)
    if not covs:
        raise ModelError("no fitted model to plan from; fit the models first")
    sources, notes = {}, []
    if model in (None, ""):
        name = models.preferred if models.preferred in covs else next(iter(covs))
        sources["model"] = "preferred model (lowest AIC among converged fits)"
    elif model not in covs:
        raise ModelError(f"model {model!r} is not one of the fitted models; choose one of "
                         f"{list(covs)}")
    else:
        name = model
        sources["model"] = ("given: the preferred model (lowest AIC among converged fits)"
                            if model == models.preferred else "given")
    x = cohort_covariate(cohort) if design == "continuous" else np.empty(0)
    if design == "continuous" and x.size < 2:
        raise SettingsError("the continuous design needs this cohort's numeric primary "
                            "covariate; choose the two-groups design instead")
    sources["covariate"] = ("this cohort's transformed, centred x "
                            f"({x.size} subjects)" if design == "continuous"
                            else "two equal groups coded 0 and 1")
    if effect is None:
        est = effect_of(models, name)
        if est is None or not math.isfinite(est) or est == 0:
            raise SettingsError("no time × x estimate to start from (the model has no "
                                "interaction term); give the effect to detect")
        if design == "two-groups":
            xs = cohort_covariate(cohort)
            if xs.size < 2:
                raise SettingsError("give the difference in slopes to detect (no numeric "
                                    "covariate to derive a default from)")
            iqr = float(np.subtract(*np.quantile(xs, [0.75, 0.25])))
            effect = est * iqr
            sources["effect"] = (f"time × x estimate of {name} ({est:.4g}) × the interquartile "
                                 f"range of x ({iqr:.4g}): the slope difference between the "
                                 "cohort's upper and lower quartile")
        else:
            effect = est
            sources["effect"] = f"time × x estimate of {name}"
    else:
        sources["effect"] = "given"
    if schedule is None:
        panel = cohort.panel
        schedule = typical_schedule(panel.time, panel.counts)
        sources["schedule"] = SCHEDULE_RULE
    else:
        sources["schedule"] = "given"
    if dropout_rate is None:
        hz = dropout_hazard(dropout)
        dropout_rate = hz.rate
        sources["dropout_rate"] = hz.rule
        if not hz.available:
            notes.append(hz.rule[0].upper() + hz.rule[1:] + ".")
    else:
        sources["dropout_rate"] = "given"
    inputs = PlanInputs(covs[name], effect, tuple(schedule), design=design,
                        covariate=tuple(x), alpha=alpha, power=power,
                        dropout_rate=dropout_rate)
    plan = plan_study(inputs)
    comparison = compare_plans(inputs, covs)
    return CohortPlan(model=name, inputs=inputs, plan=plan, comparison=comparison,
                      sources=sources, notes=tuple(notes))


def parse_schedule(text) -> tuple[float, ...] | None:
    """'0, 6, 12, 24' → (0.0, 6.0, 12.0, 24.0); empty → None (use the default).

    Raises
    ------
    SettingsError
        Naming the piece that is not a number.
    """
    if text is None:
        return None
    parts = [p.strip() for p in str(text).replace(";", ",").split(",")]
    parts = [p for p in parts if p]
    if not parts:
        return None
    out = []
    for p in parts:
        try:
            out.append(float(p))
        except ValueError:
            raise SettingsError(f"schedule: {p!r} is not a number; write the visit times "
                                "separated by commas, e.g. 0, 6, 12, 24") from None
    return tuple(out)
