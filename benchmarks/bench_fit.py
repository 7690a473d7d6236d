"""Time random intercept+slope REML fits against statsmodels MixedLM in the same run.

Usage::

    python benchmarks/bench_fit.py                 # 1,000 and 5,000 subjects (+ serial model)
    python benchmarks/bench_fit.py --with-20000    # also the 20,000-subject MixedLM reference
                                                   # (several minutes); without it, 20,000 is
                                                   # timed for this engine only

Prints, per cohort size, both wall times, their ratio (target >= 20x at
5,000 subjects) and the largest relative difference between the two sets
of estimates (fixed effects, variance components, REML log-likelihood;
target <= 1e-4). MixedLM is fitted with time scaled to [0, 1] so that its
optimiser converges; estimates are mapped back exactly (see
tests/test_mixed_reference.py). Also times the three-component model
("intercept+serial", exponential) at 5,000 subjects.
"""
from __future__ import annotations

import argparse
import time
import warnings

import numpy as np
import statsmodels.api as sm

from analysis.models.mixed import fit_mixed
from analysis.models.mixed.simulate import simulate_cohort


def _reference(panel, X):
    c = float(np.max(np.abs(panel.time)))
    d = np.array([1.0, 1.0 / c, 1.0, 1.0 / c])      # time and time:x columns scaled
    exog_re = np.column_stack([np.ones(panel.n_obs), panel.time / c])
    model = sm.MixedLM(panel.y, X * d, groups=panel.codes, exog_re=exog_re)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = model.fit(reml=True, method=["lbfgs"])
    G = np.asarray(res.cov_re)
    est = {"beta": np.asarray(res.fe_params) * d,
           "intercept_var": G[0, 0], "slope_var": G[1, 1] / c**2,
           "intercept_slope_cov": G[1, 0] / c, "error_var": res.scale,
           "loglik": res.llf + np.log(d).sum()}
    return est


def _max_rel_diff(fit, ref):
    diffs = [np.max(np.abs(fit.beta - ref["beta"]) / np.abs(ref["beta"]))]
    for k in ("intercept_var", "slope_var", "error_var"):
        diffs.append(abs(fit.variance[k] - ref[k]) / abs(ref[k]))
    scale = np.sqrt(ref["intercept_var"] * ref["slope_var"])
    diffs.append(abs(fit.variance["intercept_slope_cov"] - ref["intercept_slope_cov"]) / scale)
    diffs.append(abs(fit.loglik - ref["loglik"]) / abs(ref["loglik"]))
    return float(max(diffs))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--with-20000", action="store_true",
                    help="also fit MixedLM at 20,000 subjects (slow)")
    ap.add_argument("--sizes", type=int, nargs="*", default=[1000, 5000, 20000])
    args = ap.parse_args(argv)
    print(f"{'subjects':>9} {'visits':>7} {'engine s':>9} {'MixedLM s':>10} {'ratio':>7} "
          f"{'max rel diff':>13}")
    for n in args.sizes:
        s = simulate_cohort(n, seed=n, visits=(3, 9), serial_var=0.0)
        t0 = time.perf_counter()
        fit = fit_mixed(s.panel, s.X, names=s.names, structure="intercept+slope", method="reml")
        t_ours = time.perf_counter() - t0
        if n >= 20000 and not args.with_20000:
            print(f"{n:>9} {s.panel.n_obs:>7} {t_ours:>9.2f} {'(skipped)':>10} {'':>7} {'':>13}")
            continue
        t0 = time.perf_counter()
        ref = _reference(s.panel, s.X)
        t_ref = time.perf_counter() - t0
        print(f"{n:>9} {s.panel.n_obs:>7} {t_ours:>9.2f} {t_ref:>10.2f} {t_ref / t_ours:>6.1f}x "
              f"{_max_rel_diff(fit, ref):>13.2e}")
    s = simulate_cohort(5000, seed=77, visits=(3, 9))
    for structure in ("intercept+serial", "intercept+slope+serial"):
        t0 = time.perf_counter()
        fit = fit_mixed(s.panel, s.X, names=s.names, structure=structure)
        dt = time.perf_counter() - t0
        print(f"{structure} (exponential) at 5000 subjects: {dt:.2f} s, "
              f"{fit.iterations} iterations, converged={fit.converged}")


if __name__ == "__main__":
    main()
