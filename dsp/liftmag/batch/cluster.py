"""The cluster executor: the same jobs on an existing Dask cluster."""

from __future__ import annotations

import os
import secrets
from collections.abc import Callable, Sequence

from liftmag.batch.jobs import one_line, run_job
from liftmag.batch.local import RecordSink
from liftmag.batch.plan import BatchError, Job, TakeRecord

# ------------------------------------------------------------------------ cluster


def run_on_cluster(
    jobs: Sequence[Job],
    address: str,
    on_record: RecordSink,
    on_note: Callable[[str], None] = lambda text: None,
) -> None:
    """Send each job to an existing Dask distributed scheduler and gather the records.

    Workers must see the inputs and the output folder at the same absolute paths (shared
    storage) and must have liftmag installed. Dask chooses the worker; a worker that dies
    has its task re-run elsewhere by the scheduler, and the temporary file it left is
    removed by :func:`sweep_partials` when the batch ends.
    """
    try:
        from distributed import Client, as_completed
    except ImportError as exc:
        raise BatchError(
            "--cluster needs Dask distributed: pip install 'liftmag[cluster]'"
        ) from exc
    try:
        client = Client(address, timeout="20s", set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise BatchError(f"cannot reach a Dask scheduler at {address}: {one_line(exc)}") from exc
    run_id = secrets.token_hex(4)
    with client:
        _check_worker_allocator(client, on_note)
        futures = {
            client.submit(run_job, job, key=f"liftmag-take-{run_id}-{i}", pure=False): job
            for i, job in enumerate(jobs)
        }
        try:
            for future in as_completed(list(futures), loop=client.loop):
                job = futures[future]
                try:
                    record = future.result()
                except Exception as exc:  # worker lost too often, cancelled, comm error
                    record = TakeRecord(
                        job.label, "failed", job.inputs, job.output,
                        reason=f"on the cluster: {type(exc).__name__}: {one_line(exc)}",
                    )
                on_record(record)
        except BaseException:
            # Tasks already running finish on their own (Dask cannot stop them); their
            # outputs are complete and recorded, so the next run skips them.
            client.cancel(list(futures))
            raise


def _trim_threshold() -> str | None:
    return os.environ.get("MALLOC_TRIM_THRESHOLD_")


def _check_worker_allocator(client, on_note: Callable[[str], None]) -> None:
    """Warn when workers run with a fixed glibc trim threshold (Dask's nanny default).

    A fixed threshold turns off glibc's adaptive thresholds, so each large temporary array
    is mapped and unmapped afresh; bench_batch.py measured takes running about twice as
    slowly that way.
    """
    try:
        values = set(client.run(_trim_threshold).values())
    except Exception:  # a worker that cannot answer is not a reason to stop the batch
        return
    set_values = sorted(v for v in values if v is not None)
    if set_values:
        on_note(
            f"the Dask workers run with MALLOC_TRIM_THRESHOLD_={', '.join(set_values)} (the "
            "nanny's default), which makes liftmag about half as fast; start them with "
            "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_ set to null in "
            "their Dask config, or with --no-nanny"
        )
