"""The page on a Dask-backed cohort (serve DIR --engine dask), on a real 2-worker cluster.

Reference throughout: the in-memory page (create_app on the whole table, the ordinary
Workbench) is the reference implementation; every stage result the page's views draw from must
be the same when computed by the cluster engine. The estimators themselves are checked against
statsmodels, scipy and brute force in the other test files.
"""
from __future__ import annotations

import base64
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("distributed", reason="the dask extra is installed by tests/run.sh")

from analysis.cluster.partitions import write_partitions  # noqa: E402
from analysis.cluster.workbench import ClusterWorkbench, cluster_dataset  # noqa: E402
from analysis.errors import NotOnCluster, SettingsError  # noqa: E402
from analysis.jsonsafe import json_safe  # noqa: E402
from analysis.models.modelstage import ModelChoices  # noqa: E402
from analysis.output.overview import cohort_overview  # noqa: E402
from analysis.pipeline import Workbench  # noqa: E402
from analysis.preparation.demo import DEMO_CSV, demo_roles, demo_settings  # noqa: E402
from analysis.preparation.loading import Dataset, read_table  # noqa: E402
from app.server import create_app  # noqa: E402
from app.views import finish, stage_call  # noqa: E402
from test_dask_engine import _plain, mismatches  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def client():
    """One 2-worker cluster of processes for the whole module."""
    from distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                           dashboard_address=None)
    c = Client(cluster)
    yield c
    c.close()
    cluster.close()


@pytest.fixture(scope="module")
def pages(client, tmp_path_factory):
    """(the Dask-served page's context, its stores) and (the in-memory page's, its stores)."""
    out = tmp_path_factory.mktemp("demo_parts")
    write_partitions(read_table(DEMO_CSV), "recipient_id", out, n_parts=3)
    roles, settings = demo_roles(), demo_settings()
    wb = ClusterWorkbench(client, cluster_dataset(client, str(out), roles.subject), Workbench())
    dask_app = create_app(dataset=wb.dataset, roles=roles, settings=settings, workbench=wb)
    memory = Dataset.from_frame(read_table(DEMO_CSV), name="demo")
    memory_app = create_app(dataset=memory, roles=roles, settings=settings)

    def stores(dataset, **changes):
        return ({"key": dataset.key}, {"roles": roles.to_dict()},
                {**settings.to_dict(), **changes})

    return (dask_app._cohortlens, wb, stores), (memory_app._cohortlens, memory, stores)


def _decoded(tree):
    """Plotly's typed arrays ({"dtype", "bdata"}) as plain lists, everywhere in a tree."""
    if isinstance(tree, dict) and "bdata" in tree and "dtype" in tree:
        return np.frombuffer(base64.b64decode(tree["bdata"]), dtype=tree["dtype"]).tolist()
    if isinstance(tree, dict):
        return {k: _decoded(v) for k, v in tree.items()}
    if isinstance(tree, list):
        return [_decoded(v) for v in tree]
    return tree


def _figure_values(fig) -> dict:
    """A figure as plain JSON with every number as a number (for :func:`mismatches`)."""
    return _decoded(json.loads(json.dumps(fig.to_plotly_json(), default=lambda a: a.tolist())))


def _both(pages, name, **changes):
    (ctx, wb, stores), (mctx, memory, _) = pages
    return (stage_call(ctx, name, *stores(wb.dataset, **changes)),
            stage_call(mctx, name, *stores(memory, **changes)))


@pytest.mark.parametrize("changes", [{}, {"variogram_bins": 7, "detrend": "linear",
                                          "strata_method": "equal-width"}],
                         ids=["demo", "bins-linear-equal-width"])
def test_stage_results_equal_the_in_memory_page(pages, changes):
    """Every stage the page's views draw from, to 1e-8 relative (counts and cut points
    exactly); reference: the in-memory page's Workbench on the whole table."""
    got, ref = _both(pages, "cohort", **changes)
    assert got.attrition.to_json() == ref.attrition.to_json()
    assert got.strata.to_frame().equals(ref.strata.to_frame())
    assert (got.panel.n_subjects, got.panel.n_obs) == (ref.panel.n_subjects, ref.panel.n_obs)
    np.testing.assert_array_equal(got.strata.codes, ref.strata.codes)
    # the summary strip's cohort line (follow-up from each subject's last visit)
    assert mismatches(_plain(cohort_overview(ref).to_json()),
                      _plain(cohort_overview(got).to_json())) == []
    got, ref = _both(pages, "subject_lines", **changes)
    assert len(ref) > 500                     # one row per subject: the whole cohort compared
    assert mismatches(_plain(json_safe(ref.to_dict(orient="records"))),
                      _plain(json_safe(got.to_dict(orient="records")))) == []
    for name in ("variogram", "lag_correlation"):
        got, ref = _both(pages, name, **changes)
        assert mismatches(_plain(json_safe(ref.to_json())),
                          _plain(json_safe(got.to_json()))) == [], name
    got, ref = _both(pages, "summaries", **changes)
    for part in ("stratum_table", "slope_smooth"):
        assert mismatches(_plain(json_safe(getattr(ref, part).to_dict(orient="records"))),
                          _plain(json_safe(getattr(got, part).to_dict(orient="records")))) == []
    assert mismatches(_plain(json_safe(ref.dropout.to_json())),
                      _plain(json_safe(got.dropout.to_json()))) == []


def test_models_equal_the_in_memory_page(pages):
    """The Fit button's model set; reference: the in-memory page's fit of the same choices.
    Variance-parameter interval ends come from a finite-difference Hessian (step 1e-5) of the
    gradient, which amplifies the rounding of another summation order: 1e-7 for those (as in
    test_dask_engine.py), 1e-8 for every other value."""
    (ctx, wb, stores), (mctx, memory, _) = pages
    choices = ModelChoices(structures=("intercept", "intercept+slope"), gee=())
    got = ctx.workbench.models(*ctx.inputs(*stores(wb.dataset)), choices)
    ref = mctx.workbench.models(*mctx.inputs(*stores(memory)), choices)
    bad = mismatches(_plain(json_safe(ref.to_json())), _plain(json_safe(got.to_json())))
    hessian = [b for b in bad if ".variance." in b[0] and b[0].endswith((".lo", ".hi"))]
    assert [b for b in bad if b not in hessian] == []
    assert mismatches([b[1] for b in hessian], [b[2] for b in hessian], rel=1e-7) == []


def test_subject_card_fetches_the_rows_on_demand(pages):
    """The subject card's visits come from the worker holding the subject; reference: the
    in-memory page's cohort frame for the same subject."""
    from app.sections.selection import _card

    (ctx, wb, stores), (mctx, memory, _) = pages
    ref = stage_call(mctx, "cohort", *stores(memory)).frame
    subject = str(ref["subject"].iloc[1234])
    want = ref[ref["subject"].astype(str) == subject]
    got = ctx.workbench.subject_visits(*ctx.inputs(*stores(wb.dataset)), subject)
    np.testing.assert_array_equal(got["time"].to_numpy(), want["time"].to_numpy())
    np.testing.assert_array_equal(got["response"].to_numpy(), want["response"].to_numpy())
    card = str(_card(ctx, *stores(wb.dataset), subject))
    assert f"{len(want)} visits" in card and f"Subject {subject}" in card
    assert str(_card(mctx, *stores(memory), subject)) == card     # the same card as in memory


@pytest.mark.parametrize("subject,stratum", [(None, None), ("R00017", None)])
def test_courses_equal_the_in_memory_page(pages, subject, stratum):
    """The courses view: the same drawn subjects with their visits fetched from the workers,
    and the group means summed on the workers; reference: the in-memory page's figure
    (group_means over every visit, the panel's rows), every number to 1e-8 relative."""
    from app.sections.courses import draw_courses

    (ctx, wb, stores), (mctx, memory, _) = pages
    got_fig, got_note = draw_courses(ctx, *stores(wb.dataset), subject, stratum, 12, 3)
    ref_fig, ref_note = draw_courses(mctx, *stores(memory), subject, stratum, 12, 3)
    assert got_note == ref_note
    got, ref = _figure_values(got_fig), _figure_values(ref_fig)
    assert sum(len(t.get("x") or []) for t in ref["data"]) > 100   # lines and means drawn
    assert mismatches(ref, got) == []


def test_views_that_read_every_visit_say_so(pages):
    """The model checks and the plan read every visit: a note, no traceback; a lowess trend
    is refused by the residual views only."""
    from app.sections.checks import _models

    (ctx, wb, stores), _ = pages
    data, roles, settings = stores(wb.dataset)
    cohort = stage_call(ctx, "cohort", data, roles, settings)
    with pytest.raises(NotOnCluster, match="stay on the Dask workers"):
        cohort.frame                                   # noqa: B018 - every visit
    fig, note, message, _ = finish(lambda: cohort.frame, "drawing", "k", ("fig", "text"))
    shown = fig.to_plotly_json()["layout"]["annotations"][0]["text"].replace("<br>", " ")
    assert "stay on the Dask workers" in shown and message == ""
    with pytest.raises(NotOnCluster, match="model checks"):
        _models(ctx, {"data": data, "roles": roles, "settings": settings,
                      "choices": ModelChoices().to_dict()})
    lowess = stores(wb.dataset, detrend="lowess")
    with pytest.raises(SettingsError, match="cannot be combined from partitions"):
        stage_call(ctx, "variogram", *lowess)
    # the summaries read no detrending: drawn all the same (reference: the default's)
    assert stage_call(ctx, "summaries", *lowess).stratum_table.equals(
        stage_call(ctx, "summaries", data, roles, settings).stratum_table)


def test_an_upload_on_the_dask_page_stays_in_memory(pages):
    """Another table on the same page goes to the in-memory Workbench; reference: the same
    table's cohort computed by a fresh in-memory Workbench."""
    (ctx, wb, stores), _ = pages
    frame = read_table(DEMO_CSV)
    upload = ctx.datasets.add(frame.head(3000), name="upload.csv")
    before = wb.memory.compute_counts["cohort"]
    got = stage_call(ctx, "cohort", *stores(upload))
    assert wb.memory.compute_counts["cohort"] == before + 1
    ref = Workbench().cohort(Dataset.from_frame(frame.head(3000)), demo_roles(), demo_settings())
    assert got.attrition.to_json() == ref.attrition.to_json()


def test_serve_engine_dask_refuses_a_single_file_and_the_default_page_skips_dask(tmp_path):
    from app.cli import build_parser, main

    args = build_parser().parse_args(["serve", "cohort/", "--engine", "dask",
                                      "--scheduler", "tcp://10.0.0.5:8786"])
    assert (args.engine, args.scheduler) == ("dask", "tcp://10.0.0.5:8786")
    assert main(["serve", "demo", "--engine", "dask"]) == 2     # a CSV is not partitioned
    code = ("import sys, app.server\n"
            "app.server.create_app()\n"
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')"
            " or m.startswith('analysis.cluster')))\n")
    proc = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                          text=True, timeout=120,
                          env={**__import__("os").environ, "PYTHONPATH": str(ROOT)})
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert proc.stdout.strip() == "[]"


def test_the_data_section_counts_the_whole_dataset(client, pages):
    """Rows and subjects of every partition (the page's frame is a sample of the first);
    reference: pandas on the whole table."""
    (ctx, wb, stores), _ = pages
    frame = read_table(DEMO_CSV)
    assert len(wb.dataset.frame) < len(frame)
    assert (wb.dataset.n_rows, wb.dataset.n_subjects) == (len(frame),
                                                          frame["recipient_id"].nunique())
    bare = cluster_dataset(client, wb.dataset.source, None)     # roles not chosen yet
    assert (bare.n_rows, bare.n_subjects, bare.key) == (len(frame), 0, wb.dataset.key)


def test_the_fit_button_report_and_summary_strip_on_the_cluster(pages):
    """What the page shows after Fit: the fitted-semivariogram figure equal to the in-memory
    page's (reference) to 1e-8, the GEE rows' absence said in the notes, the effect in the
    summary strip and the report written from the page; confounders refused with a message."""
    import html as html_lib

    from analysis.errors import CohortError
    from app.sections.models import fit_outputs, report_text
    from app.sections.summary import strip_children

    (ctx, wb, stores), (mctx, memory, _) = pages
    got = fit_outputs(ctx, *stores(wb.dataset), ["intercept"], None, None, [], None)
    ref = fit_outputs(mctx, *stores(memory), ["intercept"], None, None, [], None)
    fig_got, fig_ref = _figure_values(got["fig"]), _figure_values(ref["fig"])
    assert len(fig_ref["data"]) >= 2 and mismatches(fig_ref, fig_got) == []
    assert "GEE rows are not computed" in str(got["summary"])
    # the summary strip with the effect: as the in-memory page shows it (reference)
    strip = str(strip_children(ctx, *stores(wb.dataset), got["snapshot"]))
    assert strip == str(strip_children(mctx, *stores(memory), ref["snapshot"]))
    effect = wb.models(*ctx.inputs(*stores(wb.dataset)),
                       ModelChoices.from_dict(got["snapshot"]["choices"])).effect
    assert "Preferred" in strip and "refit under Models" not in strip
    name, text = report_text(ctx, *stores(wb.dataset), got["snapshot"])
    assert name.endswith(".html")
    assert html_lib.escape(effect.statement) in text or effect.statement in text
    with pytest.raises(CohortError, match="not available yet"):
        fit_outputs(ctx, *stores(wb.dataset), ["intercept"], None, None, ["centre"], None)
