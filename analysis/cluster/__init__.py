"""Cohorts larger than one machine: the same estimators, run over subject-hash Parquet
partitions on a Dask cluster.

Nothing here is imported by the single-machine path: ``dask`` and ``distributed`` are an
optional extra (``pip install -e .[dask]``) and are imported only inside the functions of
:mod:`analysis.cluster.engine` that need them.

Layout of the work:

* :mod:`analysis.cluster.partitions` -- writing a table into subject-hash partitions and
  opening a partitioned Parquet dataset (a folder, a glob or an fsspec address), with the check
  that no subject straddles two partitions.
* :mod:`analysis.cluster.tasks` -- what runs on a worker for one partition: preparation and
  inclusion rules, and each estimator's partial sums (pure functions of one partition).
* :mod:`analysis.cluster.engine` -- the client side: opening a cluster, persisting the prepared
  partitions on the workers, combining the partial sums with the estimators' own finishing
  functions, and the mixed-model likelihood as one map-reduce per evaluation.
"""
