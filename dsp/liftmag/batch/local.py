"""The local executor: worker processes on this machine, one take each at a time."""

from __future__ import annotations

import contextlib
import signal
import time
from collections.abc import Callable, Sequence
from typing import Any

from liftmag.batch.jobs import run_job
from liftmag.batch.plan import INTERRUPTED_STATUS, WORKER_STOP_GRACE_S, Job, TakeRecord

# ----------------------------------------------------------------------- executors

RecordSink = Callable[[TakeRecord], None]


def _worker_loop(conn) -> None:
    """Body of a local worker process: takes arrive on the pipe, records go back.

    ``None`` asks the worker to finish. A worker lives for the whole batch, so its caches
    stay warm, and the main process always knows which take each worker is on.
    """
    # terminate() sends SIGTERM; turning it into KeyboardInterrupt unwinds the writer,
    # which then removes its hidden temporary file.
    signal.signal(signal.SIGTERM, _raise_interrupt)
    try:
        while (job := conn.recv()) is not None:
            conn.send(run_job(job))
    except (KeyboardInterrupt, EOFError):
        raise SystemExit(INTERRUPTED_STATUS) from None
    finally:
        conn.close()


def _raise_interrupt(signum, frame) -> None:
    raise KeyboardInterrupt


def _mp_context():
    import multiprocessing as mp

    # forkserver: workers fork from a clean, pre-imported server (quick to start, and no
    # fork of a process that has threads); spawn where forkserver does not exist.
    if "forkserver" in mp.get_all_start_methods():
        ctx = mp.get_context("forkserver")
        ctx.set_forkserver_preload(["liftmag.batch"])
        return ctx
    return mp.get_context("spawn")


def _death_reason(exitcode: int | None) -> str:
    if exitcode == INTERRUPTED_STATUS:
        return "the worker process was interrupted (Ctrl-C); nothing was written"
    if exitcode is not None and exitcode < 0:
        try:
            how = f"killed by {signal.Signals(-exitcode).name}"
        except ValueError:
            how = f"killed by signal {-exitcode}"
    else:
        how = f"ended with status {exitcode}"
    return (
        f"the worker process was {how} before finishing (stopped by hand, or out of "
        "memory); nothing was written; run the batch again to retry"
    )


class _Worker:
    """A local worker process, its end of the pipe, and the take it is on (if any)."""

    def __init__(self, ctx) -> None:
        self.conn, child_end = ctx.Pipe(duplex=True)
        self.proc = ctx.Process(target=_worker_loop, args=(child_end,), daemon=True)
        self.proc.start()
        child_end.close()  # so our end reports EOF when the worker dies
        self.job: Job | None = None

    def give(self, job: Job) -> None:
        self.conn.send(job)
        self.job = job

    def receive(self) -> TakeRecord:
        """The record of the current take; a failure naming the signal if the worker died."""
        job, self.job = self.job, None
        assert job is not None
        try:
            record = self.conn.recv()
        except (EOFError, OSError):
            record = None
        if isinstance(record, TakeRecord):
            return record
        self.proc.join()
        return TakeRecord(
            job.label, "failed", job.inputs, job.output, reason=_death_reason(self.proc.exitcode)
        )

    @property
    def alive(self) -> bool:
        return self.proc.is_alive()


def run_local(jobs: Sequence[Job], n_workers: int, on_record: RecordSink) -> None:
    """Run jobs on up to ``n_workers`` local processes; a dead worker fails its take only.

    Each worker takes one job at a time, so a worker that dies (SIGKILL, out of memory)
    is charged with exactly the take it was on; it is replaced and the batch goes on.
    """
    from multiprocessing.connection import wait

    ctx = _mp_context()
    queue = list(reversed(jobs))
    workers = [_Worker(ctx) for _ in range(min(max(1, n_workers), len(jobs)))]
    try:
        for i in range(len(workers)):
            workers[i] = _feed(workers[i], queue, ctx)
        while busy := {w.conn: w for w in workers if w.job is not None}:
            for conn in wait(list(busy)):
                worker = busy[conn]
                on_record(worker.receive())
                if not worker.alive:
                    worker.conn.close()
                    workers.remove(worker)
                    if not queue:
                        continue
                    worker = _Worker(ctx)
                    workers.append(worker)
                workers[workers.index(worker)] = _feed(worker, queue, ctx)
        _finish(workers)
    except BaseException:
        _stop_workers([w.proc for w in workers])
        raise


def _feed(worker: _Worker, queue: list[Job], ctx) -> _Worker:
    """Give the next job to ``worker`` (or to a fresh one if it died while idle)."""
    if not queue:
        return worker
    try:
        worker.give(queue[-1])
    except (BrokenPipeError, ConnectionResetError):
        worker.proc.join()
        worker.conn.close()
        worker = _Worker(ctx)
        worker.give(queue[-1])
    queue.pop()
    return worker


def _finish(workers: Sequence[_Worker]) -> None:
    for worker in workers:
        with contextlib.suppress(OSError):
            worker.conn.send(None)
    _stop_workers([w.proc for w in workers], grace_s=WORKER_STOP_GRACE_S)


def _stop_workers(procs: Sequence[Any], grace_s: float = 0.0) -> None:
    """Stop our own workers: let them end (grace), ask (SIGTERM: they remove their
    temporary files), then insist (SIGKILL)."""
    deadline = time.monotonic() + grace_s
    for proc in procs:
        proc.join(max(0.0, deadline - time.monotonic()))
    for proc in procs:
        if proc.is_alive():
            proc.terminate()
    deadline = time.monotonic() + WORKER_STOP_GRACE_S
    for proc in procs:
        proc.join(max(0.0, deadline - time.monotonic()))
        if proc.is_alive():
            proc.kill()
            proc.join()
