"""Batch throughput: minutes of audio cleaned per second of wall time, and Dask's overhead.

Twenty 30 s stereo takes (16 kHz PCM_16, cut from demo scenes) go through the real command,
``liftmag batch``, run as a child process and timed from start to exit, so interpreter and
worker start-up count as a user would feel them:

* local workers: ``--jobs 1`` and ``--jobs 2``;
* ``--cluster`` on a Dask ``LocalCluster`` with 2 single-threaded worker processes on
  loopback (cluster start-up is not counted; a real cluster is already running), once
  with Dask's default worker environment and once with MALLOC_TRIM_THRESHOLD_ unset;
* the re-run that finds every take up to date (hashing and records only);
* a control: the speed-up 2 processes get on a plain CPU loop, to read the rest against.

BLAS threads are pinned to 1 so that "workers" means cores. The machine may be shared:
read the figures as indications, and compare rows taken in the same run.

    .venv/bin/python benchmarks/bench_batch.py [--takes 20] [--seconds 30] [--keep DIR]
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import json  # noqa: E402
import shutil  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import soundfile as sf  # noqa: E402

from liftmag.scenes import demo_scene  # noqa: E402


def make_takes(folder: Path, n_takes: int, seconds: float) -> float:
    """Write ``n_takes`` stereo takes; returns the total duration in seconds."""
    scenes = [demo_scene(seed=s) for s in range(3)]
    fs = scenes[0].fs_hz
    n = round(seconds * fs)
    for i in range(n_takes):
        mix = scenes[i % len(scenes)].mixture
        reps = -(-n // mix.shape[1]) + 1
        long = np.tile(mix, (1, reps))
        start = (i * 7919) % mix.shape[1]  # a different cut per take
        peak = np.abs(long).max()
        sf.write(folder / f"take{i:02d}.wav", (0.9 / peak) * long[:, start : start + n].T, fs,
                 subtype="PCM_16")
    return n_takes * n / fs


def _spin(n: int) -> float:
    t0 = time.perf_counter()
    total = 0
    for i in range(n):
        total += i * i
    return time.perf_counter() - t0


def parallel_control(loops: int = 4_000_000, tasks: int = 4) -> float:
    """Speed-up that 2 processes get over 1 on a plain CPU loop, on this machine, now.

    On a shared machine this says how much of the second core was free, so the batch
    figures can be read against it.
    """
    from concurrent.futures import ProcessPoolExecutor

    walls = []
    for workers in (1, 2):
        with ProcessPoolExecutor(workers) as pool:
            list(pool.map(_spin, [1000] * workers))  # start the processes first
            t0 = time.perf_counter()
            list(pool.map(_spin, [loops] * tasks))
            walls.append(time.perf_counter() - t0)
    return walls[0] / walls[1]


def run_batch(src: Path, out: Path, *extra: str) -> tuple[float, dict]:
    command = [sys.executable, "-m", "liftmag.cli", "batch", str(src), "--out", str(out),
               "--json", *extra]
    t0 = time.perf_counter()
    done = subprocess.run(command, capture_output=True, text=True, check=False)
    wall_s = time.perf_counter() - t0
    if done.returncode != 0:
        raise SystemExit(f"batch failed ({done.returncode}): {done.stderr[-2000:]}")
    return wall_s, json.loads(done.stdout)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--takes", type=int, default=20)
    parser.add_argument("--seconds", type=float, default=30.0)
    parser.add_argument("--keep", help="work in this folder and keep it (default: a temp dir)")
    args = parser.parse_args()

    work = Path(args.keep) if args.keep else Path(tempfile.mkdtemp(prefix="liftmag-bench-"))
    src = work / "takes"
    src.mkdir(parents=True, exist_ok=True)
    audio_s = make_takes(src, args.takes, args.seconds)
    audio_min = audio_s / 60
    print(f"{args.takes} takes x {args.seconds:g} s = {audio_min:.1f} min of stereo audio "
          f"at 16 kHz; {os.cpu_count()} cores on this machine, load "
          f"{os.getloadavg()[0]:.1f} at start")
    rows: list[tuple[str, float, dict]] = []
    for jobs in (1, 2):
        wall_s, summary = run_batch(src, work / f"out-local{jobs}", "--jobs", str(jobs))
        rows.append((f"local, --jobs {jobs}", wall_s, summary))
    wall_s, summary = run_batch(src, work / "out-local2", "--jobs", "2")
    rows.append(("re-run, all up to date (--jobs 2)", wall_s, summary))

    import dask
    from distributed import LocalCluster

    # Dask's nanny starts workers with MALLOC_TRIM_THRESHOLD_=65536, which fixes glibc's
    # thresholds (no more dynamic adjustment), so every large temporary array is mapped
    # and unmapped afresh. Measured with Dask's defaults, then with that variable unset.
    trim_key = "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_"
    for label, out_name, config in (
        ("Dask LocalCluster, 2 workers x 1 thread, Dask defaults", "out-dask", {}),
        ("Dask LocalCluster, same, MALLOC_TRIM_THRESHOLD_ unset", "out-dask-notrim",
         {trim_key: None}),
    ):
        # A nanny also leaves the variable in this process's environment, from where the
        # next cluster's workers would inherit it.
        os.environ.pop("MALLOC_TRIM_THRESHOLD_", None)
        with dask.config.set(config), LocalCluster(
            n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
            dashboard_address=None,
        ) as cluster:
            wall_s, summary = run_batch(src, work / out_name, "--cluster",
                                        cluster.scheduler_address)
            rows.append((label, wall_s, summary))

    print()
    print("| executor | takes done / skipped | wall time (s) | min of audio per s |")
    print("|---|---|---|---|")
    for label, wall_s, summary in rows:
        rate = audio_min / wall_s if summary["done"] else float("nan")
        print(f"| {label} | {summary['done']} / {summary['skipped']} | {wall_s:.1f} | "
              f"{rate:.3f} |")
    local1, local2, dask2, notrim2 = rows[0][1], rows[1][1], rows[3][1], rows[4][1]
    print()
    print(f"speed-up of 2 local workers over 1: {local1 / local2:.2f}x (control: a plain "
          f"CPU loop gets {parallel_control():.2f}x from 2 processes on this machine now)")
    for label, wall_s in (("Dask defaults", dask2), ("trim threshold unset", notrim2)):
        print(f"Dask path ({label}) against 2 local workers: "
              f"{100 * (wall_s - local2) / local2:+.1f} % wall time "
              f"({wall_s - local2:+.1f} s over {args.takes} takes)")
    same = all(
        (work / "out-local1" / f.name).read_bytes() == (work / out / f.name).read_bytes()
        for f in sorted(src.glob("*.wav"))
        for out in ("out-dask", "out-dask-notrim")
    )
    print(f"outputs of --jobs 1 and of the Dask path identical byte for byte: {same}")
    if not args.keep:
        shutil.rmtree(work)
    return 0 if same else 1


if __name__ == "__main__":
    raise SystemExit(main())
