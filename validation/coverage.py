"""Coverage of 95% intervals for the time × covariate interaction in simulated cohorts.

Usage::

    python validation/coverage.py --reps 200 [--subjects 200] [--structure intercept+slope]

Each replication draws a cohort from a known random intercept+slope model with
measurement error (``analysis.mixed.simulate.simulate_cohort``, no serial
process, so the fitted model is correct), fits it by REML and records whether
the model-based and the robust (sandwich) 95% Wald intervals contain the true
interaction coefficient. Coverage is printed with its Monte-Carlo standard
error sqrt(c(1 − c)/R); the target is 93–97%.
"""
from __future__ import annotations

import argparse
import time

import numpy as np

from analysis.mixed import fit_mixed
from analysis.mixed.simulate import simulate_cohort


def run_coverage(reps: int, *, subjects: int = 200, structure: str = "intercept+slope",
                 seed: int = 1000) -> dict:
    """Simulate ``reps`` cohorts and count interval coverage of the interaction.

    Parameters
    ----------
    reps : int
        Number of replications (>= 1).
    subjects : int
        Subjects per simulated cohort.
    structure : str
        Working covariance structure fitted.
    seed : int
        Replication r uses seed + r.

    Returns
    -------
    dict
        reps, truth, model_coverage, robust_coverage, model_mcse, robust_mcse,
        mean_estimate, empirical_sd, mean_se, mean_robust_se, n_not_converged.
    """
    if reps < 1:
        raise ValueError(f"reps == {reps}, must be >= 1")
    hits = np.zeros((reps, 2), dtype=bool)
    est, se, rse = np.empty(reps), np.empty(reps), np.empty(reps)
    bad = 0
    truth = None
    for r in range(reps):
        s = simulate_cohort(subjects, seed=seed + r, serial_var=0.0)
        truth = float(s.truth["beta"][3])
        fit = fit_mixed(s.panel, s.X, names=s.names, structure=structure)
        bad += not fit.converged
        row = fit.fixed_frame().iloc[3]
        hits[r] = [row["lo"] <= truth <= row["hi"], row["robust_lo"] <= truth <= row["robust_hi"]]
        est[r], se[r], rse[r] = row["estimate"], row["se"], row["robust_se"]
    cov = hits.mean(axis=0)
    mcse = np.sqrt(cov * (1 - cov) / reps)
    return {"reps": reps, "truth": truth, "model_coverage": float(cov[0]),
            "robust_coverage": float(cov[1]), "model_mcse": float(mcse[0]),
            "robust_mcse": float(mcse[1]), "mean_estimate": float(est.mean()),
            "empirical_sd": float(est.std(ddof=1)) if reps > 1 else float("nan"),
            "mean_se": float(se.mean()), "mean_robust_se": float(rse.mean()),
            "n_not_converged": int(bad)}


def main(argv=None):
    ap = argparse.ArgumentParser(description="Coverage of the time × covariate interval")
    ap.add_argument("--reps", type=int, default=200)
    ap.add_argument("--subjects", type=int, default=200)
    ap.add_argument("--structure", default="intercept+slope")
    ap.add_argument("--seed", type=int, default=1000)
    a = ap.parse_args(argv)
    t0 = time.perf_counter()
    out = run_coverage(a.reps, subjects=a.subjects, structure=a.structure, seed=a.seed)
    dt = time.perf_counter() - t0
    print(f"{out['reps']} replications of {a.subjects} subjects, structure {a.structure!r}, "
          f"true interaction {out['truth']:g} ({dt:.1f} s)")
    print(f"model-based 95% CI coverage: {100 * out['model_coverage']:.1f}% "
          f"(Monte-Carlo SE {100 * out['model_mcse']:.1f}%)")
    print(f"robust 95% CI coverage:      {100 * out['robust_coverage']:.1f}% "
          f"(Monte-Carlo SE {100 * out['robust_mcse']:.1f}%)")
    print(f"mean estimate {out['mean_estimate']:.5f}, empirical SD {out['empirical_sd']:.5f}, "
          f"mean model SE {out['mean_se']:.5f}, mean robust SE {out['mean_robust_se']:.5f}, "
          f"not converged {out['n_not_converged']}")
    return out


if __name__ == "__main__":
    main()
