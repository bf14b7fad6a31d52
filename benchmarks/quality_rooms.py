"""Quality table: every estimator on the image-source test rooms, per noise type.

Renders the rooms of tests/rooms.py (pyroomacoustics, 0 dB SNR at the reference mic), learns
the noise from (a) the 1.5 s lead-in and (b) 30 s of separate room tone, cleans with every
estimator through the same post-stage, and scores the speech part with STOI (pystoi),
PESQ-WB (pesq, ITU-T P.862.2) and SI-SDR. Prints Markdown tables; writes JSON with --json.

    .venv/bin/python benchmarks/quality_rooms.py [--mics 2,4] [--kinds ...] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

from rooms import KINDS, make_room_scene

from liftmag import metrics
from liftmag.engine import NoiseLearner, iter_blocks, process_array
from liftmag.settings import Settings

ESTIMATORS = ("auto", "lifted-mv", "lifted-wiener", "lifted-affine", "lifted-wiener-fixed",
              "linear-wiener", "mvdr", "delay-sum")


def scores(scene, signal) -> tuple[float, float, float]:
    start = scene.noise_only_range[1]
    ref, out, fs = scene.target_image[start:], signal[start:], scene.fs_hz
    return (metrics.stoi(ref, out, fs), float(metrics.pesq_wb(ref, out, fs)),
            metrics.si_sdr_db(out, ref))


def model_from(scene, audio):
    learner = NoiseLearner(scene.fs_hz, scene.mixture.shape[0])
    learner.add_segment(iter_blocks(audio, 1 << 15))
    return learner.model()


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--mics", default="2,4")
    parser.add_argument("--kinds", default=",".join(KINDS))
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--json")
    args = parser.parse_args()
    table = []
    for n_mics in (int(m) for m in args.mics.split(",")):
        for kind in args.kinds.split(","):
            scene = make_room_scene(kind, n_mics, 0.0, seed=args.seed, room_tone_s=30.0)
            a, b = scene.noise_only_range
            models = {"lead-in 1.5 s": model_from(scene, scene.mixture[:, a:b]),
                      "room tone 30 s": model_from(scene, scene.room_tone)}
            base = scores(scene, scene.mixture[scene.reference_mic])
            table.append(dict(mics=n_mics, kind=kind, noise="-", estimator="unprocessed",
                              stoi=base[0], pesq=base[1], si_sdr=base[2], seconds=0.0))
            for noise_name, model in models.items():
                for estimator in ESTIMATORS:
                    t0 = time.perf_counter()
                    y = process_array(scene.mixture, scene.fs_hz,
                                      Settings(estimator=estimator, noise_mode="hold"),
                                      noise_model=model)[0]
                    dt = time.perf_counter() - t0
                    s = scores(scene, y)
                    table.append(dict(mics=n_mics, kind=kind, noise=noise_name,
                                      estimator=estimator, stoi=s[0], pesq=s[1], si_sdr=s[2],
                                      seconds=dt))
                    print(f"{n_mics} {kind:24s} {noise_name:15s} {estimator:20s} "
                          f"{s[0]:.3f} {s[1]:.2f} {s[2]:6.2f}", file=sys.stderr)
    print("| mics | noise type | noise learned from | estimator | STOI | PESQ-WB | SI-SDR dB |")
    print("|---|---|---|---|---|---|---|")
    for r in table:
        print(f"| {r['mics']} | {r['kind']} | {r['noise']} | {r['estimator']} | "
              f"{r['stoi']:.3f} | {r['pesq']:.2f} | {r['si_sdr']:.2f} |")
    if args.json:
        Path(args.json).write_text(json.dumps(table, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
