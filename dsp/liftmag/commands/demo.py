"""``liftmag demo``: render the built-in scene, clean it the way a user would, and report.

The scene is an invented outdoor interview (``liftmag.scenes.demo_scene``): a two-capsule
field recorder, a guest at broadside, a generator droning at one end, a radio talking at the
other side, light reverberation, sensor noise, 0 dB SNR. The demo writes the take and 30 s
of room tone as WAV files, learns a noise model from the room tone (`liftmag learn`),
cleans the take with the default estimator, the linear baseline and plain MVDR
(`liftmag process`), scores each against the known clean speech and writes a report.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import time
from pathlib import Path

import numpy as np

from liftmag.commands.common import CAUTION

HELP = (
    "Render the built-in outdoor-interview scene (two capsules, a generator and a radio "
    "as noise), clean it with the default estimator, the linear Wiener baseline and MVDR, "
    "and write the audio, a noise model and a report with scores into ./liftmag-demo/."
)

ESTIMATORS = ("auto", "linear-wiener", "mvdr")
ROOM_TONE_S = 30.0
PATTERN_FREQ_HZ = 1000.0


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--out", default="liftmag-demo", help="output folder (default: %(default)s)"
    )
    parser.add_argument("--seed", type=int, default=0, help="scene seed (default: %(default)s)")
    parser.add_argument("--snr-db", type=float, default=0.0, help="input SNR (default: 0 dB)")
    parser.add_argument("--force", action="store_true", help="replace an existing demo folder")
    parser.add_argument("--json", action="store_true", help="print the scores as JSON")


def _demo_names() -> frozenset[str]:
    cleaned = {"mvdr.wav" if e == "mvdr" else f"cleaned-{e}.wav" for e in ESTIMATORS}
    return frozenset({
        "take.wav", "roomtone.wav", "clean-reference.wav", "noise-model.npz", "report.html",
        "report.md", "scores.json", "cleaned-nothing-given.wav", *cleaned,
    })


def _clear_demo_folder(out: Path, force: bool) -> None:
    """Empty an earlier demo's folder for --force; refuse any folder holding other files.

    Only files the demo writes are removed (and figures/*.png), so ``--out ~ --force`` or
    a mistyped folder can never lose anything of the user's.
    """
    from liftmag.errors import UserError

    if os.path.lexists(out) and not out.is_dir():
        raise UserError(f"--out {out} is not a folder; give a folder for the demo")
    if not out.is_dir() or not any(out.iterdir()):
        return
    if not force:
        raise UserError(f"{out} exists and is not empty; add --force to replace the demo")
    figures = out / "figures"
    candidates = [p for p in out.iterdir() if p != figures]
    if figures.is_dir() and not figures.is_symlink():
        candidates += list(figures.iterdir())
    elif os.path.lexists(figures):
        candidates.append(figures)
    for path in sorted(candidates):
        names = _demo_names() if path.parent == out else None
        mine = path.is_file() and not path.is_symlink() and (
            path.name in names if names is not None else path.suffix == ".png"
        )
        if not mine:
            raise UserError(
                f"{out} holds {path.relative_to(out)}, which the demo did not write; "
                "--force replaces a demo folder only: choose another --out"
            )
    for path in candidates:
        path.unlink()


def _write(path: Path, data: np.ndarray, fs: int) -> None:
    import soundfile as sf

    peak = float(np.max(np.abs(data))) if data.size else 0.0
    subtype = "FLOAT" if peak >= 1 else "PCM_24"  # never clip a loud scene
    sf.write(path, data.T if data.ndim == 2 else data, fs, subtype=subtype)


def _scores(reference: np.ndarray, signal: np.ndarray, fs: int) -> dict[str, float]:
    from liftmag import metrics

    return {
        "stoi": round(metrics.stoi(reference, signal, fs), 3),
        "estoi": round(metrics.stoi(reference, signal, fs, extended=True), 3),
        "pesq_wb": round(float(metrics.pesq_wb(reference, signal, fs)), 2),
        "si_sdr_db": round(metrics.si_sdr_db(signal, reference), 2),
    }


def _pattern_png(model, scene, folder: Path) -> tuple[bytes, int]:
    from liftmag.engine import model_weights_at_bin
    from liftmag.estimators import linear_as_lifted, power_pattern
    from liftmag.geometry import steering_vectors
    from liftmag.plots import pattern_figure
    from liftmag.stft import stft_config

    cfg = stft_config(scene.fs_hz)
    k = round(PATTERN_FREQ_HZ * cfg.frame_length / scene.fs_hz)
    freq = cfg.frequencies_hz[k]
    g = steering_vectors(scene.mic_positions_m, scene.target_deg, freq)
    noise_power = float(np.real(np.trace(model.covariance[k]))) / model.n_channels
    h, w, n_spikes = model_weights_at_bin(model, g, k, speech_power=noise_power)
    angles = np.arange(0.0, 180.5, 0.5)
    d = steering_vectors(scene.mic_positions_m, angles, freq)
    patterns = {"mvdr": power_pattern(linear_as_lifted(h), d), "lifted (auto)": power_pattern(w, d)}
    path = folder / "pattern-1khz.png"
    pattern_figure(
        path, angles, patterns,
        title=f"Power patterns at {freq:.0f} Hz learned from the room tone "
              f"({n_spikes} non-Gaussian lifted directions in this bin)",
        marks_deg=[(scene.target_deg, "guest"), (15.0, "generator"), (140.0, "radio")],
    )
    return path.read_bytes(), n_spikes


def run(args: argparse.Namespace) -> int:
    from liftmag import report
    from liftmag.errors import UserError
    from liftmag.fileproc import learn_noise, open_source, process_file
    from liftmag.scenes import demo_scene
    from liftmag.settings import Settings

    started = time.perf_counter()
    if not math.isfinite(args.snr_db):
        raise UserError(f"--snr-db must be a finite number of dB, got {args.snr_db}")
    out = Path(args.out)
    _clear_demo_folder(out, args.force)
    out.mkdir(parents=True, exist_ok=True)
    figures = out / "figures"
    figures.mkdir(exist_ok=True)
    print(f"liftmag demo: rendering the outdoor-interview scene (seed {args.seed}) ...",
          file=sys.stderr)
    scene = demo_scene(seed=args.seed, snr_db=args.snr_db, room_tone_s=ROOM_TONE_S)
    fs = scene.fs_hz
    take, tone, clean = out / "take.wav", out / "roomtone.wav", out / "clean-reference.wav"
    _write(take, scene.mixture, fs)
    _write(tone, scene.room_tone, fs)
    _write(clean, scene.target_image, fs)

    print("liftmag demo: learning the noise model from 30 s of room tone ...", file=sys.stderr)
    model = learn_noise(open_source([tone]), Settings(), description="demo room tone")
    (out / "noise-model.npz").write_bytes(model.to_bytes())

    start = scene.noise_only_range[1]  # score the speech part
    reference = scene.target_image[start:]
    results = {"unprocessed (capsule 1)": _scores(reference, scene.mixture[0, start:], fs)}
    outputs = {}
    lifted_fraction = 0.0
    for estimator in ESTIMATORS:
        name = "mvdr.wav" if estimator == "mvdr" else f"cleaned-{estimator}.wav"
        print(f"liftmag demo: cleaning with {estimator} ...", file=sys.stderr)
        result = process_file(
            [take], out / name, Settings(estimator=estimator, noise_mode="hold"),
            noise_model=model,
        )
        if estimator == "auto":
            lifted_fraction = result.lifted_fraction
        import soundfile as sf

        signal = sf.read(out / name, always_2d=True)[0][:, 0]
        outputs[estimator] = signal
        results[estimator] = _scores(reference, signal[start:], fs)

    # The same take with nothing given: the take's own pauses and voices decide the noise.
    print("liftmag demo: cleaning with nothing given (no room tone) ...", file=sys.stderr)
    bare = process_file([take], out / "cleaned-nothing-given.wav", Settings())
    import soundfile as sf

    signal = sf.read(out / "cleaned-nothing-given.wav", always_2d=True)[0][:, 0]
    results["auto, nothing given"] = _scores(reference, signal[start:], fs)

    print("liftmag demo: drawing the report ...", file=sys.stderr)
    rows = tuple(
        (name, f"{s['stoi']:.3f}", f"{s['estoi']:.3f}", f"{s['pesq_wb']:.2f}",
         f"{s['si_sdr_db']:.2f}")
        for name, s in results.items()
    )
    spectrograms = report.spectrogram_row_png(
        [("take (capsule 1)", scene.mixture[0]), ("clean speech (reference)", scene.target_image)]
        + [(e, outputs[e]) for e in ESTIMATORS],
        fs, panel_width_in=3.2,
    )
    removed = report.spectrogram_row_png(
        [(f"removed by {e}", scene.mixture[0] - outputs[e]) for e in ESTIMATORS], fs,
        panel_width_in=3.6,
    )
    levels = report.level_over_time_png(
        [("take", scene.mixture[0]), ("clean speech", scene.target_image)]
        + [(e, outputs[e]) for e in ESTIMATORS],
        fs, shade_s=[(0.0, start / fs)],
    )
    pattern_png, n_spikes = _pattern_png(model, scene, figures)
    from liftmag import talkers
    from liftmag.engine import iter_blocks

    # The same search `process` ran for the "nothing given" row (on the file it read), drawn
    # for the reader.
    take_read = sf.read(take, always_2d=True)[0].T
    features = talkers.take_features(iter_blocks(take_read, 1 << 16), fs, take_read.shape[0])
    talker_map = talkers.choose_wanted(talkers.find_sources(features), features)
    spacing_m = float(abs(scene.mic_positions_m[-1] - scene.mic_positions_m[0]))
    talker_png = report.talker_map_figure(features, talker_map, spacing_m=spacing_m)
    sections = [
        report.Section("The scene", (
            "An invented outdoor interview: a field recorder with two capsules 8 cm apart, the "
            "guest 0.7 m away at broadside, a petrol generator droning 12 m away near one end of "
            "the capsule axis, a small radio talking 2.5 m away on the other side, leaves in the "
            f"wind, light reverberation, capsule self-noise; {args.snr_db:g} dB SNR. The "
            "location engineer also recorded 30 s of room tone; liftmag learned its noise model "
            "from it (`liftmag learn`) and cleaned the take with three estimators "
            "(`liftmag process --noise-model`).",
            "! " + CAUTION,
        )),
        report.Section("Scores against the clean speech", (
            report.Table(("version", "STOI", "ESTOI", "PESQ-WB", "SI-SDR (dB)"), rows,
                         caption="Speech part of the take (after the 1.5 s lead-in). STOI/ESTOI: "
                                 "pystoi; PESQ-WB: ITU-T P.862.2 via the pesq package; SI-SDR: "
                                 "Le Roux et al. 2019. Higher is better for all four."),
            "The row 'auto, nothing given' is `liftmag process take.wav` without room tone: "
            "the noise is learned from the take's own pauses and the voices it finds, "
            f"{bare.talker_summary or 'no directional voice found'}.",
            f"auto used the lifted estimator in {100 * lifted_fraction:.0f} % of the time-"
            "frequency bins: those where the learned noise showed non-Gaussian structure (this "
            "scene's noise holds a talking radio and a generator's firing tones); elsewhere it "
            "is the linear estimator.",
        )),
        report.Section("Spectrograms", (
            report.Image(spectrograms, "spectrograms", "Take, clean reference and each result "
                         "(one colour scale).", alt="spectrograms"),
            report.Image(removed, "removed", "What each estimator took out of capsule 1. Speech "
                         "shapes here mean speech was damaged.", alt="removed"),
        )),
        report.Section("Who talks from where (nothing given)", (
            report.Image(talker_png, "talkers", "Each 64 ms frame with a clear direction, at "
                         "its time difference between the capsules: the search `process` runs "
                         "when it is given no room tone, region or bearing, and what it kept as "
                         "the talker.", alt="talker map"),
        )),
        report.Section("Level over time", (
            report.Image(levels, "levels", "Short-term level; the shaded lead-in is noise only.",
                         alt="levels"),
        )),
        report.Section("Power patterns", (
            report.Image(pattern_png, "pattern", "Power pattern of MVDR and of the lifted "
                         "estimator at 1 kHz, both built from the learned room tone; both "
                         "pass the guest's bearing at 0 dB. A lifted estimator works on power, "
                         "so its pattern can dip below zero (marked).", alt="power patterns"),
            f"{n_spikes} eigen-directions of the whitened lifted noise covariance stood outside "
            "the Gaussian bulk in this bin.",
        )),
    ]
    (out / "report.html").write_text(report.html_page("liftmag demo: outdoor interview", sections))
    images = {"spectrograms": "figures/spectrograms.png", "removed": "figures/removed.png",
              "levels": "figures/levels.png", "pattern": "figures/pattern-1khz.png",
              "talkers": "figures/talkers.png"}
    for name, png in (("spectrograms", spectrograms), ("removed", removed), ("levels", levels),
                      ("talkers", talker_png)):
        (out / images[name]).write_bytes(png)
    (out / "report.md").write_text(
        report.markdown_page("liftmag demo: outdoor interview", sections, images)
    )
    summary = {"scores": results, "lifted_fraction": round(lifted_fraction, 3),
               "talkers_nothing_given": bare.talkers,
               "elapsed_s": round(time.perf_counter() - started, 1), "folder": str(out)}
    (out / "scores.json").write_text(json.dumps(summary, indent=2))
    if args.json:
        print(json.dumps(summary, indent=2))
        return 0
    width = max(len(n) for n in results)
    print(f"\n{'version':{width}s}   STOI  ESTOI  PESQ-WB  SI-SDR dB")
    for name, s in results.items():
        print(f"{name:{width}s}  {s['stoi']:.3f}  {s['estoi']:.3f}  {s['pesq_wb']:7.2f}  "
              f"{s['si_sdr_db']:9.2f}")
    print(f"\nWrote the demo to {out.resolve()}/ in {summary['elapsed_s']} s:")
    print(f"  report:  {(out / 'report.html').resolve()}  (and report.md)")
    print("  audio:   take.wav, roomtone.wav, clean-reference.wav, cleaned-auto.wav, "
          "cleaned-linear-wiener.wav, mvdr.wav, cleaned-nothing-given.wav")
    print("  model:   noise-model.npz (reuse with: liftmag process TAKE --noise-model ...)")
    print(CAUTION)
    return 0
