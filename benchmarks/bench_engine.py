"""Engine speed and memory: real-time factor per estimator, and peak memory versus file length.

Speed: the demo scene (outdoor interview: generator, radio talker, ambience), resampled to
48 kHz and looped to ``--seconds``, through ``process_array`` for M = 2 and M = 4 (the 4-mic
take adds two channels made from the first two with a small delay and independent sensor
noise), every estimator, against a bare STFT round trip (passthrough). ``process_array`` reads
the take twice (the whole-take first pass, then the engine with its 3 s look-ahead), as
``liftmag process`` does; passthrough makes no first pass. Two noise set-ups:
a model learned from 10 s of the scene's room tone (held, the recommended workflow) and the
tracker alone (no room tone). One core: BLAS threads are pinned to 1 before numpy loads.
Memory: ``liftmag process`` on generated 10-minute and 60-minute 48 kHz stereo PCM_16 files,
peak resident set size of the child process.

    .venv/bin/python benchmarks/bench_engine.py [--seconds 20] [--estimators auto,passthrough]
        [--memory] [--memory-minutes 10,60]
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from liftmag.engine import process_array  # noqa: E402
from liftmag.settings import ESTIMATORS, Settings  # noqa: E402

FS = 48000
REPEATS = 3


def scene_48k(n_mics: int, seconds: float) -> tuple[np.ndarray, np.ndarray]:
    """(take, room tone) at 48 kHz with ``n_mics`` channels."""
    from scipy.signal import resample_poly

    from liftmag.scenes import demo_scene

    scene = demo_scene(seed=0, room_tone_s=10.0)
    take = resample_poly(scene.mixture, 3, 1, axis=1)
    tone = resample_poly(scene.room_tone, 3, 1, axis=1)
    reps = int(np.ceil(seconds * FS / take.shape[1]))
    take = np.tile(take, reps)[:, : int(seconds * FS)]
    if n_mics == 4:
        rng = np.random.default_rng(4)
        take = np.concatenate([take, np.roll(take, 7, axis=1) + 1e-3 * rng.standard_normal(
            take.shape)])
        tone = np.concatenate([tone, np.roll(tone, 7, axis=1) + 1e-3 * rng.standard_normal(
            tone.shape)])
    return take, tone


def _best_s(take: np.ndarray, settings: Settings, model, against: Settings) -> tuple[float, float]:
    """Best wall time of ``settings`` and of ``against``, timed alternately (the machine's
    speed drifts, so a ratio is only fair between runs made at the same time)."""
    process_array(take[:, : FS // 2], FS, settings, model)  # warm caches
    best, best_against = np.inf, np.inf
    for _ in range(REPEATS):  # best of a few: the machine is shared
        t0 = time.perf_counter()
        process_array(take, FS, against, model)
        t1 = time.perf_counter()
        process_array(take, FS, settings, model)
        best_against = min(best_against, t1 - t0)
        best = min(best, time.perf_counter() - t1)
    return best, best_against


def speed(seconds: float, estimators: tuple[str, ...] = ESTIMATORS) -> None:
    from liftmag.engine import NoiseLearner, iter_blocks

    configs = ("| M = 2, room-tone model | M = 2, tracker | M = 4, room-tone model "
               "| M = 4, tracker |")
    print(f"Real-time factor, {seconds:g} s at {FS} Hz, one core, best of {REPEATS} "
          "(higher is faster); in brackets the cost relative to a bare STFT round trip timed "
          "alternately with it")
    print("| estimator " + configs)
    print("|---|---|---|---|---|")
    data = {m: scene_48k(m, seconds) for m in (2, 4)}
    models = {}
    for m, (_, tone) in data.items():
        learner = NoiseLearner(FS, m)
        learner.add_segment(iter_blocks(tone, 1 << 16))
        models[m] = learner.model()
    for estimator in estimators:
        nulls = estimator == "lifted-nulls"
        extra = {"mic_spacing_m": 0.08, "null_deg": (15.0, 140.0)} if nulls else {}
        cells = []
        for m in (2, 4):
            for model in (models[m], None):
                mode = "hold" if model else "track"
                settings = Settings(estimator=estimator, noise_mode=mode, **extra)
                bare = Settings(estimator="passthrough", noise_mode=mode)
                best, best_bare = _best_s(data[m][0], settings, model, bare)
                cell = f"{seconds / best:.1f}x"
                if estimator != "passthrough":
                    cell += f" ({best / best_bare:.1f})"
                cells.append(cell)
        label = "bare STFT round trip (passthrough)" if estimator == "passthrough" else estimator
        print(f"| {label} | " + " | ".join(cells) + " |", flush=True)


def write_long_file(path: Path, minutes: float) -> None:
    import soundfile as sf

    rng = np.random.default_rng(1)
    block = FS * 10
    with sf.SoundFile(path, "w", FS, 2, subtype="PCM_16") as f:
        for _ in range(int(minutes * 6)):
            f.write((0.05 * rng.standard_normal((block, 2))).astype(np.float32))


def _peak_rss_kb(child: subprocess.Popen) -> float:
    """Peak resident memory of ``child`` after it started Python, in KiB.

    Not ``wait4``'s ``ru_maxrss``: Linux folds the pre-exec high-water mark of the forked
    process (a copy of this benchmark, hundreds of MB after the speed runs) into it. The
    kernel's per-process high-water mark ``VmHWM`` in ``/proc/<pid>/status`` belongs to the
    program the child runs; it only grows, so its last reading before exit is the peak.
    """
    status = Path(f"/proc/{child.pid}/status")
    peak = 0.0
    while child.poll() is None:
        try:
            for line in status.read_text().splitlines():
                if line.startswith("VmHWM:"):
                    peak = max(peak, float(line.split()[1]))
        except OSError:  # the child exited between poll() and the read
            break
        time.sleep(0.05)
    child.wait()
    return peak


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
            child = subprocess.Popen(
                [sys.executable, "-m", "liftmag.cli", "process", str(src), "-o", str(out)],
                stdout=subprocess.DEVNULL,
            )
            peak_kb = _peak_rss_kb(child)
            if child.returncode:
                raise SystemExit(f"liftmag process failed on {src}")
            wall = time.perf_counter() - t0
            peak_mb = peak_kb / 1024
            print(f"| 48 kHz stereo PCM_16 | {minutes:g} min | {peak_mb:.0f} MB | {wall:.0f} s |")
            src.unlink()


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--seconds", type=float, default=20.0)
    parser.add_argument("--memory", action="store_true", help="also measure peak memory")
    parser.add_argument("--memory-minutes", default="10,60")
    parser.add_argument("--estimators", default=",".join(ESTIMATORS),
                        help="comma-separated subset (passthrough = bare STFT round trip)")
    args = parser.parse_args()
    unknown = set(args.estimators.split(",")) - set(ESTIMATORS)
    if unknown:
        parser.error(f"unknown estimator(s) {sorted(unknown)}; choose from {ESTIMATORS}")
    speed(args.seconds, tuple(args.estimators.split(",")))
    if args.memory:
        memory([float(m) for m in args.memory_minutes.split(",")])
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
