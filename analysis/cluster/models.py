"""Candidate mixed models fitted to a cohort spread over a Dask cluster.

The optimiser runs on the client (the same :func:`analysis.models.mixed.fit_mixed`); each
log-likelihood and gradient evaluation is a map-reduce over the partitions' likelihood data,
persisted on the workers: a first pass sums what does not depend on β̂ (Σ XᵀV⁻¹X, Σ XᵀV⁻¹y,
Σ log|V_i|; or, for structures without a serial process, the per-subject cross-products),
the client solves for β̂, and a second pass sums the quadratic form and the gradient's shares
(linear in the per-subject sums given β̂ and M⁻¹). The robust sandwich's meat is one more sum.

Not combined: GEE rows (statsmodels' solver reads every visit at once) are left out, and said
in the notes; confounders and a spline in time are refused (the categorical coding and the
spline knots are read from all visits; not yet done from partitions).
"""
from __future__ import annotations

import numpy as np

from analysis.cluster import fit_tasks
from analysis.errors import ModelError, SettingsError
from analysis.models.mean_model import check_rank
from analysis.models.mixed.fit import (constant_response_problem, reproduced_response_problem,
                                       start_from_sums)
from analysis.models.mixed.likelihood import Evaluation, NotPositiveDefinite, _profiled_loglik
from analysis.models.mixed.structures import CORRELATIONS, METHODS
from analysis.models.modelling import (COVARIATE_COLUMN, _labels, candidate_subjects,
                                check_candidate_options, compare_candidates)

#: said in the notes of a model set fitted on a cluster
GEE_NOTE = ("GEE rows are not computed with --engine dask: their solver reads every visit at "
            "once")


class PlaceholderDesign:
    """Stands in for the design matrix on the client: its rows stay on the workers."""

    def __init__(self, n_obs: int, p: int):
        self.shape = (n_obs, p)


class ClusterRows:
    """The fit's rows on the workers, passed to :func:`analysis.models.mixed.fit_mixed` in place of a
    Panel: it supplies the row-level steps (input checks, start values, likelihood data)."""

    def __init__(self, client, futures, checks, p, cohort=None, part_futures=(), keep=None):
        self.cohort = cohort                      # the ClusterCohort (residual semivariogram)
        self.part_futures = list(part_futures)    # per partition of the cohort, or None
        self.keep = keep                          # subjects in the fit (global order)
        self.client = client
        self.futures = futures
        self.checks = checks
        self.p = p
        self.n_obs = sum(c["n"] for c in checks)
        self.n_subjects = sum(c["m"] for c in checks)
        self.counts_max = max(c["max_count"] for c in checks)
        self._beta_ols = None

    def _gather(self, fn, *args, **kw):
        return self.client.gather([self.client.submit(fn, f, *args, pure=False, **kw)
                                   for f in self.futures])

    # -- fit_mixed's row-level steps ---------------------------------------------------------
    def check_inputs(self, _panel, X, names, spec, method, correlation, maxiter):
        """The checks of ``analysis.models.mixed.fit._check_inputs`` from partition sums."""
        if method not in METHODS:
            raise ModelError(f"method {method!r} is not known; choose one of {list(METHODS)}")
        if correlation not in CORRELATIONS:
            raise ModelError(f"correlation {correlation!r} is not known; choose one of "
                             f"{list(CORRELATIONS)}")
        names = tuple(str(n) for n in names)
        c = self.checks
        if sum(k["bad_y"] for k in c):
            raise ModelError("response is missing or not finite at some rows; drop or impute "
                             "them before fitting")
        bad = sum(k["bad_x"] for k in c)
        if np.any(bad):
            raise ModelError(f"design column(s) {[names[j] for j in np.flatnonzero(bad)]} have "
                             "missing or non-finite values")
        lo = np.min([k["x_min"] for k in c], axis=0)
        hi = np.max([k["x_max"] for k in c], axis=0)
        first = c[0]["x_first"]
        const = hi - lo == 0
        intercepts = [j for j in np.flatnonzero(const) if first[j] != 0]
        for j in np.flatnonzero(const):
            if first[j] == 0 or (len(intercepts) > 1 and j != intercepts[0]):
                raise ModelError(f"design column {names[j]!r} has no variation (every row is "
                                 f"{first[j]:g}); remove it or check the covariate")
        R = self._r_factor()
        check_rank(R[:self.p, :self.p], names, n_rows=self.n_obs)
        if spec.n_random >= 1 or spec.serial:
            if self.counts_max < 2:
                raise ModelError(f"structure {spec.name!r} needs at least one subject with 2 or "
                                 "more visits; every subject has a single visit")
        if self.n_subjects < spec.min_subjects:
            raise ModelError(f"structure {spec.name!r} needs at least {spec.min_subjects} "
                             f"subjects (2 per random effect + 1); the data have "
                             f"{self.n_subjects}")
        if spec.n_random == 2 and not any(k["spread"] for k in c):
            raise ModelError("a random slope needs at least one subject with 2 or more distinct "
                             "visit times; no subject has")
        return X, names

    def _r_factor(self):
        stacked = np.vstack([k["R"] for k in self.checks])
        return np.linalg.qr(stacked)[1]

    def variation_problem(self, response: str) -> str | None:
        """``response_variation_problem`` from partition sums."""
        mean = sum(k["y_sum"] for k in self.checks) / self.n_obs
        tss = sum(self._gather(fit_tasks.centred_ss, mean))
        problem = constant_response_problem(tss, mean, self.checks[0]["y_first"], self.n_obs,
                                            response)
        if problem:
            return problem
        rss = float(self._r_factor()[self.p, self.p] ** 2)
        return reproduced_response_problem(rss, tss, response)

    def beta_ols(self) -> np.ndarray:
        if self._beta_ols is None:
            R = self._r_factor()
            self._beta_ols = np.linalg.solve(R[:self.p, :self.p], R[:self.p, self.p])
        return self._beta_ols

    def max_abs_time(self) -> float:
        return max(k["abs_t"] for k in self.checks) if self.n_obs else 1.0

    def start_natural(self, _panel, X, spec, time_scale):
        parts = self._gather(fit_tasks.start_parts, self.beta_ols(), time_scale)
        sums = {"rr": sum(s["rr"] for s in parts), "devdev": sum(s["devdev"] for s in parts)}
        for key in ("cnt", "rbar", "stt", "str", "span"):
            sums[key] = np.concatenate([s[key] for s in parts])
        return start_from_sums(spec, sums, self.n_obs, self.p, time_scale)

    def lag_span(self, time_scale):
        parts = self._gather(fit_tasks.lag_span_parts, time_scale)
        min_lag = min(s[0] for s in parts)
        return (min_lag if np.isfinite(min_lag) else 1.0,
                max(s[2] for s in parts) - min(s[1] for s in parts))

    def residual_variogram(self, *, n_bins: int = 10, max_lag: float | None = None):
        """``ModelSet.residual_variogram``: the semivariogram of the mean model's OLS residuals,
        from the partitions (the same pairs as in memory for the smooth)."""
        from analysis.cluster.engine import _semivariogram_default
        from analysis.exploration.variogram import smooth_pick, variogram_max_lag

        cc, beta = self.cohort, self.beta_ols()
        live = [(i, f) for i, f in enumerate(self.part_futures) if f is not None]
        firsts = self.client.gather([self.client.submit(fit_tasks.ols_first, f, beta,
                                                        pure=False) for _, f in live])
        big_n = float(sum(f["n"] for f in firsts))
        centre = sum(f["r_sum"] for f in firsts) / big_n
        total = sum(f["pairs"] for f in firsts)
        max_lag = variogram_max_lag(total, max(f["longest"] for f in firsts), max_lag)
        seed = _semivariogram_default("seed")
        pick = smooth_pick(total, _semivariogram_default("smooth_max_pairs"), seed)
        picks, back = cc._pair_picks(pick, self.keep)
        seconds = self.client.gather([self.client.submit(
            fit_tasks.ols_second, f, beta, n_bins=n_bins, max_lag=max_lag, pick=picks[i],
            centre=centre, big_n=big_n, pure=False) for i, f in live])
        return cc.combine_variogram(
            [s["variogram"] for s in seconds], [back[i] for i, _ in live], n_bins=n_bins,
            max_lag=max_lag, total_pairs=total, pick=pick, seed=seed,
            pv_sums=[s["pv_sum"] for s in seconds], counts=cc.counts[self.keep], big_n=big_n)

    def mixed_data(self, X, spec, time_scale):
        shift = self.beta_ols()
        data = [self.client.submit(fit_tasks.likelihood_rows, f, spec, time_scale, shift,
                                   pure=False) for f in self.futures]
        return ClusterLikelihood(self, data, time_scale)


class ClusterLikelihood:
    """Likelihood data persisted on the workers; :meth:`evaluate_at` is what
    :func:`analysis.models.mixed.likelihood.evaluate` calls for it."""

    def __init__(self, rows: ClusterRows, data, time_scale):
        self.rows = rows
        self.client = rows.client
        self.data = data
        self.time_scale = time_scale

    def evaluate_at(self, spec, theta, *, correlation, method, gradient=True, beta=None):
        p = self.rows.p
        theta = np.asarray(theta, dtype=float)
        firsts = self.client.gather([self.client.submit(
            fit_tasks.first_pass, d, spec, theta, correlation, p, pure=False) for d in self.data])
        if any(f is None for f in firsts):
            raise NotPositiveDefinite("a per-subject covariance is not positive definite")
        reml = method == "reml"
        comp_tau2 = None
        if firsts[0]["kind"] == "sums":
            from analysis.models.mixed.structures import components
            comp_tau2 = components(spec, theta).error_var
            WW = sum(f["WW"] for f in firsts)
            T = sum(f["T"] for f in firsts)
            C = (WW - T) / comp_tau2
            C = 0.5 * (C + C.T)
            M = C[:p, :p]
            shift = firsts[0]["shift"]
            if beta is None:
                d = np.linalg.solve(M, C[:p, p])
                beta = shift + d
            else:
                beta = np.asarray(beta, dtype=float)
                d = beta - shift
            w = np.append(-d, 1.0)
            quad = float(w @ C @ w)
        else:
            M = sum(f["M"] for f in firsts)
            M = 0.5 * (M + M.T)
            if beta is None:
                beta = np.linalg.solve(M, sum(f["Xy"] for f in firsts))
            w = None
        logdet = sum(f["logdet"] for f in firsts)
        n_obs = sum(f["n"] for f in firsts)
        Minv = np.linalg.inv(M) if reml else None
        grad = None
        if gradient or comp_tau2 is None:
            seconds = self.client.gather([self.client.submit(
                fit_tasks.second_pass, d, spec, theta, correlation, p, beta=beta, M=M, w=w,
                Minv=Minv, gradient=gradient, pure=False) for d in self.data])
            if comp_tau2 is None:
                quad = sum(s["quad"] for s in seconds)
            if gradient:
                grad = sum(s["grad"] for s in seconds)
        ll = _profiled_loglik(n_obs, logdet, quad, M, reml)
        return Evaluation(float(ll), grad, beta, M, None, None, None)

    def score_meat(self, spec, theta, beta, Minv, correlation):
        return sum(self.client.gather([self.client.submit(
            fit_tasks.score_meat, f, spec, theta, self.time_scale, beta, Minv, correlation,
            pure=False) for f in self.rows.futures]))


def fit_cluster_models(cc, cohort, choices):
    """:func:`analysis.models.modelstage.fit_models` for a :class:`~analysis.cluster.engine.ClusterCohort`
    (``cohort`` its prepared cohort): the same ModelSet, with the likelihood evaluated over
    the partitions."""
    from analysis.models.modelstage import check_confounders

    check_confounders(cohort, choices)
    if choices.confounders:
        raise SettingsError("--confounders with --engine dask: not available yet (the "
                            "categorical coding is read from every subject at once)",
                            field="confounders")
    if choices.time_spline_df:
        raise SettingsError("--time-spline-df with --engine dask: not available yet (the "
                            "knots are quantiles of every visit time)", field="time_spline_df")
    mean = choices.mean_model()
    structures, shapes, gee = check_candidate_options(choices.structures, choices.correlation,
                                                      choices.method, choices.gee)
    mean, keep, n_dropped, notes = candidate_subjects(cohort, mean)
    if gee:
        notes.append(GEE_NOTE)
    baseline = cohort.baseline.reset_index(drop=True)
    per_part = []
    for i, gl in enumerate(cc.global_of):
        k = keep[gl]
        per_part.append(cc.client.submit(fit_tasks.model_rows, cc._live()[i], k,
                                         baseline.iloc[gl[k]], mean, pure=False)
                        if k.any() else None)
    futures = _one_per_worker(cc.client, [f for f in per_part if f is not None])
    des = cc.client.gather(cc.client.submit(fit_tasks.design_terms, futures[0], pure=False))
    checks = cc.client.gather([cc.client.submit(fit_tasks.row_checks, f, pure=False)
                               for f in futures])
    p = len(des.names)
    rows = ClusterRows(cc.client, futures, checks, p, cohort=cc, part_futures=per_part,
                       keep=np.asarray(keep, dtype=bool))
    problem = rows.variation_problem(_labels(cohort)["response_label"])
    if problem:
        raise ModelError(problem)
    from dataclasses import replace
    des = replace(des, X=PlaceholderDesign(rows.n_obs, p))
    return compare_candidates(cohort, rows, des, structures=structures, shapes=shapes,
                              method=choices.method, mean=mean, gee=(), notes=notes,
                              n_dropped=n_dropped, correlation=choices.correlation)


def _one_per_worker(client, futures):
    """The partitions' rows merged on the worker holding them: one likelihood task per worker
    and round instead of one per partition (the scheduling cost of an evaluation)."""
    from distributed import wait

    wait(futures)
    holders = client.who_has(futures)
    by_worker: dict = {}
    for f in futures:
        where = holders.get(f.key) or ("",)
        by_worker.setdefault(sorted(where)[0], []).append(f)
    return [client.submit(fit_tasks.merge_model_rows, *group, workers=[w] if w else None,
                          pure=False)
            for w, group in sorted(by_worker.items())]


__all__ = ["fit_cluster_models", "COVARIATE_COLUMN"]
