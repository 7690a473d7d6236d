"""The command line's entry points of the cluster engine (``--engine dask``)."""
from __future__ import annotations

from contextlib import contextmanager

from analysis.cluster.partitions import is_partitioned
from analysis.errors import DataError, clip
from analysis.jsonsafe import json_safe


def _check_source(data) -> None:
    if not is_partitioned(data):
        raise DataError(f"{clip(data)}: --engine dask reads a partitioned Parquet dataset (a "
                        "folder, a glob pattern or an fsspec address); write one with "
                        "'cohortlens partition DATA --subject COL --out DIR'")


@contextmanager
def cluster_cohort(data, roles, settings, scheduler=None, **local):
    """A :class:`~analysis.cluster.engine.ClusterCohort` on a client that is closed after use
    (a LocalCluster started here is shut down with it)."""
    from analysis.cluster.engine import ClusterCohort, open_client

    _check_source(data)
    client = open_client(scheduler, **local)
    try:
        yield ClusterCohort(client, data, roles, settings)
    finally:
        cluster = client.cluster if not scheduler else None
        client.close()
        if cluster is not None:
            cluster.close()


@contextmanager
def page_workbench(data, roles, scheduler=None, *, memory, max_bytes=None, **local):
    """The page's :class:`~analysis.cluster.workbench.ClusterWorkbench` for ``data`` on a
    client closed after use; ``memory`` (a Workbench) analyses uploads in this process;
    ``max_bytes`` bounds the cluster results cached on the client."""
    from analysis.cluster.engine import open_client
    from analysis.cluster.workbench import ClusterWorkbench, cluster_dataset

    _check_source(data)
    client = open_client(scheduler, **local)
    try:
        dataset = cluster_dataset(client, data, roles.subject if roles is not None else None)
        yield ClusterWorkbench(client, dataset, memory, max_bytes=max_bytes)
    finally:
        cluster = client.cluster if not scheduler else None
        client.close()
        if cluster is not None:
            cluster.close()


def summarize_payload(data, roles, settings, scheduler=None, **local) -> dict:
    """The ``summarize`` JSON computed on a Dask cluster."""
    with cluster_cohort(data, roles, settings, scheduler, **local) as cc:
        return cc.explore(settings).to_json()


def fit_payload(data, roles, settings, choices, scheduler=None, **local) -> dict:
    """The ``fit`` JSON computed on a Dask cluster."""
    from analysis.cluster.models import fit_cluster_models

    with cluster_cohort(data, roles, settings, scheduler, **local) as cc:
        result = fit_cluster_models(cc, cc.cohort(settings), choices)
        return json_safe({"settings": settings.to_dict(), "roles": roles.to_dict(),
                          **result.to_json()})


def report_text(data, roles, settings, choices, scheduler=None, *, figures=None, **local) -> str:
    """The ``report`` HTML computed on a Dask cluster (exploration, and the models unless
    ``choices`` is None); the data key is a hash of the partition files' names. ``figures``
    (exploration, models) → the report's figures (the caller's drawing code; analysis/ draws
    nothing itself); none when omitted."""
    import hashlib

    from analysis.cluster.models import fit_cluster_models
    from analysis.output.report import build_report

    with cluster_cohort(data, roles, settings, scheduler, **local) as cc:
        exploration = cc.explore(settings)
        models = (fit_cluster_models(cc, exploration.cohort, choices)
                  if choices is not None else None)
        key = hashlib.sha1(repr(cc.files).encode()).hexdigest()[:20]
        drawn = figures(exploration, models) if figures is not None else None
        return build_report(exploration.cohort, exploration, models, data_name=str(data),
                            data_key=key, choices=choices, figures=drawn)
