"""Cohort selection and preparation: re-anchoring, inclusion rules, attrition, validation.

References: independent pandas computations written in each test (date differences,
groupby counts and means), and the documented rules in the README.
"""
import numpy as np
import pandas as pd
import pytest

from analysis.errors import DataError, SettingsError
from analysis.preparation.prepare import prepare, select_cohort
from analysis.settings import Roles, Settings

ROLES = Roles("pid", "visit", "gfr", covariates=("marker", "centre"), event_date="tx")


def cohort_frame() -> pd.DataFrame:
    rng = np.random.default_rng(3)
    rows = []
    for i in range(12):
        tx = pd.Timestamp("2019-01-01") + pd.Timedelta(days=int(rng.integers(0, 300)))
        n = [1, 2, 3, 4, 5, 6][i % 6]
        offsets = np.sort(rng.choice(np.arange(-20, 900, 7), n, replace=False))
        marker = None if i == 5 else round(float(rng.lognormal(2, 0.8)), 2)
        for d in offsets:
            rows.append({"pid": f"P{i:02d}", "visit": (tx + pd.Timedelta(days=int(d))).date().isoformat(),
                         "tx": tx.date().isoformat(), "gfr": round(float(rng.normal(50, 10)), 1),
                         "marker": marker,
                         "centre": "AB"[i % 2]})
    return pd.DataFrame(rows)


def settings(**kw) -> Settings:
    base = dict(origin="event-date", unit="months", min_visits=1, require_covariate=False)
    base.update(kw)
    return Settings(**base)


def test_event_date_origin_matches_pandas_date_arithmetic():
    df = cohort_frame()
    sel = select_cohort(df, ROLES, settings())
    # reference: pandas date difference in days / 30.4375 (an average Gregorian month)
    t = (pd.to_datetime(df["visit"]) - pd.to_datetime(df["tx"])).dt.days / 30.4375
    kept = df.assign(t=t)[t >= 0].sort_values(["pid", "t"])
    np.testing.assert_allclose(sel.panel.time, kept["t"].to_numpy(), rtol=0, atol=1e-12)
    np.testing.assert_allclose(sel.panel.y, kept["gfr"].to_numpy())
    assert list(sel.subject_ids) == sorted(kept["pid"].unique())


@pytest.mark.parametrize("unit, days", [("days", 1), ("weeks", 7), ("years", 365.25)])
def test_units(unit, days):
    df = cohort_frame()
    sel = select_cohort(df, ROLES, settings(unit=unit))
    t = (pd.to_datetime(df["visit"]) - pd.to_datetime(df["tx"])).dt.days / days
    np.testing.assert_allclose(np.sort(sel.panel.time), np.sort(t[t >= 0].to_numpy()), atol=1e-12)


def test_first_visit_origin_starts_every_subject_at_zero():
    df = cohort_frame()
    sel = select_cohort(df, ROLES, settings(origin="first-visit"))
    assert np.all(sel.panel.time[sel.panel.starts] == 0)
    # reference: pandas groupby min of the parsed dates
    d = pd.to_datetime(df["visit"])
    span = (d.groupby(df["pid"]).max() - d.groupby(df["pid"]).min()).dt.days / 30.4375
    last = sel.panel.time[sel.panel.starts + sel.panel.counts - 1]
    np.testing.assert_allclose(last, span.sort_index().to_numpy(), atol=1e-12)


def test_attrition_counts_match_an_independent_count():
    df = cohort_frame()
    s = settings(min_visits=3, require_covariate=True, covariate="marker")
    att = select_cohort(df, ROLES, s).attrition.to_frame()
    t = (pd.to_datetime(df["visit"]) - pd.to_datetime(df["tx"])).dt.days
    after = df[t >= 0]
    with_marker = after[after["marker"].notna()]
    n = with_marker.groupby("pid").size()
    final = with_marker[with_marker["pid"].isin(n.index[n >= 3])]
    # reference: the same rules applied step by step with pandas
    assert att["step"].iloc[0] == "All rows read"
    assert att["observations"].iloc[0] == len(df)
    before = att[att["step"] == "Visits at or after the time origin"].iloc[0]
    assert before["observations"] == len(after)
    assert before["observations_removed"] == int((t < 0).sum())
    assert att["subjects"].iloc[-1] == final["pid"].nunique()
    assert att["observations"].iloc[-1] == len(final)
    diffs = att["observations"].shift(1) - att["observations"]
    np.testing.assert_array_equal(diffs.iloc[1:].to_numpy(), att["observations_removed"].iloc[1:])


def test_time_window():
    df = cohort_frame()
    sel = select_cohort(df, ROLES, settings(time_min=1.0, time_max=12.0))
    assert sel.panel.time.min() >= 1.0 and sel.panel.time.max() <= 12.0
    assert "time window" in sel.attrition.to_frame()["step"].iloc[-2]


def test_missing_column_is_named():
    df = cohort_frame().drop(columns="gfr")
    with pytest.raises(DataError, match=r"column 'gfr' \(response\) is not in the table") as e:
        select_cohort(df, ROLES, settings())
    assert e.value.column == "gfr"


def test_all_missing_column():
    df = cohort_frame().assign(marker=np.nan)
    with pytest.raises(DataError, match=r"column 'marker' .* has no values"):
        select_cohort(df, ROLES, settings())


def test_non_numeric_response_names_rows():
    df = cohort_frame()
    df["gfr"] = df["gfr"].astype(object)
    df.loc[[3, 7], "gfr"] = "high"
    with pytest.raises(DataError, match=r"column 'gfr' \(response\) must hold numbers; rows 5, 9 hold 'high'") as e:
        select_cohort(df, ROLES, settings())
    assert e.value.rows == (5, 9)


def test_decimal_commas_are_read():
    df = cohort_frame()
    expected = select_cohort(df, ROLES, settings()).panel.y
    df["gfr"] = df["gfr"].map(lambda v: str(v).replace(".", ","))
    np.testing.assert_allclose(select_cohort(df, ROLES, settings()).panel.y, expected)


def test_unparseable_dates_name_rows():
    df = cohort_frame()
    df.loc[4, "visit"] = "31/31/2020"
    with pytest.raises(DataError, match=r"column 'visit' \(time\) must hold dates .* row 6 holds '31/31/2020'"):
        select_cohort(df, ROLES, settings())


def test_as_is_origin_with_dates_asks_for_an_origin():
    with pytest.raises(SettingsError, match="holds dates"):
        select_cohort(cohort_frame(), ROLES, settings(origin="as-is"))


def test_event_date_varying_within_subject():
    df = cohort_frame()
    first = df.index[df["pid"] == "P03"][0]
    df.loc[first, "tx"] = "2018-01-01"
    with pytest.raises(DataError, match=r"'tx' \(event date\) must be the same on every row .* P03"):
        select_cohort(df, ROLES, settings())


def test_duplicates_rejected_or_averaged():
    df = cohort_frame()
    dup = df.iloc[[10]].assign(gfr=df["gfr"].iloc[10] + 10)
    df2 = pd.concat([df, dup], ignore_index=True)
    with pytest.raises(DataError, match=r"repeat a \(subject, time\) pair") as e:
        select_cohort(df2, ROLES, settings())
    assert e.value.rows == (12, len(df2) + 1)
    sel = select_cohort(df2, ROLES, settings(duplicates="average"))
    # reference: pandas mean over the repeated visit
    pid, visit = df.loc[10, "pid"], df.loc[10, "visit"]
    want = df2[(df2.pid == pid) & (df2.visit == visit)]["gfr"].mean()
    assert np.isclose(sel.panel.y, want).sum() >= 1
    assert sel.panel.n_obs == select_cohort(df, ROLES, settings()).panel.n_obs


def test_varying_baseline_covariate_warns_and_uses_first_visit():
    df = cohort_frame()
    rows = df.index[df["pid"] == "P04"]
    df.loc[rows[-1], "marker"] = 999.0
    sel = select_cohort(df, ROLES, settings())
    assert any("'marker' changes within 1 subject" in w for w in sel.warnings)
    got = sel.baseline.set_index("subject").loc["P04", "marker"]
    # reference: the marker on the earliest visit of P04
    first = df.loc[rows].assign(d=pd.to_datetime(df.loc[rows, "visit"])).sort_values("d")
    assert got == first["marker"].iloc[0]


def test_empty_result_after_filters():
    with pytest.raises(DataError, match=r"no visits remain after the inclusion step 'At least 50 visits'"):
        select_cohort(cohort_frame(), ROLES, settings(min_visits=50))


def test_prepare_strata_and_transform():
    df = cohort_frame()
    s = settings(covariate="marker", transform="log2", center="median", n_strata=2,
                 require_covariate=True)
    c = prepare(df, ROLES, s)
    raw = c.baseline["marker"].to_numpy(float)
    # reference: numpy log2 and median
    np.testing.assert_allclose(c.x, np.log2(raw) - np.median(np.log2(raw)))
    assert c.center_value == pytest.approx(np.median(np.log2(raw)))
    assert set(c.baseline["stratum"]) == {0, 1}
    long = c.frame
    assert list(long.columns) == ["subject", "time", "response", "stratum", "stratum_label"]
    assert len(long) == c.panel.n_obs


def test_equal_width_strata_of_the_primary_covariate_use_its_transform():
    df = cohort_frame()
    c = prepare(df, ROLES, settings(covariate="marker", transform="log2", n_strata=3,
                                    strata_method="equal-width"))
    raw = c.baseline["marker"].to_numpy(float)
    ok = raw[~np.isnan(raw)]
    # reference: numpy linspace on np.log2 of the baseline values, membership by np.digitize
    edges = np.linspace(np.log2(ok).min(), np.log2(ok).max(), 4)
    want = np.where(np.isnan(raw), -1,
                    np.clip(np.digitize(np.log2(np.where(np.isnan(raw), 1, raw)), edges) - 1, 0, 2))
    np.testing.assert_array_equal(c.baseline["stratum"].to_numpy(), want)
    np.testing.assert_allclose(np.log2(c.strata.edges), edges, rtol=1e-12, atol=1e-12)


def test_categorical_stratifier_uses_levels():
    c = prepare(cohort_frame(), ROLES, settings(stratify_by="centre"))
    assert tuple(c.strata.labels) == ("A", "B")
    # reference: the centre column itself
    want = c.baseline["centre"].map({"A": 0, "B": 1}).to_numpy()
    np.testing.assert_array_equal(c.baseline["stratum"].to_numpy(), want)


def test_categorical_covariate_cannot_be_log_transformed():
    with pytest.raises(SettingsError, match="'centre' is categorical"):
        prepare(cohort_frame(), ROLES, settings(covariate="centre", transform="log"))


def test_units_given_with_the_roles_label_the_response_and_covariate():
    df = cohort_frame()
    roles = Roles("pid", "visit", "gfr", covariates=("marker", "centre"), event_date="tx",
                  response_unit="mL/min", covariate_unit="mg/L")
    cohort = prepare(df, roles, settings())
    assert cohort.response_label == "gfr (mL/min)" and cohort.covariate_unit == "mg/L"
    other = prepare(df, roles, settings(covariate="centre"))
    assert other.covariate_unit == ""      # the unit belongs to the first listed covariate only
    assert Roles.from_dict(roles.to_dict()) == roles


def test_subject_labels_are_trimmed_and_numeric_ids_stay_whole_numbers():
    df = cohort_frame()
    spaced = df.assign(pid=" " + df["pid"] + "  ")
    a, b = select_cohort(df, ROLES, settings()), select_cohort(spaced, ROLES, settings())
    # reference: the untouched table; surrounding spaces must not create new subjects
    assert list(b.subject_ids) == list(a.subject_ids)
    np.testing.assert_array_equal(b.panel.y, a.panel.y)
    numeric = df.assign(pid=df["pid"].str[1:].astype(float) + 100)
    c = select_cohort(numeric, ROLES, settings())
    # reference: Python's own int() of the float ids, in numeric order
    assert list(c.subject_ids) == sorted(int(v) for v in numeric["pid"].unique())
    blank = df.copy()
    blank.loc[[0, 1], "pid"] = "  "
    d = select_cohort(blank, ROLES, settings())
    assert d.attrition.steps[1].observations == len(df) - 2


def test_a_filtered_table_with_gaps_in_its_index_gives_the_same_cohort():
    df = cohort_frame()
    kept = df[df["pid"] != "P02"]
    shuffled = kept.sample(frac=1.0, random_state=4)       # index labels out of order, with gaps
    a = select_cohort(kept.reset_index(drop=True), ROLES, settings())
    b = select_cohort(shuffled, ROLES, settings())
    # reference: the same rows with a fresh 0..n-1 index
    assert list(b.subject_ids) == list(a.subject_ids)
    np.testing.assert_array_equal(b.panel.time, a.panel.time)
    np.testing.assert_array_equal(b.panel.y, a.panel.y)


def test_small_groups_reach_the_cohort_warnings_and_the_report():
    from analysis.output.report import build_report

    c = prepare(cohort_frame(), ROLES, settings(stratify_by="centre"))
    # reference: an independent pandas count of subjects per centre (12 subjects, 6 per centre,
    # each under 10 -- the common-practice threshold)
    per = cohort_frame().groupby("centre")["pid"].nunique()
    small = [w for w in c.warnings if "has only" in w]
    assert [w.split(" has only ")[1].split(" ")[0] for w in small] == [str(n) for n in per]
    text = build_report(c)
    for w in small:
        assert w.replace("'", "&#x27;") in text


# ------------------------------------------------------------------ input checks (dates, ids, values)
from analysis.errors import ECHO_LIMIT  # noqa: E402

SIMPLE = Roles("pid", "t", "y")


def _simple(t, y=None, pid=None) -> pd.DataFrame:
    n = len(t)
    return pd.DataFrame({"pid": pid if pid is not None else [f"S{i // 3}" for i in range(n)],
                         "t": t, "y": y if y is not None else np.arange(n, dtype=float)})


@pytest.mark.parametrize("bad, row", [(np.inf, 3), (-np.inf, 2), ("inf", 4), ("1e309", 5),
                                      ("nan", 3), ("-Infinity", 6)])
def test_non_finite_time_is_named_by_row(bad, row):
    t = [0.0, 1.0, 2.0, 0.0, 1.0, 2.0]
    t = [str(v) for v in t] if isinstance(bad, str) else t
    t[row - 2] = bad
    with pytest.raises(DataError, match=r"column 't' \(time\) must hold finite numbers") as err:
        select_cohort(_simple(t), SIMPLE, Settings(min_visits=1))
    assert err.value.rows == (row,) and err.value.column == "t"


def test_non_finite_response_is_named_and_a_real_missing_value_is_not():
    y = [1.0, 2.0, np.inf, 1.0, 2.0, 3.0]
    with pytest.raises(DataError, match=r"'y' \(response\).*row 4"):
        select_cohort(_simple([0.0, 1, 2] * 2, y), SIMPLE, Settings(min_visits=1))
    y[2] = np.nan  # an empty cell: dropped and counted, as before
    sel = select_cohort(_simple([0.0, 1, 2] * 2, y), SIMPLE, Settings(min_visits=1))
    assert sel.panel.n_obs == 5  # reference: six rows minus the one missing response


def test_day_first_dates_with_event_date_match_pandas_with_the_format():
    df = cohort_frame()
    text = df.assign(visit=pd.to_datetime(df["visit"]).dt.strftime("%d/%m/%Y"),
                     tx=pd.to_datetime(df["tx"]).dt.strftime("%d/%m/%Y"))
    got = select_cohort(text, ROLES, settings())
    iso = select_cohort(df, ROLES, settings())
    # reference: the same visits written yyyy-mm-dd, read by pandas' ISO parser
    np.testing.assert_array_equal(got.panel.time, iso.panel.time)
    amb = pd.DataFrame({"pid": ["A"] * 3, "visit": ["01/02/2021", "01/03/2021", "05/04/2021"],
                        "tx": ["01/01/2021"] * 3, "gfr": [50.0, 51.0, 52.0]})
    roles = Roles("pid", "visit", "gfr", event_date="tx")
    with pytest.raises(DataError, match="date order") as err:
        select_cohort(amb, roles, settings(unit="days"))
    assert err.value.column == "visit"
    for order, fmt in (("month-first", "%m/%d/%Y"), ("day-first", "%d/%m/%Y")):
        sel = select_cohort(amb, roles, settings(unit="days", date_order=order))
        # reference: pandas to_datetime told the format, differences in days
        ref = (pd.to_datetime(amb["visit"], format=fmt) - pd.to_datetime(amb["tx"], format=fmt))
        np.testing.assert_array_equal(sel.panel.time, ref.dt.days.to_numpy(float))


def test_sixteen_digit_ids_never_merge_dataframe_path():
    ids = np.array([9007199254740993 + k for k in range(20)], dtype=np.int64)  # above 2**53
    assert len(np.unique(ids.astype(float))) < 20  # what a float would do
    df = pd.DataFrame({"pid": np.repeat(ids, 3), "t": np.tile([0.0, 1.0, 2.0], 20),
                       "y": np.arange(60, dtype=float)})
    sel = select_cohort(df, SIMPLE, Settings(min_visits=1))
    # reference: the 20 distinct Python integers given
    assert sel.panel.n_subjects == 20
    assert sorted(sel.subject_ids.tolist()) == sorted(int(i) for i in ids)
    nullable = df.assign(pid=df["pid"].astype("Int64"))
    nullable.loc[0, "pid"] = pd.NA
    sel = select_cohort(nullable, SIMPLE, Settings(min_visits=1))
    assert sel.panel.n_subjects == 20 and int(ids[1]) in sel.subject_ids.tolist()


def test_float_ids_that_are_not_whole_are_text_and_inf_is_no_traceback():
    df = _simple([0.0, 1, 2] * 3, pid=[1.5] * 3 + [2.0] * 3 + [np.inf] * 3)
    sel = select_cohort(df, SIMPLE, Settings(min_visits=1))
    assert sorted(map(str, sel.subject_ids)) == ["1.5", "2", "inf"]
    assert 2 in sel.subject_ids.tolist()  # whole numbers stay numbers


def test_a_nested_role_column_is_a_message():
    df = _simple([0.0, 1, 2] * 2, y=[[1.0]] * 6)
    with pytest.raises(DataError, match=r"'y' \(response\) holds lists or records"):
        select_cohort(df, SIMPLE, Settings(min_visits=1))


def test_huge_cells_and_names_are_cut_in_messages():
    y = ["1", "x" * 1_000_000, "3", "1", "2", "3"]
    with pytest.raises(DataError) as err:
        select_cohort(_simple([0.0, 1, 2] * 2, y), SIMPLE, Settings(min_visits=1))
    assert "row 3" in str(err.value) and len(str(err.value)) < 2 * ECHO_LIMIT + 200
    long = "c" * 5000
    with pytest.raises(DataError, match="is not in the table") as err:
        select_cohort(_simple([0.0, 1, 2]).rename(columns={"y": long}), SIMPLE, Settings())
    assert len(str(err.value)) < 2 * ECHO_LIMIT + 200
    with pytest.raises(DataError, match="is not in the table") as err:
        select_cohort(_simple([0.0, 1, 2]), Roles("pid", "t", long), Settings())
    assert len(str(err.value)) < 2 * ECHO_LIMIT + 200
