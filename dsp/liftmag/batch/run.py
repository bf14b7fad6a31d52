"""Running a batch: log, options, and run_batch, which ties planning, jobs and executors."""

from __future__ import annotations

import json
import os
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from liftmag import __version__
from liftmag.batch.cluster import run_on_cluster
from liftmag.batch.jobs import one_line
from liftmag.batch.local import RecordSink, run_local
from liftmag.batch.plan import LOG_NAME, BatchOutcome, Job, TakeRecord
from liftmag.batch.records import batch_lock, job_targets, sweep_partials

# ------------------------------------------------------------------------ the batch


class BatchLog:
    """JSON lines appended beside the outputs: a start line, one per take, an end line."""

    def __init__(self, path: Path) -> None:
        self.path = path

    def write(self, event: str, **data: Any) -> None:
        line = {"event": event, "time": time.strftime("%Y-%m-%dT%H:%M:%S%z"), **data}
        with open(self.path, "a", encoding="utf-8") as fh:
            fh.write(json.dumps(line, default=str) + "\n")


@dataclass(frozen=True)
class BatchOptions:
    out_dir: Path
    n_workers: int = 1
    cluster: str | None = None
    redo: bool = False
    subtype: str | None = None


def run_batch(
    jobs: Sequence[Job],
    refused: Sequence[TakeRecord],
    options: BatchOptions,
    on_record: RecordSink = lambda record: None,
    log_header: dict[str, Any] | None = None,
    on_note: Callable[[str], None] = lambda text: None,
) -> BatchOutcome:
    """Run the jobs, log every outcome, and return the outcome.

    On interruption (``KeyboardInterrupt``: Ctrl-C, or SIGTERM/SIGHUP where the caller
    turns them into it, as ``liftmag batch`` does) the workers are stopped, every temporary
    file of this batch's outputs is removed, and the outcome so far comes back marked
    ``interrupted``; takes not reached count as not run.
    """
    started = time.perf_counter()
    out_dir = options.out_dir
    out_dir.mkdir(parents=True, exist_ok=True)
    log = BatchLog(out_dir / LOG_NAME)
    records: list[TakeRecord] = []
    outputs = job_targets(jobs)

    def take_done(record: TakeRecord) -> None:
        records.append(record)
        log.write("take", **record.to_dict())
        on_record(record)

    def note(text: str) -> None:
        log.write("note", text=text)
        on_note(text)

    with batch_lock(out_dir):
        sweep_partials(outputs)  # left by a run whose workers were killed
        log.write(
            "start", liftmag=__version__, takes=len(jobs) + len(refused),
            executor=f"dask {options.cluster}" if options.cluster else
            f"{options.n_workers} local worker(s)", **(log_header or {}),
        )
        for record in refused:
            take_done(record)
        interrupted = False
        try:
            if options.cluster:
                run_on_cluster(jobs, options.cluster, take_done, note)
            elif jobs:
                run_local(jobs, options.n_workers, take_done)
        except KeyboardInterrupt:
            interrupted = True
        except BaseException as exc:
            log.write("end", error=one_line(exc), done_so_far=len(records))
            raise
        finally:
            sweep_partials(outputs)
        outcome = BatchOutcome(
            tuple(records), len(jobs) + len(refused), time.perf_counter() - started,
            interrupted,
        )
        log.write("end", **outcome.to_dict())
    return outcome


def default_workers() -> int:
    """Cores this process may use."""
    if hasattr(os, "sched_getaffinity"):
        return max(1, len(os.sched_getaffinity(0)))
    return max(1, os.cpu_count() or 1)


def describe(record: TakeRecord) -> str:
    """One status line for a take, for the terminal."""
    if record.status == "done":
        return f"done     {record.label} ({record.duration_s:.1f} s in {record.elapsed_s:.1f} s)"
    if record.status == "skipped":
        return f"skipped  {record.label} (up to date)"
    return f"FAILED   {record.label}: {record.reason}"
