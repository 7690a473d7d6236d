"""The page served from a Dask-backed cohort (serve DIR --engine dask) in headless Chromium:
the aggregated views and the courses (drawn subjects fetched from the workers) draw, no view
shows a note or a problem before a fit, and the followed subject's card shows that subject's
visits fetched from its worker.

Reference for the card: the subject's visit count in the in-memory cohort (Workbench).
"""
from __future__ import annotations

import pytest

pytest.importorskip("distributed", reason="the dask extra is installed by tests/run.sh")

from analysis.cluster.partitions import write_partitions  # noqa: E402
from analysis.cluster.workbench import ClusterWorkbench, cluster_dataset  # noqa: E402
from analysis.pipeline import Workbench  # noqa: E402
from analysis.preparation.demo import DEMO_CSV, demo_roles, demo_settings  # noqa: E402
from analysis.preparation.loading import Dataset, read_table  # noqa: E402
from app import ids  # noqa: E402

from conftest import serving  # noqa: E402

DRAWN = (ids.COURSE_GRAPH, ids.SPREAD_GRAPH, ids.PAIRS_GRAPH, ids.LINES_GRAPH, ids.RATE_STRATA_GRAPH,
         ids.FOLLOW_DROPOUT_GRAPH)
TIMEOUT = 90_000


@pytest.fixture(scope="module")
def dask_url(tmp_path_factory):
    from distributed import Client, LocalCluster

    from app.server import create_app

    out = tmp_path_factory.mktemp("demo_parts")
    write_partitions(read_table(DEMO_CSV), "recipient_id", out, n_parts=3)
    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                           dashboard_address=None)
    client = Client(cluster)
    try:
        wb = ClusterWorkbench(client, cluster_dataset(client, str(out), "recipient_id"),
                              Workbench())
        dash_app = create_app(dataset=wb.dataset, roles=demo_roles(),
                              settings=demo_settings(), workbench=wb)
        with serving(dash_app) as url:
            yield url
    finally:
        client.close()
        cluster.close()


def test_dask_page_draws_aggregates_and_fetches_a_subject(dask_url, page, artifacts):
    memory = Workbench().cohort(Dataset.from_frame(read_table(DEMO_CSV)), demo_roles(),
                                demo_settings())
    frame = memory.frame
    subject = str(frame["subject"].iloc[500])
    n_visits = int((frame["subject"].astype(str) == subject).sum())
    page.goto(dask_url + f"?focus={subject}")
    for gid in DRAWN:
        page.wait_for_function(
            "(gid) => { const el = document.querySelector('#' + gid + ' .js-plotly-plot');"
            " return el && el.data && el.data.length > 0; }", arg=gid, timeout=TIMEOUT)
    card = page.locator(f"#{ids.LINK_CARD}")
    card.get_by_text(f"Subject {subject}", exact=True).wait_for(timeout=TIMEOUT)
    card.get_by_text(f"{n_visits} visits", exact=True).wait_for(timeout=TIMEOUT)
    page.wait_for_function("() => !document.querySelector('[data-dash-is-loading=\"true\"]')",
                           timeout=TIMEOUT)
    text = page.content()
    assert "Traceback" not in text and "Unexpected problem" not in text
    # the summary strip's cohort line (reference: the in-memory cohort's count)
    page.locator(".cl-sum-line").get_by_text(f"{memory.panel.n_subjects:,}", exact=False) \
        .first.wait_for(timeout=TIMEOUT)
    notes = page.evaluate("""() => Array.from(document.querySelectorAll('.js-plotly-plot'))
        .filter(el => el.layout && el.layout.annotations && el.layout.annotations.length
                && el.layout.annotations[0].text.includes('Dask workers'))
        .map(el => el.closest('[id]').id)""")
    assert notes == [], notes          # before a fit every view draws from the cluster
    page.screenshot(path=str(artifacts / "dask-page.png"), full_page=False)
    page.locator(f"#{ids.COURSE_GRAPH}").screenshot(path=str(artifacts / "dask-page-courses.png"))
    card.screenshot(path=str(artifacts / "dask-page-card.png"))
