"""The invented post-transplant kidney-function registry shipped as demo data.

This module is the single source of the generating parameters
(:data:`TRUE_PARAMETERS`); ``sample_data/generate_registry.py`` imports them
from here, and tests compare fitted estimates against them. The data are
simulated: no real patients are involved.
"""
from __future__ import annotations

from pathlib import Path

import pandas as pd

from ..settings import Roles, Settings

#: Location of the demo CSV (one row per visit).
DEMO_CSV: Path = Path(__file__).resolve().parents[2] / "sample_data" / "kidney_registry.csv"
DEMO_SETTINGS: Path = DEMO_CSV.with_name("demo_settings.json")

#: Column names of the demo CSV, in file order.
DEMO_COLUMNS: tuple[str, ...] = (
    "recipient_id", "centre", "sex", "age_at_tx", "donor_type", "urine_protein_ratio",
    "tx_date", "visit_date", "months_since_tx", "egfr",
)

#: Every value used to simulate the registry (see sample_data/README.md).
#: Units: eGFR in mL/min/1.73m², time in months since transplant
#: (1 month = 30.4375 days), marker in mg/mmol, age in years.
TRUE_PARAMETERS: dict = {
    # reproducibility
    "seed": 20240611,
    # cohort size and calendar
    "n_recipients": 1200,
    "centres": ("Centre A", "Centre B", "Centre C", "Centre D", "Centre E", "Centre F"),
    "centre_weights": (0.24, 0.20, 0.18, 0.15, 0.13, 0.10),
    "centre_intercept_shift": (2.0, -1.0, 0.0, -3.0, 1.5, 0.5),   # mL/min/1.73m²
    "tx_date_first": "2015-01-01",
    "tx_date_last": "2021-12-31",
    "data_cut_date": "2023-06-30",
    "max_followup_months": 60.0,
    # baseline covariates
    "p_female": 0.40,
    "age_mean": 50.0, "age_sd": 13.0, "age_min": 18, "age_max": 80,
    "p_deceased_at_age_mean": 0.60,      # P(deceased donor) at age 50 ...
    "p_deceased_per_year": 0.006,        # ... rising by this much per year of age
    # marker: log(marker) = log(ref) + shift*(deceased - p_deceased) + N(0, sd^2)
    "marker_name": "urine_protein_ratio",
    "marker_unit": "mg/mmol",
    "marker_ref": 20.0,                  # centring constant in the eGFR model
    "marker_log_sd": 0.9,                # SD of natural-log marker
    "marker_deceased_log_shift": 0.4,    # deceased donors: higher marker (confounding)
    "p_marker_missing": 0.05,
    # eGFR mean model, x = log2(marker / marker_ref), t in months
    "beta0": 55.0,       # intercept at t=0, marker = ref, living donor, male, age 50
    "beta1": -0.10,      # slope per month at marker = ref
    "beta2": -3.0,       # intercept change per doubling of marker
    "beta3": -0.04,      # slope change per month per doubling (time x marker)
    "age_effect": -0.25,          # intercept change per year of age above 50
    "deceased_effect": -6.0,      # intercept change for deceased donor
    "female_effect": 1.0,         # intercept change for female recipients
    # random intercept and slope (b0, b1) ~ N(0, G)
    "sd_b0": 12.0,       # mL/min/1.73m²
    "sd_b1": 0.20,       # mL/min/1.73m² per month
    "corr_b0_b1": -0.20,
    # serial process W: stationary Gaussian, corr exp(-u / phi)
    "sigma_serial": 5.0,      # SD of W (variance sigma^2 = 25)
    "phi_months": 12.0,       # range parameter
    # measurement error
    "tau": 4.0,               # SD of epsilon (nugget tau^2 = 16)
    # visit process
    "schedule_months": (1, 3, 6, 12, 18, 24, 30, 36, 42, 48, 54, 60),
    "jitter_fraction": 0.08,  # SD of visit jitter = fraction * planned month ...
    "jitter_max_sd": 1.0,     # ... capped at this many months
    "p_miss_visit": 0.15,     # each scheduled visit independently missed
    "extra_visit_rate": 1.0,  # Poisson mean of unscheduled visits over follow-up
    "first_visit_min_days": 7,
    # attrition
    "dropout_threshold": 20.0,   # after an observed eGFR < this, no further visits
    "p_lost_early": 0.04,        # recipients truncated to their first 1-2 visits
    "egfr_floor": 3.0,           # simulated values are clipped below at this
}


def load_demo() -> pd.DataFrame:
    """Read the demo registry.

    Returns
    -------
    pandas.DataFrame
        One row per visit with columns :data:`DEMO_COLUMNS`. Dates
        (``tx_date``, ``visit_date``) are left as ISO strings; the loading
        layer parses them. ``urine_protein_ratio`` is NaN where missing.
    """
    if not DEMO_CSV.exists():
        raise FileNotFoundError(
            f"demo data not found at {DEMO_CSV}; run `python sample_data/generate_registry.py`"
        )
    return pd.read_csv(DEMO_CSV, dtype={"recipient_id": str, "tx_date": str, "visit_date": str})


def demo_roles() -> Roles:
    """Column roles for the demo registry (time = visit date, anchored at transplant date)."""
    return Roles(
        subject="recipient_id",
        time="visit_date",
        response="egfr",
        covariates=("urine_protein_ratio", "centre", "sex", "age_at_tx", "donor_type"),
        event_date="tx_date",
        response_unit="mL/min/1.73m²",
        covariate_unit="mg/mmol",
    )


def demo_settings() -> Settings:
    """Settings that show the demo's story: log2 marker, quartile strata, 6-month lags (the
    choices that differ from the defaults are in ``sample_data/demo_settings.json``, a settings
    file like any other)."""
    return Settings.from_json(DEMO_SETTINGS.read_text(encoding="utf-8"))
