"""Statistics policy and reduction limit on the image-source test rooms, per noise type and SNR.

Renders the rooms of ``tests/rooms.py`` (pyroomacoustics; five noise types, 1.5 s lead-in,
30 s of separate room tone) and cleans each take with every configuration given, in three
workflows: a model from the room tone (held), a model from the lead-in region (held), and the
tracker alone. A configuration is ``lookahead_s:whole_take:reduction_limit_db`` (whole_take 1
runs the first pass over the take, 0 is what the plugin does). Scores on the speech part, as
improvements over the unprocessed reference microphone: STOI (pystoi), PESQ-WB (pesq) and
SI-SDR; and SI-SDR of the first 2 s of speech against the rest (the cold start).

    .venv/bin/python benchmarks/quality_policies.py --configs 0:0:24,3:0:24,3:1:24
    .venv/bin/python benchmarks/quality_policies.py --configs 3:1:12,3:1:18,3:1:24,3:1:30 \\
        --snrs -5,0,5,10 --mics 2
"""

from __future__ import annotations

import argparse
import collections
import itertools
import json
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

from rooms import KINDS, make_room_scene

from liftmag import metrics
from liftmag.engine import NoiseLearner, iter_blocks, process_array
from liftmag.settings import Settings

FIRST_S = 2.0


def _model(scene, audio):
    learner = NoiseLearner(scene.fs_hz, scene.mixture.shape[0])
    learner.add_segment(iter_blocks(audio, 1 << 15))
    return learner.model()


def _scores(ref, out, fs) -> tuple[float, float, float]:
    return (metrics.stoi(ref, out, fs), float(metrics.pesq_wb(ref, out, fs)),
            metrics.si_sdr_db(out, ref))


def run(configs, mics, snrs, kinds, seed: int):
    for m, kind, snr in itertools.product(mics, kinds, snrs):
        scene = make_room_scene(kind, m, snr, seed=seed, room_tone_s=30.0)
        a, b = scene.noise_only_range
        fs, x = scene.fs_hz, scene.mixture
        ref, noisy = scene.target_image[b:], x[scene.reference_mic, b:]
        base = _scores(ref, noisy, fs)
        cut = round(FIRST_S * fs)
        workflows = {"room tone": _model(scene, scene.room_tone),
                     "region": _model(scene, x[:, a:b]), "nothing": None}
        for (workflow, model), (w, whole, limit) in itertools.product(workflows.items(), configs):
            settings = Settings(lookahead_s=w, reduction_limit_db=limit,
                                noise_mode="hold" if model is not None else "track")
            y = process_array(x, fs, settings, model, whole_take=whole)[0, b:]
            d = [s - s0 for s, s0 in zip(_scores(ref, y, fs), base, strict=True)]
            first, rest = (
                metrics.si_sdr_db(y[part], ref[part]) - metrics.si_sdr_db(noisy[part], ref[part])
                for part in (slice(None, cut), slice(cut, None))
            )
            yield dict(mics=m, kind=kind, snr_db=snr, workflow=workflow,
                       config=f"{w:g}:{int(whole)}:{limit:g}", d=d, first=first, rest=rest)


def tables(rows) -> str:
    lines = []
    configs = list(dict.fromkeys(r["config"] for r in rows))
    for factor in ("kind", "snr_db"):
        for workflow in dict.fromkeys(r["workflow"] for r in rows):
            groups = collections.defaultdict(list)
            for r in rows:
                if r["workflow"] == workflow:
                    groups[(r[factor], r["config"])].append(r)
            lines += ["", f"{workflow}, by {factor}: dSTOI / dPESQ / dSI-SDR dB "
                      "(first 2 s - rest, dB)", "",
                      f"| {factor} | " + " | ".join(configs) + " |",
                      "|---|" + "---|" * len(configs)]
            for level in dict.fromkeys(k[0] for k in groups):
                cells = []
                for c in configs:
                    g = groups[(level, c)]
                    d = [sum(r["d"][i] for r in g) / len(g) for i in range(3)]
                    gap = sum(r["first"] - r["rest"] for r in g) / len(g)
                    cells.append(f"{d[0]:+.3f} / {d[1]:+.2f} / {d[2]:+.1f} ({gap:+.1f})")
                lines.append(f"| {level} | " + " | ".join(cells) + " |")
    return "\n".join(lines)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--configs", default="0:0:24,3:0:24,3:1:24")
    parser.add_argument("--mics", default="2,4")
    parser.add_argument("--snrs", default="0")
    parser.add_argument("--kinds", default=",".join(KINDS))
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--json")
    args = parser.parse_args()
    configs = []
    for text in args.configs.split(","):
        w, whole, limit = text.split(":")
        configs.append((float(w), whole == "1", float(limit)))
    rows = []
    for row in run(configs, [int(m) for m in args.mics.split(",")],
                   [float(s) for s in args.snrs.split(",")], args.kinds.split(","), args.seed):
        rows.append(row)
        print(json.dumps(row), file=sys.stderr, flush=True)
    if args.json:
        Path(args.json).write_text(json.dumps(rows, indent=1))
    print(tables(rows))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
