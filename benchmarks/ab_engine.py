"""Engine speed of the working tree against another revision, interleaved (A/B).

Wall-clock timings on a shared machine drift by a third within minutes, so a before/after
pair of ``bench_engine.py`` runs cannot show a 5 % change. This script alternates the two
versions round by round on the same audio (the benchmark scene of ``bench_engine.py`` at
48 kHz, rendered once by the working tree and saved), each timing in a fresh child process
with one BLAS thread, and reports the best CPU time of each side and their ratio.

    .venv/bin/python benchmarks/ab_engine.py REV [--mics 2,4] [--seconds 20] [--rounds 8]
        [--noise track|hold] [--estimator auto]

``REV`` is any git revision (``HEAD``, a commit, a tag); its package is extracted to a
temporary folder and imported as ``liftmag`` by its children.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
REPO = HERE.parent

# One timed run in a child: load the saved take (and room tone), warm up, time process_array.
CHILD = """
import os, sys, time
for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[var] = "1"
import numpy as np
from liftmag.engine import NoiseLearner, iter_blocks, process_array
from liftmag.settings import Settings
take, tone, fs, noise, estimator, repeats = (
    np.load(sys.argv[1]), np.load(sys.argv[2]), 48000, sys.argv[3], sys.argv[4], int(sys.argv[5]))
model = None
if noise == "hold":
    learner = NoiseLearner(fs, take.shape[0])
    learner.add_segment(iter_blocks(tone, 1 << 16))
    model = learner.model()
settings = Settings(estimator=estimator, noise_mode=noise)
process_array(take[:, : fs // 2], fs, settings, model)
best = float("inf")
for _ in range(repeats):
    t0 = time.process_time()
    process_array(take, fs, settings, model)
    best = min(best, time.process_time() - t0)
print(best)
"""


def extract(revision: str, into: Path) -> Path:
    """``revision``'s package as an importable ``liftmag`` under ``into``.

    Revisions before the ``dsp/liftmag/`` layout kept the package's modules directly in ``dsp/``.
    """
    archive = subprocess.run(
        ["git", "-C", str(REPO), "archive", revision, "dsp"], capture_output=True, check=False
    )
    if archive.returncode:
        raise SystemExit(f"cannot read revision {revision!r}: {archive.stderr.decode().strip()}")
    subprocess.run(["tar", "-x", "-C", str(into)], input=archive.stdout, check=True)
    package = into / "dsp" / "liftmag"
    (package if package.is_dir() else into / "dsp").rename(into / "liftmag")
    return into


def both_sides(revision: str, tmp_path: Path) -> tuple[Path, Path]:
    """Import roots under ``tmp_path``: ``revision``'s package, and the working tree's."""
    (tmp_path / "old").mkdir()
    old = extract(revision, tmp_path / "old")
    new = tmp_path / "new"
    new.mkdir()
    (new / "liftmag").symlink_to(REPO / "dsp" / "liftmag")
    return old, new


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("revision")
    parser.add_argument("--mics", default="2,4")
    parser.add_argument("--seconds", type=float, default=20.0)
    parser.add_argument("--rounds", type=int, default=8)
    parser.add_argument("--repeats", type=int, default=1, help="timed runs per child")
    parser.add_argument("--noise", choices=("track", "hold"), default="track")
    parser.add_argument("--estimator", default="auto")
    args = parser.parse_args()
    sys.path.insert(0, str(HERE))
    from bench_engine import scene_48k  # the working tree renders the audio once

    with tempfile.TemporaryDirectory() as tmp:
        tmp_path = Path(tmp)
        old, new = both_sides(args.revision, tmp_path)
        print(f"CPU time of process_array, {args.seconds:g} s at 48 kHz, {args.noise}, "
              f"{args.estimator}; best of {args.rounds} interleaved rounds")
        print(f"| mics | {args.revision} | working tree | speed-up |")
        print("|---|---|---|---|")
        for n_mics in (int(m) for m in args.mics.split(",")):
            take, tone = scene_48k(n_mics, args.seconds)
            take_file, tone_file = tmp_path / "take.npy", tmp_path / "tone.npy"
            np.save(take_file, take)
            np.save(tone_file, tone)
            best = {"old": np.inf, "new": np.inf}
            for _ in range(args.rounds):
                for side, path in (("old", old), ("new", new)):
                    env = dict(os.environ, PYTHONPATH=str(path))
                    out = subprocess.run(
                        [sys.executable, "-c", CHILD, str(take_file), str(tone_file),
                         args.noise, args.estimator, str(args.repeats)],
                        env=env, capture_output=True, text=True, check=False,
                    )
                    if out.returncode:
                        raise SystemExit(f"{side} side failed:\n{out.stderr}")
                    best[side] = min(best[side], float(out.stdout.split()[-1]))
            rtf_old, rtf_new = args.seconds / best["old"], args.seconds / best["new"]
            print(f"| {n_mics} | {rtf_old:.1f}x | {rtf_new:.1f}x | {rtf_new / rtf_old:.3f} |",
                  flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
