"""Batch processing: many takes, planned, hashed, run in parallel, resumable.

A batch is planned first (pure functions: selection, stem grouping, manifests, output
names, clashes), then each planned take becomes a :class:`Job` with its full settings and
noise model, and the jobs run either on local worker processes or on an existing Dask
cluster. The worker entry point, :func:`run_job`, is the same on both: it checks the
inputs, hashes them, skips the take if its output is up to date, and otherwise calls
:func:`liftmag.fileproc.process_file` (which writes atomically) and leaves a small record
in the batch's own folder (``<out>/.liftmag-batch/records/``, mirroring the outputs) so
that the next run knows what made it. Delivery folders hold the outputs only.

The parts live in submodules: ``plan`` (data, selection, grouping, clash checks),
``manifest``, ``records`` (resume keys, records, partial files, lock), ``jobs`` (noise
models and the worker entry point), ``local`` and ``cluster`` (executors) and ``run``
(:func:`run_batch`). Everything callers use is importable from ``liftmag.batch``.

Why a record per output rather than only the log: a worker that finishes after its batch
was interrupted (a Dask task cannot be stopped half-way) still leaves a true account of
its output, and the log may be deleted without losing resume.
"""

from __future__ import annotations

from liftmag.batch.cluster import (
    run_on_cluster,
)
from liftmag.batch.jobs import (
    NoiseResolver,
    build_jobs,
    one_line,
    run_job,
    take_track_options,
)
from liftmag.batch.local import (
    RecordSink,
    run_local,
)
from liftmag.batch.manifest import (
    escapes,
    manifest_columns,
    parse_setting,
    read_manifest,
)
from liftmag.batch.plan import (
    AUDIO_SUFFIXES,
    HASH_CHUNK_BYTES,
    INTERRUPTED_STATUS,
    LOCK_NAME,
    LOG_NAME,
    MANIFEST_HIDDEN_SETTINGS,
    MANIFEST_PATH_COLUMNS,
    MANIFEST_REQUIRED,
    MANIFEST_TAKE_COLUMNS,
    RECORD_FORMAT,
    RECORD_SUFFIX,
    RECORD_VERSION,
    RECORDS_DIR_NAME,
    STATE_DIR_NAME,
    STEM_SEPARATORS,
    WORKER_STOP_GRACE_S,
    BatchError,
    BatchOutcome,
    Job,
    NoiseRef,
    NoiseSource,
    Selection,
    TakeFiles,
    TakePlan,
    TakeRecord,
    check_outputs,
    compile_group_pattern,
    expand_selection,
    group_takes,
    has_glob_magic,
    plan_from_selection,
    take_settings,
)
from liftmag.batch.records import (
    batch_lock,
    is_up_to_date,
    job_targets,
    partial_files,
    read_record,
    record_path,
    sha256_file,
    sweep_partials,
    take_key,
)
from liftmag.batch.run import (
    BatchLog,
    BatchOptions,
    default_workers,
    describe,
    run_batch,
)

__all__ = [
    "AUDIO_SUFFIXES",
    "HASH_CHUNK_BYTES",
    "INTERRUPTED_STATUS",
    "LOCK_NAME",
    "LOG_NAME",
    "MANIFEST_HIDDEN_SETTINGS",
    "MANIFEST_PATH_COLUMNS",
    "MANIFEST_REQUIRED",
    "MANIFEST_TAKE_COLUMNS",
    "RECORDS_DIR_NAME",
    "RECORD_FORMAT",
    "RECORD_SUFFIX",
    "RECORD_VERSION",
    "STATE_DIR_NAME",
    "STEM_SEPARATORS",
    "WORKER_STOP_GRACE_S",
    "BatchError",
    "BatchLog",
    "BatchOptions",
    "BatchOutcome",
    "Job",
    "NoiseRef",
    "NoiseResolver",
    "NoiseSource",
    "RecordSink",
    "Selection",
    "TakeFiles",
    "TakePlan",
    "TakeRecord",
    "batch_lock",
    "build_jobs",
    "check_outputs",
    "compile_group_pattern",
    "default_workers",
    "describe",
    "escapes",
    "expand_selection",
    "group_takes",
    "has_glob_magic",
    "is_up_to_date",
    "job_targets",
    "manifest_columns",
    "one_line",
    "parse_setting",
    "partial_files",
    "plan_from_selection",
    "read_manifest",
    "read_record",
    "record_path",
    "run_batch",
    "run_job",
    "run_local",
    "run_on_cluster",
    "sha256_file",
    "sweep_partials",
    "take_key",
    "take_settings",
    "take_track_options",
]
