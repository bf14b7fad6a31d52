"""``liftmag compare``: A/B liftmag's output against other versions of a take.

Thin edge over :mod:`liftmag.abcompare` (alignment, loudness, scores) and
:mod:`liftmag.report` (figures and pages); inputs are read with
:mod:`liftmag.audio_io`. Everything is computed in memory first; then every
output is written to a temporary name in its destination folder and only when
all of them are complete are they renamed into place, so an error leaves
nothing behind (``AtomicAudioWriter`` commits file by file, which is why the
staging here is our own).
"""

from __future__ import annotations

import argparse
import contextlib
import json
import math
import os
import re
import sys
import time
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from liftmag.commands.common import stoppable
from liftmag.errors import UserError

HELP = """\
Compare liftmag's output with other processed versions of the same take.
Every version is aligned to the original (constant delay, found by
cross-correlation), matched to its loudness (ITU-R BS.1770) for listening,
and scored: noise-floor change, speech level change, WADA SNR and a
musical-noise indicator, plus SI-SDR, STOI, ESTOI and PESQ-WB when a clean
reference is given. Writes an HTML report (self-contained), Markdown, JSON,
and shuffled, neutrally named files for blind listening with a separate key.
"""

LISTENING_CAUTION = (
    "Listening level: start with the monitor turned low and raise it slowly. The files "
    "are matched in loudness, but any of them can still hold loud transients (clicks, "
    "bumps, plosives); never listen at a level that is uncomfortable."
)
ORIGINALS_CAUTION = (
    "Enhanced audio is not the original recording. Keep the unprocessed files; "
    "forensic or evidential use needs the original, unprocessed file."
)

REPORT_HTML = "report.html"
REPORT_MD = "report.md"
SCORES_JSON = "scores.json"
KEY_JSON = "blind-key.json"
BLIND_DIR = "blind"
FIGURES_DIR = "figures"
KEY_FORMAT = "liftmag-blind-key"
KEY_FORMAT_VERSION = 1
_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,39}$")
_RESERVED = {"original", "liftmag", "clean"}
_TAKE_RE = re.compile(r"^take-[0-9]+\.wav$")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "original", nargs="?", metavar="ORIGINAL", help="the original, unprocessed take"
    )
    parser.add_argument("--liftmag", metavar="FILE", help="liftmag's output for this take")
    parser.add_argument(
        "--version",
        dest="versions",
        action="append",
        default=[],
        metavar="NAME=FILE",
        help="another processed version (repeatable); NAME: letters, digits, _ . -",
    )
    parser.add_argument(
        "--clean",
        metavar="FILE",
        help="clean reference speech, when it exists (adds SI-SDR, STOI, ESTOI, PESQ-WB)",
    )
    parser.add_argument(
        "--channel",
        type=int,
        default=0,
        help="reference channel of multichannel files, from 0 (default 0); mono files "
        "are used as they are",
    )
    parser.add_argument(
        "--noise-region",
        dest="noise_regions",
        action="append",
        default=[],
        metavar="START:END",
        help="noise-only stretch of the original, in seconds (repeatable); "
        "without it the quietest frames are used",
    )
    parser.add_argument(
        "--out",
        default="liftmag-compare",
        metavar="DIR",
        help="output folder (default ./liftmag-compare/)",
    )
    parser.add_argument("--force", action="store_true", help="replace earlier outputs in DIR")
    parser.add_argument(
        "--json", action="store_true", help="print the summary as JSON on standard output"
    )
    parser.add_argument(
        "--reveal",
        metavar="KEY",
        help="print which blind file is which, from a key written by an earlier run",
    )


# --------------------------------------------------------------------------- reading


@dataclass(frozen=True)
class _Input:
    label: str
    path: Path
    signal: np.ndarray  # 1-D float64 at the original's rate
    fs_hz: int
    channels: int
    notes: tuple[str, ...] = ()


def _read_audio(path: Path, label: str) -> tuple[np.ndarray, int]:
    """(channels, frames) float64 and the sample rate; UserError if unreadable."""
    from liftmag import audio_io

    try:
        info = audio_io.probe(path)
        blocks = list(audio_io.read_blocks(info, 1 << 16))
    except audio_io.AudioInputError as exc:
        raise UserError(f"{label}: {exc}") from None
    if not blocks:
        raise UserError(f"{label}: {path} holds no audio")
    return np.concatenate(blocks, axis=1), info.sample_rate_hz


def _pick_channel(data: np.ndarray, channel: int, label: str, path: Path) -> np.ndarray:
    if data.shape[0] == 1:
        return data[0]
    if not 0 <= channel < data.shape[0]:
        raise UserError(
            f"{label} {path} has {data.shape[0]} channels; --channel {channel} is out of range "
            f"(0 to {data.shape[0] - 1})"
        )
    return data[channel]


def _load(path_text: str, label: str, channel: int, target_fs_hz: int | None) -> _Input:
    from liftmag.metrics import resample_to

    path = Path(path_text)
    data, fs_hz = _read_audio(path, label)
    notes = []
    if data.shape[0] > 1:
        notes.append(f"{label} has {data.shape[0]} channels; channel {channel} was used")
    x = _pick_channel(data, channel, label, path)
    if target_fs_hz is not None and fs_hz != target_fs_hz:
        x = resample_to(x, fs_hz, target_fs_hz)
        notes.append(
            f"{label} is at {fs_hz} Hz; resampled to the original's {target_fs_hz} Hz "
            "(polyphase filter) before comparing"
        )
    return _Input(label, path, np.ascontiguousarray(x), fs_hz, data.shape[0], tuple(notes))


def _parse_versions(items: list[str]) -> list[tuple[str, str]]:
    out: list[tuple[str, str]] = []
    for item in items:
        name, sep, file = item.partition("=")
        if not sep or not file:
            raise UserError(f"--version expects NAME=FILE, got {item!r}")
        if not _NAME_RE.match(name):
            raise UserError(
                f"--version name {name!r}: use 1 to 40 letters, digits, '_', '.' or '-', "
                "starting with a letter or digit"
            )
        if name.lower() in _RESERVED:
            raise UserError(f"--version name {name!r} is reserved; choose another")
        if any(name == n for n, _ in out):
            raise UserError(f"--version name {name!r} is given twice")
        out.append((name, file))
    return out


def _parse_regions(items: list[str]) -> list[tuple[float, float]]:
    from liftmag.regions import parse_region

    regions = []
    for item in items:
        try:
            regions.append(parse_region(item))
        except ValueError as exc:
            raise UserError(f"--noise-region: {exc}") from None
    return regions


# --------------------------------------------------------------------------- writing


def _stage_wav(staging, final: Path, x: np.ndarray, fs_hz: int) -> Path:
    import soundfile as sf

    # 24-bit PCM: no float PEAK chunk (it carries a time stamp), and the
    # quantisation error (about -144 dBFS) is far below anything audible.
    temp = staging.file(final)
    sf.write(str(temp), x, fs_hz, format="WAV", subtype="PCM_24")
    return temp


# --------------------------------------------------------------------------- formatting


def _num(value: float | None, digits: int = 1, signed: bool = False) -> str:
    if value is None:
        return "-"
    if math.isnan(value):
        return "n/a"
    if math.isinf(value):
        return "-inf" if value < 0 else "+inf"
    return f"{value:+.{digits}f}" if signed else f"{value:.{digits}f}"


def _json_number(value: float | None) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    return round(float(value), 4)


def _progress(items: Iterable, desc: str) -> Iterable:
    from tqdm import tqdm

    # delay: the bar appears only when the step takes more than two seconds.
    return tqdm(items, desc=desc, file=sys.stderr, delay=2.0, leave=False, unit="step")


SCORE_EXPLANATIONS = (
    "Noise-floor change: level of the version minus level of the original in the noise-only "
    "region, in dB. Negative means less noise. 'At matched loudness' adds the gain used for "
    "listening, i.e. how much quieter the noise is when the speech plays equally loud.",
    "Speech level change: the same measurement over the speech-active part, in dB. Removing "
    "noise lowers it a little; a drop of several dB suggests speech itself was attenuated "
    "(an overall gain change of the version shows up here too).",
    "WADA SNR: a blind estimate of speech-to-noise ratio from the shape of the waveform's "
    "amplitude distribution (Kim & Stern 2008), in dB. Needs no clean reference; it assumes "
    "steady, roughly Gaussian noise and can be several dB off on processed audio.",
    "Kurtosis ratio: how peaky the remaining noise's spectrum is over time, after processing "
    "relative to before (Uemura et al. 2009). Near 1: the noise kept its character. Well above "
    "1: isolated tonal blips ('musical noise') are likely audible. It needs a truly "
    "noise-only region: any trace of speech there (onsets, tails) inflates it strongly, so "
    "give --noise-region over room tone when in doubt.",
    "With a clean reference: SI-SDR (scale-invariant signal-to-distortion ratio, dB, higher is "
    "better), STOI and ESTOI (predicted intelligibility, 0 to 1, higher is better) and PESQ-WB "
    "(ITU-T P.862.2 predicted quality, about 1 to 4.6, higher is better).",
    "Scores are pointers, not verdicts: listen, blind, before choosing.",
)


def _rows(comparison, with_clean: bool) -> tuple[tuple[str, ...], list[tuple[str, ...]]]:
    cols = [
        "version",
        "noise floor change (dB)",
        "at matched loudness (dB)",
        "speech level change (dB)",
        "WADA SNR (dB)",
        "kurtosis ratio",
    ]
    if with_clean:
        cols += ["SI-SDR (dB)", "STOI", "ESTOI", "PESQ-WB"]
    rows = []
    for name in comparison.names:
        s = comparison.scores[name]
        row = [
            name,
            _num(s.noise_floor_change_db, signed=True),
            _num(s.noise_floor_change_matched_db, signed=True),
            _num(s.speech_level_change_db, signed=True),
            _num(s.wada_snr_db),
            _num(s.kurtosis_ratio, 2),
        ]
        if with_clean:
            row += [_num(s.si_sdr_db), _num(s.stoi, 3), _num(s.estoi, 3), _num(s.pesq_wb, 2)]
        rows.append(tuple(row))
    return tuple(cols), rows


def _alignment_rows(comparison) -> list[tuple[str, ...]]:
    rows = []
    loud = comparison.loudness
    for name in comparison.names:
        a = comparison.alignments.get(name)
        rows.append(
            (
                name,
                "0" if a is None else str(a.delay_samples),
                "0.00" if a is None else f"{a.delay_ms:.2f}",
                "1.00" if a is None else f"{a.peak_correlation:.2f}",
                _num(loud.loudness_lufs[name]),
                _num(loud.gain_db[name], 2, signed=True),
                _num(loud.peak_dbfs_after[name], signed=True),
            )
        )
    return rows


def _summary(comparison, inputs: dict[str, _Input], args, outputs: dict[str, str]) -> dict:
    fs = comparison.fs_hz
    regions = comparison.regions
    loud = comparison.loudness
    versions = []
    for name in comparison.names:
        a = comparison.alignments.get(name)
        s = comparison.scores[name]
        versions.append(
            {
                "name": name,
                "file": str(inputs[name].path),
                "delay_samples": 0 if a is None else a.delay_samples,
                "delay_ms": 0.0 if a is None else round(a.delay_ms, 3),
                "polarity": 1 if a is None else a.polarity,
                "peak_correlation": 1.0 if a is None else _json_number(a.peak_correlation),
                "loudness_lufs": _json_number(loud.loudness_lufs[name]),
                "gain_db": _json_number(loud.gain_db[name]),
                "peak_dbfs_after_gain": _json_number(loud.peak_dbfs_after[name]),
                "scores": {
                    "noise_floor_change_db": _json_number(s.noise_floor_change_db),
                    "noise_floor_change_matched_db": _json_number(s.noise_floor_change_matched_db),
                    "speech_level_change_db": _json_number(s.speech_level_change_db),
                    "wada_snr_db": _json_number(s.wada_snr_db),
                    "kurtosis_ratio": _json_number(s.kurtosis_ratio),
                    "si_sdr_db": _json_number(s.si_sdr_db),
                    "stoi": _json_number(s.stoi),
                    "estoi": _json_number(s.estoi),
                    "pesq_wb": _json_number(s.pesq_wb),
                },
            }
        )
    clean = None
    if comparison.clean_alignment is not None:
        ca = comparison.clean_alignment
        clean = {
            "file": str(inputs["clean"].path),
            "delay_samples": ca.delay_samples,
            "delay_ms": round(ca.delay_ms, 3),
        }
    return {
        "format": "liftmag-compare",
        "format_version": 1,
        "sample_rate_hz": int(fs),
        "channel": args.channel,
        "duration_s": round(comparison.aligned["original"].size / fs, 3),
        "noise_region": {
            "found_automatically": regions.noise_found_automatically,
            "intervals_s": [[round(a, 3), round(b, 3)] for a, b in regions.noise_intervals_s(fs)],
            "total_s": round(regions.noise.sum() / fs, 3),
        },
        "speech_active_s": round(regions.speech.sum() / fs, 3),
        "common_reduction_db": _json_number(comparison.loudness.common_reduction_db),
        "clean": clean,
        "versions": versions,
        "notes": list(comparison.notes),
        "outputs": outputs,
        "cautions": [LISTENING_CAUTION, ORIGINALS_CAUTION],
    }


def _build_sections(comparison, inputs, figures, with_clean: bool):
    from liftmag.report import Image, Section, Table

    fs = comparison.fs_hz
    regions = comparison.regions
    cols, rows = _rows(comparison, with_clean)
    intro = (
        f"Original take: {inputs['original'].path.name} ({fs:g} Hz, "
        f"{comparison.aligned['original'].size / fs:.2f} s). Compared: "
        + ", ".join(n for n in comparison.names if n != "original")
        + ". Each version was aligned to the original, and all scores refer to the "
        "original's noise-only and speech-active parts."
    )
    noise_how = (
        "found automatically from the quietest frames"
        if regions.noise_found_automatically
        else "as given with --noise-region"
    )
    sections = [
        Section(
            "Summary",
            (
                intro,
                "! " + ORIGINALS_CAUTION,
                "! " + LISTENING_CAUTION,
            ),
        ),
        Section(
            "Scores",
            (
                Table(
                    cols,
                    tuple(rows),
                    caption=f"Noise-only region: {regions.noise.sum() / fs:.2f} s, {noise_how}; "
                    f"speech-active part: {regions.speech.sum() / fs:.2f} s.",
                ),
                *SCORE_EXPLANATIONS,
            ),
        ),
        Section(
            "Alignment and loudness",
            (
                Table(
                    (
                        "version",
                        "delay (samples)",
                        "delay (ms)",
                        "correlation",
                        "speech loudness (LUFS)",
                        "listening gain (dB)",
                        "peak after gain (dBFS)",
                    ),
                    tuple(_alignment_rows(comparison)),
                    caption="Delay: how late each version is relative to the original "
                    "(cross-correlation, to the sample). Loudness: ITU-R BS.1770 integrated "
                    "loudness of the speech-active part. The listening gain brings each "
                    "version to the original's loudness.",
                ),
                *(
                    [
                        f"All listening gains include a common reduction of "
                        f"{-comparison.loudness.common_reduction_db:.1f} dB so that no file clips."
                    ]
                    if comparison.loudness.common_reduction_db < 0
                    else []
                ),
            ),
        ),
        Section(
            "Level over time",
            (
                Image(
                    figures["level-over-time"],
                    "level-over-time",
                    alt="Level over time of the original and each version",
                    caption="Short-term level of the original and of each aligned version as "
                    "delivered (before loudness matching). Grey: the noise-only region.",
                ),
            ),
        ),
        Section(
            "Spectrograms",
            tuple(
                Image(
                    figures[f"spectrogram-{name}"],
                    f"spectrogram-{name}",
                    alt=f"Spectrograms of the original, {name}, and what {name} removed",
                    caption=f"Left: original. Middle: {name}, aligned, as delivered. Right: "
                    f"what {name} removed (original minus aligned {name}); all on one colour "
                    "scale. Speech in the right panel means speech was removed or changed in "
                    "level.",
                )
                for name in comparison.names
                if name != "original"
            ),
        ),
        Section(
            "Blind listening",
            (
                f"The folder {BLIND_DIR}/ holds every version, the original included, matched "
                "in loudness and under neutral shuffled names (take-1.wav, ...). All have the "
                f"same length, format and time stamp. The key is in {KEY_JSON}: do not open it "
                "before listening; 'liftmag compare --reveal "
                f"{KEY_JSON}' prints which file is which.",
                "! " + LISTENING_CAUTION,
            ),
        ),
    ]
    if comparison.notes:
        sections.append(Section("Notes", tuple(comparison.notes)))
    return sections


# --------------------------------------------------------------------------- run


def _planned_outputs(out_dir: Path, n_takes: int, image_names: list[str]) -> list[Path]:
    paths = [out_dir / REPORT_HTML, out_dir / REPORT_MD, out_dir / SCORES_JSON, out_dir / KEY_JSON]
    paths += [out_dir / BLIND_DIR / f"take-{i + 1}.wav" for i in range(n_takes)]
    paths += [out_dir / FIGURES_DIR / f"{name}.png" for name in image_names]
    return paths


def _stale_takes(out_dir: Path, planned: list[Path]) -> list[Path]:
    blind = out_dir / BLIND_DIR
    if not blind.is_dir():
        return []
    keep = {p.name for p in planned if p.parent == blind}
    return sorted(p for p in blind.iterdir() if _TAKE_RE.match(p.name) and p.name not in keep)


def _check_outputs(
    out_dir: Path, planned: list[Path], inputs: list[Path], force: bool
) -> list[Path]:
    if out_dir.exists() and not out_dir.is_dir():
        raise UserError(f"--out {out_dir} exists and is not a folder")
    from liftmag.audio_io import AudioOutputError, refuse_destination

    resolved_inputs = {p.resolve() for p in inputs}
    for p in planned:
        if p.resolve() in resolved_inputs:
            raise UserError(f"output {p} would overwrite an input; choose another --out")
    stale = _stale_takes(out_dir, planned)
    for p in stale:
        if p.resolve() in resolved_inputs:
            # Replacing the blind set would delete it: an input is never deleted.
            raise UserError(
                f"input {p} is a blind file of an earlier comparison in {out_dir}; copy it "
                "elsewhere first or choose another --out"
            )
    for p in planned + stale:
        if p.parent.is_dir() and os.path.lexists(p):
            try:  # --force replaces regular files only: never a folder, FIFO or device
                refuse_destination(p, inputs, force=True)
            except AudioOutputError as exc:
                raise UserError(str(exc)) from None
    if not force:
        existing = [p for p in planned if p.exists()] + stale
        if existing:
            raise UserError(
                f"{existing[0]} already exists (and {len(existing) - 1} more outputs); "
                "use --force to replace them or choose another --out"
            )
    return stale


def _reveal(key_path_text: str, as_json: bool) -> int:
    key_path = Path(key_path_text)
    if not key_path.is_file():
        raise UserError(f"key not found: {key_path}")
    try:
        key = json.loads(key_path.read_text(encoding="utf-8"))
        if key.get("format") != KEY_FORMAT:
            raise ValueError
        takes = key["takes"]
        blind_dir = key_path.parent / key["blind_folder"]
    except (ValueError, KeyError, TypeError, UnicodeDecodeError):
        raise UserError(f"{key_path} is not a liftmag blind key") from None
    from liftmag import audio_io

    result = []
    for label in sorted(takes, key=lambda t: int(re.sub(r"\D", "", t) or 0)):
        entry = takes[label]
        path = blind_dir / label
        if not path.is_file():
            status = "missing"
        elif audio_io.sha256_file(path) != entry.get("sha256"):
            status = "changed since the key was written"
        else:
            status = "ok"
        result.append(
            {"file": label, "name": entry["name"], "source": entry["source"], "status": status}
        )
    if as_json:
        print(json.dumps({"blind_folder": str(blind_dir), "takes": result}, indent=2))
    else:
        width = max(len(r["file"]) for r in result)
        for r in result:
            flag = "" if r["status"] == "ok" else f"   [{r['status']}]"
            print(f"{r['file']:<{width}}  is  {r['name']}   ({r['source']}){flag}")
    return 0


@stoppable("compare")
def run(args: argparse.Namespace) -> int:
    if args.reveal:
        return _reveal(args.reveal, args.json)
    if not args.original:
        raise UserError("give the ORIGINAL take (or --reveal KEY)")
    if not args.liftmag:
        raise UserError("give liftmag's output with --liftmag FILE")
    if args.channel < 0:
        raise UserError("--channel must be 0 or more")
    versions = _parse_versions(args.versions)
    noise_regions = _parse_regions(args.noise_regions)
    names = ["original", "liftmag", *(n for n, _ in versions)]
    out_dir = Path(args.out)
    image_names = ["level-over-time", *(f"spectrogram-{n}" for n in names[1:])]
    planned = _planned_outputs(out_dir, len(names), image_names)
    input_paths = [Path(args.original), Path(args.liftmag), *(Path(f) for _, f in versions)]
    if args.clean:
        input_paths.append(Path(args.clean))
    stale = _check_outputs(out_dir, planned, input_paths, args.force)

    original = _load(args.original, "original", args.channel, None)
    fs = original.fs_hz
    inputs = {"original": original, "liftmag": _load(args.liftmag, "liftmag", args.channel, fs)}
    for name, file in versions:
        inputs[name] = _load(file, f"version {name}", args.channel, fs)
    if args.clean:
        inputs["clean"] = _load(args.clean, "clean reference", args.channel, fs)
    duration_s = original.signal.size / fs
    for a, _ in noise_regions:
        if a >= duration_s:
            raise UserError(
                f"--noise-region starting at {a:g} s lies beyond the original's end "
                f"({duration_s:.2f} s)"
            )
    if original.signal.size < round(0.5 * fs):
        raise UserError(f"the original is {duration_s:.2f} s long; at least 0.5 s is needed")

    from liftmag import abcompare

    try:
        comparison = abcompare.compare_takes(
            original.signal,
            {n: inputs[n].signal for n in names[1:]},
            fs,
            clean=inputs["clean"].signal if args.clean else None,
            noise_intervals_s=noise_regions or None,
            progress=_progress,
        )
    except ValueError as exc:
        raise UserError(str(exc)) from None
    input_notes = [note for inp in inputs.values() for note in inp.notes]
    comparison = _with_notes(comparison, input_notes)

    figures = _figures(comparison)
    labels = abcompare.blind_labels(names)
    outputs = {
        "html": str(out_dir / REPORT_HTML),
        "markdown": str(out_dir / REPORT_MD),
        "json": str(out_dir / SCORES_JSON),
        "blind_folder": str(out_dir / BLIND_DIR),
        "blind_key": str(out_dir / KEY_JSON),
    }
    summary = _summary(comparison, inputs, args, outputs)
    _write_all(out_dir, comparison, inputs, figures, labels, summary, stale, bool(args.clean))

    if args.json:
        print(json.dumps(summary, indent=2))
        print(LISTENING_CAUTION, file=sys.stderr)
    else:
        _print_human(comparison, out_dir, bool(args.clean))
    return 0


def _with_notes(comparison, extra: list[str]):
    import dataclasses

    return dataclasses.replace(comparison, notes=(*extra, *comparison.notes))


def _figures(comparison) -> dict[str, bytes]:
    from liftmag import report

    fs = comparison.fs_hz
    x = comparison.aligned["original"]
    figures: dict[str, bytes] = {}
    versions = [n for n in comparison.names if n != "original"]
    for name in _progress(versions, "spectrograms"):
        v = comparison.aligned[name]
        figures[f"spectrogram-{name}"] = report.spectrogram_row_png(
            [("original", x), (name, v), (f"removed by {name}", x - v)], fs
        )
    figures["level-over-time"] = report.level_over_time_png(
        [(n, comparison.aligned[n]) for n in comparison.names],
        fs,
        shade_s=comparison.regions.noise_intervals_s(fs),
    )
    return figures


def _write_all(out_dir, comparison, inputs, figures, labels, summary, stale, with_clean) -> None:
    from liftmag import report

    sections = _build_sections(comparison, inputs, figures, with_clean)
    title = "liftmag compare: " + inputs["original"].path.name
    fs = int(comparison.fs_hz)
    from liftmag import audio_io

    staging = audio_io.StagedOutputs()
    try:
        staging.ensure_dir(out_dir)
        # Written in label order, so creation order (and inode numbers) follow
        # the neutral labels, not the versions behind them.
        blind_paths = []
        key = {
            "format": KEY_FORMAT,
            "format_version": KEY_FORMAT_VERSION,
            "blind_folder": BLIND_DIR,
            "takes": {},
        }
        for label in sorted(labels, key=lambda t: int(t.split("-")[1])):
            name = labels[label]
            path = out_dir / BLIND_DIR / f"{label}.wav"
            temp = _stage_wav(staging, path, comparison.matched[name], fs)
            blind_paths.append(path)
            key["takes"][path.name] = {
                "name": name,
                "source": str(inputs[name].path.resolve()),
                "gain_db": round(comparison.loudness.gain_db[name], 3),
                "sha256": audio_io.sha256_file(temp),
            }
        staging.write_text(out_dir / KEY_JSON, json.dumps(key, indent=2) + "\n")
        for name, png in figures.items():
            staging.write_bytes(out_dir / FIGURES_DIR / f"{name}.png", png)
        staging.write_text(out_dir / REPORT_HTML, report.html_page(title, sections))
        image_paths = {name: f"{FIGURES_DIR}/{name}.png" for name in figures}
        staging.write_text(out_dir / REPORT_MD, report.markdown_page(title, sections, image_paths))
        staging.write_text(out_dir / SCORES_JSON, json.dumps(summary, indent=2) + "\n")
    except OSError as exc:
        staging.rollback()
        raise UserError(f"cannot write to {out_dir}: {exc.strerror or exc}") from None
    except BaseException:
        staging.rollback()
        raise
    staging.commit()
    for path in stale:
        with contextlib.suppress(OSError):
            path.unlink()
    # One shared, whole-second modification time: the files' times say nothing
    # about which version is which.
    stamp_ns = int(time.time()) * 1_000_000_000
    for path in blind_paths:
        os.utime(path, ns=(stamp_ns, stamp_ns))


def _print_human(comparison, out_dir: Path, with_clean: bool) -> None:
    cols, rows = _rows(comparison, with_clean)
    widths = [max(len(c), *(len(r[i]) for r in rows)) for i, c in enumerate(cols)]
    print("  ".join(c.ljust(w) for c, w in zip(cols, widths, strict=True)))
    for r in rows:
        print("  ".join(v.ljust(w) for v, w in zip(r, widths, strict=True)))
    print()
    for name in comparison.names:
        a = comparison.alignments.get(name)
        if a is not None:
            print(
                f"{name}: delay {a.delay_samples} samples ({a.delay_ms:.2f} ms), "
                f"listening gain {comparison.loudness.gain_db[name]:+.2f} dB"
            )
    for note in comparison.notes:
        print(f"note: {note}")
    print(f"report: {out_dir / REPORT_HTML}  (also {REPORT_MD}, {SCORES_JSON})")
    print(f"blind listening: {out_dir / BLIND_DIR}/  key: {out_dir / KEY_JSON}")
    print(f"caution: {LISTENING_CAUTION}")
    print(f"caution: {ORIGINALS_CAUTION}")
