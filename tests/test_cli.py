"""Headless CLI: JSON schema of `summarize`, flag handling, clear errors with exit status 2."""
import json
import subprocess
import sys

import numpy as np
import pandas as pd

from analysis.preparation.demo import load_demo
from analysis.settings import Roles
from app.cli import main, resolve, build_parser


def _small_csv(tmp_path):
    """A 60-subject slice of the demo registry with unusual column names."""
    df = load_demo()
    ids = sorted(df["recipient_id"].unique())[:60]
    df = df[df["recipient_id"].isin(ids)].rename(columns={
        "recipient_id": "Pt #", "visit_date": "Visit dt", "egfr": "eGFR value",
        "tx_date": "Tx dt", "urine_protein_ratio": "UPR"})
    p = tmp_path / "small.csv"
    df.to_csv(p, sep=";", index=False)
    return p, df


def test_summarize_writes_the_documented_keys(tmp_path, capsys):
    p, df = _small_csv(tmp_path)
    out = tmp_path / "s.json"
    code = main(["summarize", str(p), "--subject", "Pt #", "--time", "Visit dt",
                 "--response", "eGFR value", "--covariate", "UPR", "--event-date", "Tx dt",
                 "--origin", "event-date", "--unit", "months", "--transform", "log2",
                 "--strata", "3", "--variogram-bins", "6", "--lag-width", "12",
                 "--json", str(out)])
    assert code == 0
    doc = json.loads(out.read_text())
    for key in ("settings", "attrition", "subjects", "semivariogram", "lag_correlation", "strata"):
        assert key in doc
    assert doc["settings"]["variogram_bins"] == 6 and doc["settings"]["transform"] == "log2"
    assert {"subjects", "observations"} <= set(doc["attrition"][0])
    assert {"subject", "n", "intercept", "slope", "slope_se", "slope_lo", "slope_hi"} <= set(doc["subjects"][0])
    bins = doc["semivariogram"]["bins"]
    assert len(bins) == 6
    assert {"lag_lo", "lag_hi", "lag_mean", "gamma", "pairs"} <= set(bins[0])
    assert "process_variance" in doc["semivariogram"]
    lc = doc["lag_correlation"]
    assert {"windows", "matrix", "pairs"} <= set(lc)
    assert len(lc["matrix"]) == len(lc["windows"]) == len(lc["pairs"])
    # reference: the attrition's final counts agree with an independent pandas count of the input
    n_final = doc["attrition"][-1]["subjects"]
    assert n_final == len(doc["subjects"])
    assert doc["attrition"][0]["observations"] == len(df)
    assert doc["attrition"][0]["subjects"] == df["Pt #"].nunique()


def test_settings_file_and_flags_override(tmp_path):
    f = tmp_path / "settings.json"
    f.write_text(json.dumps({"min_visits": 5, "detrend": "linear"}))
    args = build_parser().parse_args(["summarize", "x.csv", "--subject", "a", "--time", "b",
                                      "--response", "c", "--settings", str(f),
                                      "--min-visits", "2", "--breaks", "1,2",
                                      "--json", "o.json"])
    _, roles, settings = resolve(args)
    assert roles == Roles("a", "b", "c")
    assert settings.min_visits == 2 and settings.detrend == "linear"
    assert settings.breaks == (1.0, 2.0) and settings.strata_method == "custom"


def test_bad_input_exits_2_with_the_message(tmp_path, capsys):
    p, df = _small_csv(tmp_path)
    df = df.copy()
    df["eGFR value"] = df["eGFR value"].astype(object)
    df.iloc[2, df.columns.get_loc("eGFR value")] = "n/a?"
    df.to_csv(p, sep=";", index=False)
    code = main(["summarize", str(p), "--subject", "Pt #", "--time", "Visit dt",
                 "--response", "eGFR value", "--event-date", "Tx dt", "--origin", "event-date",
                 "--json", str(tmp_path / "o.json")])
    assert code == 2
    err = capsys.readouterr().err
    assert "column 'eGFR value' (response) must hold numbers; row 4 holds 'n/a?'" in err
    assert "Traceback" not in err


def test_missing_roles_and_bad_setting_are_explained(tmp_path, capsys):
    p, _ = _small_csv(tmp_path)
    assert main(["summarize", str(p), "--json", "-"]) == 2
    assert "--subject COL --time COL --response COL" in capsys.readouterr().err
    assert main(["summarize", str(p), "--subject", "Pt #", "--time", "Visit dt",
                 "--response", "eGFR value", "--center", "middle", "--json", "-"]) == 2
    assert "--center 'middle'" in capsys.readouterr().err


def test_console_script_runs_as_a_process(tmp_path):
    out = tmp_path / "demo.json"
    proc = subprocess.run([sys.executable, "-m", "app.cli", "summarize", "demo", "--json", str(out)],
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    doc = json.loads(out.read_text())
    # the demo's settings are used when the data argument is 'demo'
    assert doc["settings"]["origin"] == "event-date" and doc["roles"]["subject"] == "recipient_id"


def test_analysis_layer_never_imports_the_front_end():
    code = ("import sys, analysis.pipeline, analysis.preparation.prepare, analysis.preparation.loading;"
            "bad=[m for m in ('dash','plotly','flask') if m in sys.modules]; print(bad)")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert proc.stdout.strip() == "[]", proc.stdout + proc.stderr


def test_data_cut_and_followup_end_flags(tmp_path, capsys):
    p, df = _small_csv(tmp_path)
    # a follow-up end column: transplant date + 3 years (pandas date arithmetic)
    df = df.assign(**{"Fu end": (pd.to_datetime(df["Tx dt"]) + pd.DateOffset(years=3))
                      .dt.strftime("%Y-%m-%d")})
    df.to_csv(p, sep=";", index=False)
    base = ["summarize", str(p), "--subject", "Pt #", "--time", "Visit dt",
            "--response", "eGFR value", "--covariate", "UPR", "--event-date", "Tx dt",
            "--origin", "event-date"]
    out = tmp_path / "s.json"
    assert main([*base, "--data-cut", "2022-12-31", "--followup-end", "Fu end",
                 "--json", str(out)]) == 0
    doc = json.loads(out.read_text())
    drop = doc["dropout"]
    assert doc["settings"]["data_cut"] == "2022-12-31" and doc["roles"]["followup_end"] == "Fu end"
    assert "'Fu end'" in drop["followup_source"] and "2022-12-31" in drop["followup_source"]
    # reference: pandas — months from transplant to the earlier of (tx + 3 years, the cut)
    tx = pd.to_datetime(df.groupby("Pt #")["Tx dt"].first())
    end = np.minimum(tx + pd.DateOffset(years=3), pd.Timestamp("2022-12-31"))
    want = ((end - tx).dt.days / 30.4375)
    got = pd.Series({s["subject"]: s["potential_followup"] for s in drop["subjects"]})
    # ids as in the data; visits after the end count to the last visit (documented rule)
    last = pd.Series({s["subject"]: s["last_time"] for s in drop["subjects"]})
    np.testing.assert_allclose(got, np.maximum(want.loc[got.index], last), rtol=1e-12)
    assert set(drop["counts"]) == {"left_early", "censored", "complete"}
    assert {"stratum", "time", "retained", "lo", "hi"} <= set(drop["retention"][0])
    # a data cut that is not a date: exit 2 with the setting named
    assert main([*base, "--data-cut", "30/06/2024", "--json", "-"]) == 2
    assert "data_cut" in capsys.readouterr().err
