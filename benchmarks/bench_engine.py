"""Engine speed and memory: real-time factor per estimator, and peak memory versus file length.

Speed: 20 s of 48 kHz noise-plus-tone audio through ``process_array`` for M = 2 and M = 4,
every estimator, against a bare STFT round trip (passthrough). One core: BLAS threads are
pinned to 1 before numpy loads. Memory: ``liftmag process`` on generated 10-minute and
60-minute 48 kHz stereo PCM_16 files, peak resident set size of the child process.

    .venv/bin/python benchmarks/bench_engine.py [--seconds 20] [--memory] [--memory-minutes 10,60]
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import resource  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from liftmag.engine import process_array  # noqa: E402
from liftmag.settings import ESTIMATORS, Settings  # noqa: E402

FS = 48000


def signal(n_mics: int, seconds: float, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    n = int(seconds * FS)
    t = np.arange(n) / FS
    x = 0.05 * rng.standard_normal((n_mics, n))
    x += 0.1 * np.sin(2 * np.pi * 220 * t) * (np.sin(2 * np.pi * 0.5 * t) > 0)
    return x


def speed(seconds: float) -> None:
    print(f"Real-time factor, {seconds:g} s at {FS} Hz, one core (higher is faster)")
    print("| estimator | M = 2 | M = 4 |")
    print("|---|---|---|")
    data = {m: signal(m, seconds) for m in (2, 4)}
    for estimator in ESTIMATORS:
        nulls = estimator == "lifted-nulls"
        extra = {"mic_spacing_m": 0.05, "null_deg": (20.0, 160.0)} if nulls else {}
        row = []
        for m in (2, 4):
            settings = Settings(estimator=estimator, **extra)
            process_array(data[m][:, : FS // 2], FS, settings)  # warm caches
            t0 = time.perf_counter()
            process_array(data[m], FS, settings)
            row.append(seconds / (time.perf_counter() - t0))
        label = "bare STFT round trip (passthrough)" if estimator == "passthrough" else estimator
        print(f"| {label} | {row[0]:.1f}x | {row[1]:.1f}x |")


def write_long_file(path: Path, minutes: float) -> None:
    import soundfile as sf

    rng = np.random.default_rng(1)
    block = FS * 10
    with sf.SoundFile(path, "w", FS, 2, subtype="PCM_16") as f:
        for _ in range(int(minutes * 6)):
            f.write((0.05 * rng.standard_normal((block, 2))).astype(np.float32))


def memory(minutes_list: list[float]) -> None:
    print("\nPeak resident memory of `liftmag process` (child process, default estimator)")
    print("| file | duration | peak RSS | wall time |")
    print("|---|---|---|---|")
    with tempfile.TemporaryDirectory() as tmp:
        for minutes in minutes_list:
            src = Path(tmp) / f"take-{minutes:g}min.wav"
            write_long_file(src, minutes)
            out = Path(tmp) / "out.wav"
            out.unlink(missing_ok=True)
            t0 = time.perf_counter()
            subprocess.run(
                [sys.executable, "-m", "liftmag.cli", "process", str(src), "-o", str(out)],
                check=True, stdout=subprocess.DEVNULL,
            )
            wall = time.perf_counter() - t0
            peak_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
            print(f"| 48 kHz stereo PCM_16 | {minutes:g} min | {peak_mb:.0f} MB | {wall:.0f} s |")
            src.unlink()


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--seconds", type=float, default=20.0)
    parser.add_argument("--memory", action="store_true", help="also measure peak memory")
    parser.add_argument("--memory-minutes", default="10,60")
    args = parser.parse_args()
    speed(args.seconds)
    if args.memory:
        memory([float(m) for m in args.memory_minutes.split(",")])
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
