"""Engine outputs of the working tree against another revision: max |new - old| / peak per case.

For speed work that must not change what the engine computes. Both sides run the same cases
in fresh processes (the benchmark demo scene at 48 kHz and a pyroomacoustics room at 16 kHz
with a competing talker, M = 2 and 4; a room-tone model held, a model from a region of the
take then tracked, and the tracker alone; one pass and two) and the differences are printed.

    .venv/bin/python benchmarks/ab_outputs.py REV [--seconds 8] [--floor]

Two things make "equal to rounding" a band rather than a number:

* The talker posterior's einsum rounds differently for different memory layouts of its
  frames, so both sides hand it one layout (a contiguous copy), or a layout change alone
  would show.
* The tracker and the region runs at M = 4 amplify rounding through threshold decisions
  (speech presence, spike counts): ``--floor`` also runs ``REV`` with its whitener scaled
  by 1 + 1e-15 (its inverse by 1 - 1e-15) and prints how far that moves each case, the
  rounding floor a change must be compared with.
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

CHILD = """
import os, sys
for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[var] = "1"
import numpy as np
import liftmag.engine as engine
from liftmag.engine import NoiseLearner, iter_blocks, process_array
from liftmag.settings import Settings

posterior = engine.wanted_posterior
engine.wanted_posterior = lambda prior, y: posterior(prior, np.ascontiguousarray(y))
if sys.argv[3] == "floor":
    root_inverse = engine._root_inverse
    def scaled(phi, loading, *rest):
        root, inv = root_inverse(phi, loading, *rest)[:2]
        return root * (1 + 1e-15), inv * (1 - 1e-15)
    engine._root_inverse = scaled
data = np.load(sys.argv[1])
out = {}
for name in data.files:
    if not name.startswith("take_"):
        continue
    case = name[5:]
    take, tone, fs = data[name], data["tone_" + case], int(data["fs_" + case])
    m = take.shape[0]
    learner = NoiseLearner(fs, m)
    learner.add_segment(iter_blocks(tone, 1 << 16))
    region = NoiseLearner(fs, m)
    region.add_segment(iter_blocks(take[:, : int(1.2 * fs)], 1 << 16))
    for mode, model, noise in (("model", learner.model(), "hold"),
                               ("region", region.model(), "track"), ("tracker", None, "track")):
        for whole in (True, False):
            settings = Settings(estimator="auto", noise_mode=noise)
            key = f"{case} {mode} {'two passes' if whole else 'one pass'}"
            out[key] = process_array(take, fs, settings, model, whole_take=whole)
np.savez(sys.argv[2], **out)
"""


def render(seconds: float, path: Path) -> None:
    """The cases' audio, rendered once by the working tree."""
    sys.path.insert(0, str(HERE))
    sys.path.insert(0, str(REPO / "tests"))
    from bench_engine import scene_48k
    from rooms import make_room_scene

    arrays = {}
    for m in (2, 4):
        take, tone = scene_48k(m, seconds)
        arrays.update({f"take_demo M={m}": take, f"tone_demo M={m}": tone,
                       f"fs_demo M={m}": 48000})
        scene = make_room_scene("competing-talker", m, 0.0, 1, fs_hz=16000, room_tone_s=3.0)
        arrays.update({f"take_room M={m}": scene.mixture, f"tone_room M={m}": scene.room_tone,
                       f"fs_room M={m}": 16000})
    np.savez(path, **arrays)


def run(package_root: Path, data: Path, out: Path, mode: str) -> dict[str, np.ndarray]:
    env = dict(os.environ, PYTHONPATH=str(package_root))
    done = subprocess.run([sys.executable, "-c", CHILD, str(data), str(out), mode],
                          env=env, capture_output=True, text=True, check=False)
    if done.returncode:
        raise SystemExit(f"{package_root} failed:\n{done.stderr}")
    with np.load(out) as saved:
        return {key: saved[key] for key in saved.files}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("revision")
    parser.add_argument("--seconds", type=float, default=8.0, help="length of the demo takes")
    parser.add_argument("--floor", action="store_true",
                        help="also show how far a 1e-15 change of the whitener moves REV")
    args = parser.parse_args()
    sys.path.insert(0, str(HERE))
    from ab_engine import both_sides

    with tempfile.TemporaryDirectory() as tmp:
        tmp_path = Path(tmp)
        old_root, new_root = both_sides(args.revision, tmp_path)
        data = tmp_path / "data.npz"
        render(args.seconds, data)
        old = run(old_root, data, tmp_path / "old.npz", "plain")
        new = run(new_root, data, tmp_path / "new.npz", "plain")
        floor = run(old_root, data, tmp_path / "floor.npz", "floor") if args.floor else None
    header = "| case | max abs(new - old) / peak |" + (" rounding floor |" if floor else "")
    print(header)
    print("|---|---|" + ("---|" if floor else ""))
    for key, reference in old.items():
        peak = np.max(np.abs(reference))
        row = f"| {key} | {np.max(np.abs(new[key] - reference)) / peak:.1e} |"
        if floor is not None:
            row += f" {np.max(np.abs(floor[key] - reference)) / peak:.1e} |"
        print(row)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
