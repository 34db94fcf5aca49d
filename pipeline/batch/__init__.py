"""Batch processing of a whole study on Dask.

In: a folder of mask files or a sample sheet CSV (``sample_id, path, group``
and optionally ``spacing_z, spacing_y, spacing_x``, ``root``), a config.
Out: one result folder per sample under ``OUTDIR/<sample_id>/`` (exactly as
:func:`pipeline.analysis.analyze_file` writes it) and the study tables:

- ``failures.csv``: ``sample_id, path, step, error`` of every failed sample;
- ``cohort_summary.csv``: one row per analysed sample, its group and every
  summary measure (reviewed where a ``review.csv`` exists);
- ``cohort_segments.parquet``, ``cohort_bifurcations.parquet``: every
  sample's rows with ``sample_id`` and ``group`` columns;
- ``group_comparison.csv``: per science measure (:data:`SCIENCE_MEASURES`:
  densities per mm³ of imaged tissue, never raw counts; the network Murray
  exponent, radius, tortuosity, flow and shear by diameter class, tissue
  distances) and pair of groups: n, mean, sd, median, the Hodges-Lehmann
  shift with its distribution-free interval, Cliff's delta, a Mann-Whitney
  U test and its Benjamini-Hochberg q-value across the pair's measures;
  tests with fewer than three samples in a group are skipped with the
  reason (:func:`group_comparison`);
- ``group_bookkeeping.csv``: every other numeric summary column (counts,
  residuals, sizes) per group, n, mean, sd, median, no tests;
- ``batch.json``: version, input, config, state and per-sample status. The
  state ends as ``complete``, ``complete with failures``, ``interrupted``
  (Ctrl-C), ``cluster lost`` (the scheduler went away, or no worker was left
  for ``worker_timeout`` seconds) or ``failed`` (the study tables could not
  be written); finished samples are kept in every case and a rerun resumes.

One batch at a time writes into a folder: a lock file
(``.vesselflow-batch.lock``, an advisory ``flock`` that the system releases
when its process dies) refuses a second batch at once and names the running
one; a lock left by a process that is gone is taken over with a notice.

Samples run as Dask tasks: on an embedded local cluster (one single-threaded
worker process per core, each with a memory limit) or on an existing cluster
given by its scheduler address. A sample whose complete result matches its
input checksum and effective settings is skipped, so an interrupted batch
resumes where it stopped; result folders are written atomically and checked
against the sizes and checksums in their ``run.json``, so an interrupted or
damaged sample is redone, never counted.

Layout (each module's docstring says what comes in and what goes out):
``samples`` (the sheet or folder) -> ``stats`` (rank statistics) ->
``study`` (the study tables and the group comparison) -> ``engine``
(Dask, the lock, progress, failures; :func:`run_batch`).
"""

from .samples import OPTIONAL_COLUMNS, SHEET_COLUMNS, Sample, collect_samples, find_samples, read_sample_sheet
from .stats import cliffs_delta, hodges_lehmann, hodges_lehmann_one_sample
from .study import (
    BOOKKEEPING_COLUMNS, COMPARISON_COLUMNS, FALLBACK_MEASURES, MIN_TEST_SAMPLES, SCIENCE_MEASURES, StudyMeasure,
    add_densities, bookkeeping_measures, cohort_tables, group_bookkeeping, group_comparison, science_measures,
)
from ..result import STEPS
from .engine import BatchResult, FAILURE_COLUMNS, FINAL_STATES, LOCK_FILE, STUDY_FILES, process_sample, run_batch

__all__ = [
    "Sample",
    "read_sample_sheet",
    "find_samples",
    "collect_samples",
    "run_batch",
    "BatchResult",
    "cohort_tables",
    "group_comparison",
    "group_bookkeeping",
    "add_densities",
    "hodges_lehmann",
    "hodges_lehmann_one_sample",
    "cliffs_delta",
    "science_measures",
    "bookkeeping_measures",
    "StudyMeasure",
    "SCIENCE_MEASURES",
    "FALLBACK_MEASURES",
    "SHEET_COLUMNS",
    "STUDY_FILES",
    "LOCK_FILE",
    "FINAL_STATES",
    "FAILURE_COLUMNS",
    "STEPS",
    "process_sample",
    "MIN_TEST_SAMPLES",
    "COMPARISON_COLUMNS",
    "BOOKKEEPING_COLUMNS",
    "OPTIONAL_COLUMNS",
]
