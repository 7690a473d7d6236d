"""Simulate the invented post-transplant kidney-function registry (demo data).

Run ``python sample_data/generate_registry.py`` to rewrite
``sample_data/kidney_registry.csv`` byte-identically (fixed seed), or pass
``--out PATH`` to write elsewhere. Beside it goes ``kidney_registry_truth.csv``
(``--truth-out PATH``): why each recipient's visits end, which the file alone
cannot say (the truth is read off the simulation without drawing any extra
random numbers, so the registry file is unchanged by it). All parameters come from
``analysis.preparation.demo.TRUE_PARAMETERS``; see ``sample_data/README.md``.

Model (t in months since transplant, x = log2(marker / marker_ref))::

    eGFR_ij = b0 + b1 t + b2 x + b3 t x + (centre, age, donor, sex shifts)
              + B0_i + B1_i t + W_i(t_ij) + e_ij

(B0, B1) ~ N(0, G); W_i stationary Gaussian, Var sigma^2, corr exp(-u / phi),
simulated exactly on irregular times by the AR(1) recursion
W_j = rho_j W_{j-1} + sqrt(1 - rho_j^2) sigma z_j, rho_j = exp(-(t_j - t_{j-1}) / phi);
e_ij ~ N(0, tau^2). No person is real.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:  # allow running without `pip install -e .`
    sys.path.insert(0, str(ROOT))

from analysis.preparation.demo import DEMO_COLUMNS, DEMO_CSV, TRUE_PARAMETERS  # noqa: E402

DAYS_PER_MONTH = 30.4375


def simulate_baseline(rng: np.random.Generator, p: dict) -> pd.DataFrame:
    """One row per recipient: centre, sex, age, donor type, marker, transplant day offset.

    Parameters
    ----------
    rng : numpy.random.Generator
    p : dict
        The parameter table (``TRUE_PARAMETERS``).

    Returns
    -------
    pandas.DataFrame
        Columns ``centre_idx, female, age, deceased, marker, marker_missing, tx_day``
        (``tx_day`` = days after ``tx_date_first``).

    Notes
    -----
    P(deceased) = clip(p0 + p_age (age - 50), 0.05, 0.95), and
    log(marker) = log(ref) + shift (deceased - p0) + N(0, sd^2), so deceased-donor
    recipients have higher marker and lower eGFR intercept (mild confounding of
    the marker's *intercept* effect; the slope effect is not confounded).
    """
    n = p["n_recipients"]
    centre_idx = rng.choice(len(p["centres"]), size=n, p=np.asarray(p["centre_weights"]))
    female = rng.random(n) < p["p_female"]
    age = np.clip(np.rint(rng.normal(p["age_mean"], p["age_sd"], n)), p["age_min"], p["age_max"])
    p_dec = np.clip(p["p_deceased_at_age_mean"]
                    + p["p_deceased_per_year"] * (age - p["age_mean"]), 0.05, 0.95)
    deceased = rng.random(n) < p_dec
    log_marker = (np.log(p["marker_ref"])
                  + p["marker_deceased_log_shift"] * (deceased - p["p_deceased_at_age_mean"])
                  + rng.normal(0.0, p["marker_log_sd"], n))
    # the recorded (rounded) value is the one that drives eGFR, so the model holds for the file
    marker = np.maximum(np.round(np.exp(log_marker), 1), 0.1)
    marker_missing = rng.random(n) < p["p_marker_missing"]
    first = np.datetime64(p["tx_date_first"], "D")
    last = np.datetime64(p["tx_date_last"], "D")
    tx_day = rng.integers(0, int((last - first).astype(int)) + 1, n)
    return pd.DataFrame({"centre_idx": centre_idx, "female": female, "age": age.astype(int),
                         "deceased": deceased, "marker": marker,
                         "marker_missing": marker_missing, "tx_day": tx_day})


def simulate_visit_days(rng: np.random.Generator, p: dict, followup_days: np.ndarray):
    """Visit days since transplant as a padded (n, k) matrix, sorted within each row.

    Returns
    -------
    days : int64 array (n, k)
        Day of each visit; padding cells hold the row's last valid day.
    valid : bool array (n, k)
        True for real visits (valid cells come first in each row).

    Notes
    -----
    Scheduled months m get jitter N(0, min(f m, cap)^2) months; each is missed with
    probability p_miss. Unscheduled visits: Poisson(rate * follow-up / 60 months),
    at most 4, uniform over follow-up. Visits after the administrative end of
    follow-up are dropped, as are same-day repeats.
    """
    n = followup_days.size
    sched = np.asarray(p["schedule_months"], dtype=float)
    jit_sd = np.minimum(p["jitter_fraction"] * sched, p["jitter_max_sd"])
    s_days = np.rint((sched + rng.normal(0.0, 1.0, (n, sched.size)) * jit_sd) * DAYS_PER_MONTH)
    s_valid = rng.random((n, sched.size)) >= p["p_miss_visit"]
    k_extra = 4
    n_extra = np.minimum(rng.poisson(p["extra_visit_rate"] * followup_days
                                     / (p["max_followup_months"] * DAYS_PER_MONTH)), k_extra)
    e_days = np.floor(p["first_visit_min_days"]
                      + rng.random((n, k_extra)) * (followup_days[:, None] - p["first_visit_min_days"]))
    e_valid = np.arange(k_extra)[None, :] < n_extra[:, None]
    days = np.concatenate([s_days, e_days], axis=1)
    days = np.maximum(days, p["first_visit_min_days"])
    valid = np.concatenate([s_valid, e_valid], axis=1) & (days <= followup_days[:, None])
    # guarantee at least one visit: the first scheduled visit if nothing else survived
    none = ~valid.any(axis=1)
    valid[none, 0] = days[none, 0] <= followup_days[none]
    days, valid = _sort_rows(days, valid)
    dup = np.zeros_like(valid)
    dup[:, 1:] = valid[:, 1:] & valid[:, :-1] & (days[:, 1:] == days[:, :-1])
    days, valid = _sort_rows(days, valid & ~dup)
    return days.astype(np.int64), valid


def _sort_rows(days: np.ndarray, valid: np.ndarray):
    """Sort each row's valid days ascending, valid cells first; pad with the last valid day."""
    key = np.where(valid, days, np.inf)
    order = np.argsort(key, axis=1, kind="stable")
    days = np.take_along_axis(days, order, axis=1)
    valid = np.take_along_axis(valid, order, axis=1)
    n_valid = valid.sum(axis=1)
    last = days[np.arange(days.shape[0]), np.maximum(n_valid - 1, 0)]
    days = np.where(valid, days, last[:, None])
    return days, valid


def simulate_egfr(rng: np.random.Generator, p: dict, base: pd.DataFrame, t: np.ndarray):
    """eGFR on the padded time matrix ``t`` (months), before rounding and attrition.

    Notes
    -----
    The serial process uses the exact AR(1) recursion over visit index (vectorised
    over recipients); padding cells repeat the last time, so rho = 1 there and they
    are discarded afterwards.
    """
    n, k = t.shape
    x = np.log2(base["marker"].to_numpy() / p["marker_ref"])
    shift = (np.asarray(p["centre_intercept_shift"])[base["centre_idx"].to_numpy()]
             + p["age_effect"] * (base["age"].to_numpy() - p["age_mean"])
             + p["deceased_effect"] * base["deceased"].to_numpy()
             + p["female_effect"] * base["female"].to_numpy())
    sd0, sd1, r = p["sd_b0"], p["sd_b1"], p["corr_b0_b1"]
    chol = np.linalg.cholesky(np.array([[sd0 ** 2, r * sd0 * sd1], [r * sd0 * sd1, sd1 ** 2]]))
    b = rng.standard_normal((n, 2)) @ chol.T
    sigma, phi = p["sigma_serial"], p["phi_months"]
    z = rng.standard_normal((n, k))
    w = np.empty((n, k))
    w[:, 0] = sigma * z[:, 0]
    for j in range(1, k):  # loop over visit index, vectorised over recipients
        rho = np.exp(-(t[:, j] - t[:, j - 1]) / phi)
        w[:, j] = rho * w[:, j - 1] + np.sqrt(1.0 - rho ** 2) * sigma * z[:, j]
    eps = rng.normal(0.0, p["tau"], (n, k))
    mean = (p["beta0"] + shift[:, None] + p["beta1"] * t + p["beta2"] * x[:, None]
            + p["beta3"] * t * x[:, None])
    y = mean + b[:, [0]] + b[:, [1]] * t + w + eps
    return np.maximum(y, p["egfr_floor"])


def apply_attrition(rng: np.random.Generator, p: dict, egfr: np.ndarray, valid: np.ndarray):
    """Drop visits after the first observed eGFR below threshold; truncate lost-early recipients.

    Notes
    -----
    Dropout depends on the observed response only (missing at random given the
    observed history). A random ``p_lost_early`` share of recipients keep only
    their first 1 or 2 visits (equal chance).
    """
    valid = valid & ~_after_first_below(p, egfr, valid)
    n = valid.shape[0]
    lost = rng.random(n) < p["p_lost_early"]
    keep_n = rng.integers(1, 3, n)
    rank = np.cumsum(valid, axis=1) - 1
    valid = valid & ~(lost[:, None] & (rank >= keep_n[:, None]))
    return valid, lost


def _after_first_below(p: dict, egfr: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """Visit cells after the first valid visit with eGFR below the dropout threshold."""
    below = valid & (egfr < p["dropout_threshold"])
    return (np.cumsum(below, axis=1) - below) > 0


#: why a recipient's visits end (truth file)
END_REASONS = ("function fell", "lost early", "end of follow-up")


def end_of_followup(p: dict, egfr: np.ndarray, planned: np.ndarray, kept: np.ndarray):
    """Why each recipient's visits end: the truth the registry file cannot show.

    Parameters
    ----------
    egfr : (n, k) recorded eGFR on the padded visit matrix
    planned : bool (n, k)
        Visits the schedule produced (before dropout and loss).
    kept : bool (n, k)
        Visits in the file.

    Returns
    -------
    left : bool (n,)
        True when dropout or loss removed at least one planned visit (the recipient left
        before the end of its follow-up); False when its follow-up ran to 60 months or the
        data cut.
    reason : str (n,)
        ``"function fell"`` (eGFR below the threshold removed later visits), ``"lost early"``
        or ``"end of follow-up"``.
    """
    removed = planned & ~kept
    fell = (removed & _after_first_below(p, egfr, planned)).any(axis=1)
    left = removed.any(axis=1)
    reason = np.where(fell, END_REASONS[0], np.where(left, END_REASONS[1], END_REASONS[2]))
    return left, reason


def generate(params: dict | None = None) -> pd.DataFrame:
    """Simulate the whole registry; returns the CSV table (strings / numbers in file form)."""
    return generate_with_truth(params)[0]


def generate_with_truth(params: dict | None = None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The registry table and its truth table (one row per recipient in the file).

    The truth table has recipient_id, left (1 = left before the end of its follow-up, 0 = its
    follow-up ran to 60 months or the data cut), reason (see :data:`END_REASONS`),
    followup_end (date its follow-up was due to end: min(transplant + 60 months, data cut)),
    planned_months (that end in months since transplant).
    """
    p = dict(TRUE_PARAMETERS if params is None else params)
    rng = np.random.default_rng(p["seed"])
    base = simulate_baseline(rng, p)
    first = np.datetime64(p["tx_date_first"], "D")
    cut = np.datetime64(p["data_cut_date"], "D")
    tx_date = first + base["tx_day"].to_numpy().astype("timedelta64[D]")
    to_cut = (cut - tx_date).astype(int)
    followup_days = np.minimum(np.floor(p["max_followup_months"] * DAYS_PER_MONTH), to_cut)
    days, planned = simulate_visit_days(rng, p, followup_days.astype(float))
    t = days / DAYS_PER_MONTH
    egfr = np.round(simulate_egfr(rng, p, base, t), 1)
    valid, _ = apply_attrition(rng, p, egfr, planned)
    left, reason = end_of_followup(p, egfr, planned, valid)

    rows, cols = np.nonzero(valid)  # row-major: recipient, then visit order
    n = len(base)
    ids = np.array([f"R{i + 1:05d}" for i in range(n)])
    marker_txt = np.where(base["marker_missing"].to_numpy(), "",
                          np.char.mod("%.1f", base["marker"].to_numpy()))
    d = days[rows, cols]
    out = pd.DataFrame({
        "recipient_id": ids[rows],
        "centre": np.asarray(p["centres"])[base["centre_idx"].to_numpy()][rows],
        "sex": np.where(base["female"].to_numpy(), "F", "M")[rows],
        "age_at_tx": base["age"].to_numpy()[rows],
        "donor_type": np.where(base["deceased"].to_numpy(), "deceased", "living")[rows],
        "urine_protein_ratio": marker_txt[rows],
        "tx_date": np.datetime_as_string(tx_date, unit="D")[rows],
        "visit_date": np.datetime_as_string(tx_date[rows] + d.astype("timedelta64[D]"), unit="D"),
        "months_since_tx": np.char.mod("%.2f", d / DAYS_PER_MONTH),
        "egfr": np.char.mod("%.1f", egfr[rows, cols]),
    })
    in_file = valid.any(axis=1)
    end_date = tx_date + followup_days.astype(int).astype("timedelta64[D]")
    truth = pd.DataFrame({
        "recipient_id": ids,
        "left": left.astype(int),
        "reason": reason,
        "followup_end": np.datetime_as_string(end_date, unit="D"),
        "planned_months": np.char.mod("%.2f", followup_days / DAYS_PER_MONTH),
    })[in_file].reset_index(drop=True)
    return out[list(DEMO_COLUMNS)], truth


def summarise(df: pd.DataFrame, params: dict | None = None) -> dict:
    """Counts quoted in the README: recipients, visits, visits per recipient, dropout share."""
    p = dict(TRUE_PARAMETERS if params is None else params)
    egfr = df["egfr"].astype(float)
    per = df.groupby("recipient_id", sort=False)
    n_vis = per.size()
    dropped = (egfr < p["dropout_threshold"]).groupby(df["recipient_id"], sort=False).any()
    marker_missing = per["urine_protein_ratio"].first().astype(str).isin(["", "nan"])
    return {
        "recipients": int(n_vis.size),
        "visits": int(len(df)),
        "median_visits": float(n_vis.median()),
        "max_visits": int(n_vis.max()),
        "share_1_2_visits": float((n_vis <= 2).mean()),
        "share_dropout": float(dropped.mean()),
        "share_marker_missing": float(marker_missing.mean()),
        "median_followup_months": float(per["months_since_tx"].last().astype(float).median()),
    }


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="Write the invented kidney-transplant demo registry CSV.")
    ap.add_argument("--out", type=Path, default=DEMO_CSV, help="output CSV path (default: %(default)s)")
    ap.add_argument("--truth-out", type=Path, default=None,
                    help="truth CSV path (default: beside --out, named *_truth.csv)")
    ap.add_argument("--quiet", action="store_true", help="do not print the summary counts")
    args = ap.parse_args(argv)
    df, truth = generate_with_truth()
    truth_out = args.truth_out or args.out.with_name(args.out.stem + "_truth.csv")
    args.out.parent.mkdir(parents=True, exist_ok=True)
    df.to_csv(args.out, index=False, lineterminator="\n")
    truth.to_csv(truth_out, index=False, lineterminator="\n")
    if not args.quiet:
        for k, v in summarise(df).items():
            print(f"{k}: {v:.3f}" if isinstance(v, float) else f"{k}: {v}")
        print(f"wrote {args.out} and {truth_out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
