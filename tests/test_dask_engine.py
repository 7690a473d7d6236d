"""The cluster engine (--engine dask) against the in-memory engine, on a real 2-worker cluster.

Reference throughout: the in-memory engine (analysis.pipeline.explore and
analysis.models.modelstage.fit_models on the whole table in this process) is the reference
implementation; the cluster engine must give the same JSON on the same rows. Its estimators
are themselves checked against statsmodels, scipy and brute force in the other test files.
"""
from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

pytest.importorskip("distributed", reason="the dask extra is installed by tests/run.sh")

from analysis.cluster.engine import ClusterCohort  # noqa: E402
from analysis.cluster.models import fit_cluster_models  # noqa: E402
from analysis.cluster.partitions import subject_bucket, write_partitions  # noqa: E402
from analysis.preparation.demo import DEMO_CSV, demo_roles, demo_settings  # noqa: E402
from analysis.errors import DataError, SettingsError  # noqa: E402
from analysis.jsonsafe import json_safe  # noqa: E402
from analysis.preparation.loading import read_table  # noqa: E402
from analysis.models.modelstage import ModelChoices, fit_models  # noqa: E402
from analysis.pipeline import explore  # noqa: E402
from analysis.preparation.prepare import prepare  # noqa: E402
from analysis.settings import Roles, Settings  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
REL = 1e-8


#: memory limit of each worker: small, so that the generated table below is several times
#: larger; pausing and restarting are off, so Dask can only spill partitions to disk
WORKER_LIMIT = 4 * 2**20


@pytest.fixture(scope="module")
def client():
    """One 2-worker cluster of processes for the whole module."""
    import dask
    from distributed import Client, LocalCluster

    with dask.config.set({"distributed.worker.memory.pause": False,
                          "distributed.worker.memory.terminate": False}):
        cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                               memory_limit=WORKER_LIMIT, dashboard_address=None)
    c = Client(cluster)
    yield c
    c.close()
    cluster.close()


@pytest.fixture(scope="module")
def demo_parts(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo_parts")
    write_partitions(read_table(DEMO_CSV), "recipient_id", out, n_parts=4)
    return out


@pytest.fixture(scope="module")
def demo_halves(tmp_path_factory):
    """Two partitions: fewer tasks per likelihood evaluation for the (slower) fit test."""
    out = tmp_path_factory.mktemp("demo_halves")
    write_partitions(read_table(DEMO_CSV), "recipient_id", out, n_parts=2)
    return out


def _plain(payload) -> object:
    return json.loads(json.dumps(payload))


def mismatches(ref, got, path="", rel=REL):
    """Every place where two JSON trees differ (numbers beyond ``rel`` relative)."""
    bad = []
    if isinstance(ref, dict):
        if set(ref) != set(got):
            return [(path, "keys", sorted(set(ref) ^ set(got)))]
        for k in ref:
            bad += mismatches(ref[k], got[k], f"{path}.{k}", rel)
    elif isinstance(ref, list):
        if not isinstance(got, list) or len(ref) != len(got):
            return [(path, "length", len(ref), len(got) if isinstance(got, list) else got)]
        for i, (a, b) in enumerate(zip(ref, got)):
            bad += mismatches(a, b, f"{path}[{i}]", rel)
    elif isinstance(ref, float) and isinstance(got, (int, float)) and not isinstance(got, bool):
        if not math.isclose(ref, got, rel_tol=rel, abs_tol=0.0):
            bad.append((path, ref, got))
    elif ref != got:
        bad.append((path, ref, got))
    return bad


def _count_values(tree) -> int:
    if isinstance(tree, dict):
        return sum(_count_values(v) for v in tree.values())
    if isinstance(tree, list):
        return sum(_count_values(v) for v in tree)
    return 1


# --------------------------------------------------------------------------- summarize
@pytest.mark.parametrize("changes", [
    {},
    {"strata_method": "equal-width", "transform": "log", "center": "mean", "variogram_bins": 7,
     "detrend": "linear", "detrend_within_strata": True, "min_visits": 1, "lag_width": None},
], ids=["demo", "equal-width-log-mean-within-strata-linear"])
def test_summarize_equals_in_memory(client, demo_parts, changes):
    roles = demo_roles()
    settings = Settings.from_dict({**demo_settings().to_dict(), **changes})
    # reference: the in-memory engine on the whole table
    ref = _plain(explore(read_table(DEMO_CSV), roles, settings).to_json())
    got = _plain(ClusterCohort(client, str(demo_parts), roles, settings)
                 .explore(settings).to_json())
    assert _count_values(ref) > 10_000          # the comparison covers the whole output
    assert mismatches(ref, got) == []
    # strata cut points: exactly equal (exact quantiles from every subject's value)
    assert got["strata_definition"] == ref["strata_definition"]
    assert got["attrition"] == ref["attrition"]
    if not changes:
        # more pairs than the smooth's subsample: the same seeded pairs were fetched
        assert any("random subsample" in n for n in ref["semivariogram"]["notes"])


def test_lowess_detrending_is_refused(client, demo_parts):
    settings = Settings.from_dict({**demo_settings().to_dict(), "detrend": "lowess"})
    cc = ClusterCohort(client, str(demo_parts), demo_roles(), settings)
    with pytest.raises(SettingsError, match="cannot be combined from partitions"):
        cc.explore(settings)


# --------------------------------------------------------------------------- fit
#: values computed from the finite-difference Hessian of the analytic gradient (step 1e-5):
#: the variance parameters' interval ends. Summing the gradient in another order (partition by
#: partition) changes it by rounding (~1e-13 relative), which the difference quotient
#: amplifies about 1e5-fold; these are compared to 1e-7 relative, every other value to 1e-8.
HESSIAN_REL = 1e-7


def test_fit_equals_in_memory(client, demo_halves):
    """Both likelihood paths: per-subject sums (intercept + slope) and dense per-visit-count
    stacks (with a serial process), REML; GEE rows are not part of the cluster fit."""
    roles, settings = demo_roles(), demo_settings()
    choices = ModelChoices(structures=("intercept+slope", "intercept+slope+serial"), gee=())
    # reference: the in-memory engine
    ref = _plain(json_safe(fit_models(prepare(read_table(DEMO_CSV), roles, settings),
                                      choices).to_json()))
    cc = ClusterCohort(client, str(demo_halves), roles, settings)
    got = _plain(json_safe(fit_cluster_models(cc, cc.cohort(settings), choices).to_json()))
    assert [m["converged"] for m in got["models"]] == [True, True]
    bad = mismatches(ref, got)
    hessian = [b for b in bad if ".variance." in b[0] and b[0].endswith((".lo", ".hi"))]
    assert [b for b in bad if b not in hessian] == []
    assert mismatches([b[1] for b in hessian], [b[2] for b in hessian], rel=HESSIAN_REL) == []


def test_fit_drops_gee_rows_and_says_so(client, demo_parts):
    roles, settings = demo_roles(), demo_settings()
    cc = ClusterCohort(client, str(demo_parts), roles, settings)
    got = fit_cluster_models(cc, cc.cohort(settings),
                             ModelChoices(structures=("intercept",)))
    assert got.gee == ()
    assert any("GEE rows are not computed" in n for n in got.notes)


# --------------------------------------------------------------------------- partitions
def test_partitions_keep_each_subject_whole(demo_parts):
    frame = read_table(DEMO_CSV)
    seen = {}
    for path in sorted(Path(demo_parts).glob("*.parquet")):
        for s in pd.read_parquet(path, columns=["recipient_id"])["recipient_id"].unique():
            assert s not in seen, (s, seen.get(s), path)
            seen[s] = path
    # brute force: every subject of the table is in exactly one partition
    assert set(seen) == set(frame["recipient_id"].unique())
    # the hash is stable: the same label always gets the same bucket
    assert subject_bucket(["R00001", " R00001 "], 16)[0] == subject_bucket(["R00001"], 16)[0]


def test_subject_in_two_partitions_is_named(client, tmp_path):
    frame = read_table(DEMO_CSV)
    first = frame[frame["recipient_id"] < "R00600"]
    second = frame[frame["recipient_id"] >= "R00600"]
    # move one visit of subject R00700 into the first file
    moved = second[second["recipient_id"] == "R00700"].head(1)
    first = pd.concat([first, moved])
    second = second.drop(moved.index)
    first.to_parquet(tmp_path / "a.parquet", index=False)
    second.to_parquet(tmp_path / "b.parquet", index=False)
    with pytest.raises(DataError) as err:
        ClusterCohort(client, str(tmp_path), demo_roles(), demo_settings())
    text = str(err.value)
    assert "R00700" in text and "a.parquet" in text and "b.parquet" in text


def test_single_file_is_refused_with_dask_engine(tmp_path):
    out = tmp_path / "s.json"
    proc = subprocess.run(
        [sys.executable, "-m", "app.cli", "summarize", "demo", "--engine", "dask",
         "--json", str(out)], cwd=ROOT, capture_output=True, text=True, timeout=120,
        env={**_env()})
    assert proc.returncode == 2
    assert "partitioned Parquet dataset" in proc.stderr


def _env():
    import os
    return {**os.environ, "PYTHONPATH": str(ROOT)}


def test_default_path_never_imports_dask(tmp_path):
    code = ("import sys, app.cli\n"
            f"rc = app.cli.main(['summarize', 'demo', '--json', r'{tmp_path / 'o.json'}'])\n"
            "assert rc == 0, rc\n"
            "print(sorted(m for m in sys.modules if m == 'dask' or m.startswith('dask.')"
            " or m == 'distributed' or m.startswith('distributed.')))\n")
    proc = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                          text=True, timeout=120, env=_env())
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert proc.stdout.strip() == "[]"


# --------------------------------------------------------------------------- out of core
def _generated(n_subjects: int, seed: int = 7) -> pd.DataFrame:
    """Irregular visits, a random intercept and slope, a numeric covariate (invented)."""
    rng = np.random.default_rng(seed)
    n = rng.integers(3, 12, n_subjects)
    sid = np.repeat(np.arange(n_subjects), n)
    visit = np.arange(sid.size) - np.repeat(np.cumsum(n) - n, n)
    t = 6.0 * visit + rng.uniform(0, 5.9, sid.size).round(2)        # increasing per subject
    x = rng.lognormal(1.0, 0.8, n_subjects)
    b0 = rng.normal(0, 10, n_subjects)
    y = 60 + b0[sid] - (0.1 + 0.02 * np.log2(x[sid])) * t + rng.normal(0, 5, sid.size)
    return pd.DataFrame({"pid": sid, "t": t, "y": y.round(3), "marker": x[sid].round(4),
                         "site": np.array(["north", "south", "east"])[sid % 3]})


def test_larger_than_a_worker_memory_limit_completes(client, tmp_path):
    """The module's workers have a 4 MB memory limit (pausing and restarting off, so Dask can
    only spill to disk); they summarise a table more than three times that size in memory."""
    frame = _generated(60_000)
    size = int(frame.memory_usage(deep=True).sum())
    assert size > 3 * WORKER_LIMIT
    write_partitions(frame, "pid", tmp_path / "parts", n_parts=6)
    roles = Roles(subject="pid", time="t", response="y", covariates=("marker", "site"))
    settings = Settings.from_dict({"unit": "months", "variogram_bins": 8})
    cc = ClusterCohort(client, str(tmp_path / "parts"), roles, settings)
    got = _plain(cc.explore(settings).to_json())
    spilled = client.run(lambda dask_worker: len(dask_worker.data.slow))
    assert sum(spilled.values()) > 0                 # the workers did go to disk
    # reference: the in-memory engine on the same rows
    ref = _plain(explore(frame, roles, settings).to_json())
    assert ref["cohort"]["observations"] == len(frame)
    for key in ("cohort", "attrition", "strata_definition", "semivariogram", "lag_correlation",
                "strata"):
        assert mismatches(ref[key], got[key]) == [], key


def test_partition_command_and_dataset_addresses(tmp_path):
    """`cohortlens partition` writes every row once; a folder, a glob and a file:// address
    open the same files; a non-empty folder is refused."""
    from analysis.cluster.partitions import open_partitions
    from app.cli import main

    out = tmp_path / "parts"
    assert main(["partition", "demo", "--subject", "recipient_id", "--out", str(out),
                 "--parts", "5"]) == 0
    files = open_partitions(out)
    assert len(files) == 5
    assert open_partitions(str(out / "*.parquet")) == files
    assert open_partitions(f"file://{out}") == files
    # brute force: the partitions hold exactly the table's rows
    whole = read_table(DEMO_CSV)
    back = pd.concat([pd.read_parquet(f) for f in files], ignore_index=True)
    key = ["recipient_id", "visit_date"]
    pd.testing.assert_frame_equal(back.sort_values(key).reset_index(drop=True),
                                  whole.sort_values(key).reset_index(drop=True))
    assert main(["partition", "demo", "--subject", "recipient_id", "--out", str(out)]) == 2


def test_report_on_the_cluster(client, demo_parts):
    """The report's residual-semivariogram points (mean-model OLS residuals) equal the
    in-memory engine's (the reference), and the report carries the same effect statement."""
    from analysis.cluster.run import report_text

    roles, settings = demo_roles(), demo_settings()
    choices = ModelChoices(structures=("intercept",), gee=())
    ref = fit_models(prepare(read_table(DEMO_CSV), roles, settings), choices)
    cc = ClusterCohort(client, str(demo_parts), roles, settings)
    got = fit_cluster_models(cc, cc.cohort(settings), choices)
    a = _plain(json_safe(ref.residual_variogram(n_bins=10, max_lag=48.0).to_json()))
    b = _plain(json_safe(got.residual_variogram(n_bins=10, max_lag=48.0).to_json()))
    assert mismatches(a, b) == []
    html = report_text(str(demo_parts), roles, settings, choices,
                       scheduler=client.scheduler.address)
    import html as html_lib
    assert html_lib.escape(ref.effect.statement) in html or ref.effect.statement in html


def test_one_subjects_rows_on_demand(client, demo_parts):
    """A subject card's rows come from its partition; reference: the in-memory panel."""
    roles, settings = demo_roles(), demo_settings()
    cc = ClusterCohort(client, str(demo_parts), roles, settings)
    cohort = prepare(read_table(DEMO_CSV), roles, settings)
    frame = cohort.frame
    label = cohort.subject_ids[17]
    got = cc.subject_rows(label)
    want = frame[frame["subject"] == label]
    np.testing.assert_array_equal(got["time"].to_numpy(), want["time"].to_numpy())
    np.testing.assert_array_equal(got["response"].to_numpy(), want["response"].to_numpy())
    with pytest.raises(DataError, match="not in the analysed cohort"):
        cc.subject_rows("no such subject")
