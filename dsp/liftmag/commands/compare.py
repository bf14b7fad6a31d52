"""``liftmag compare``: A/B liftmag's output against other versions of a take.

Thin edge: parses the options, reads the inputs with :mod:`liftmag.audio_io`, calls
:mod:`liftmag.abcompare` (alignment, loudness, scores, blind labels and key) and
:mod:`liftmag.compare_report` (tables, text, figures, and the output folder, written all
together or not at all), and prints.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import os
import re
import sys
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

_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,39}$")
_RESERVED = {"original", "liftmag", "clean"}


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "original", nargs="?", metavar="ORIGINAL", help="the original, unprocessed take"
    )
    parser.add_argument("--liftmag", metavar="FILE", help="liftmag's output for this take")
    parser.add_argument(
        "--other",
        dest="versions",
        action="append",
        default=[],
        metavar="NAME=FILE",
        help="another processed version (repeatable); NAME: letters, digits, _ . -",
    )
    # The first spelling, kept hidden for one release: it read like the program's --version.
    parser.add_argument(
        "--version", dest="versions", action="append", default=[], help=argparse.SUPPRESS
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
            raise UserError(f"--other expects NAME=FILE, got {item!r}")
        if not _NAME_RE.match(name):
            raise UserError(
                f"--other name {name!r}: use 1 to 40 letters, digits, '_', '.' or '-', "
                "starting with a letter or digit"
            )
        if name.lower() in _RESERVED:
            raise UserError(f"--other name {name!r} is reserved; choose another")
        if any(name == n for n, _ in out):
            raise UserError(f"--other name {name!r} is given twice")
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


def _progress(items: Iterable, desc: str) -> Iterable:
    from tqdm import tqdm

    # delay: the bar appears only when the step takes more than two seconds.
    return tqdm(items, desc=desc, file=sys.stderr, delay=2.0, leave=False, unit="step")


# --------------------------------------------------------------------------- run


def _check_outputs(
    out_dir: Path, planned: list[Path], inputs: list[Path], force: bool
) -> list[Path]:
    if out_dir.exists() and not out_dir.is_dir():
        raise UserError(f"--out {out_dir} exists and is not a folder")
    from liftmag import compare_report
    from liftmag.audio_io import AudioOutputError, refuse_destination

    resolved_inputs = {p.resolve() for p in inputs}
    for p in planned:
        if p.resolve() in resolved_inputs:
            raise UserError(f"output {p} would overwrite an input; choose another --out")
    stale = compare_report.stale_takes(out_dir, planned)
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
    from liftmag import abcompare, audio_io

    key_path = Path(key_path_text)
    if not key_path.is_file():
        raise UserError(f"key not found: {key_path}")
    try:
        folder, takes = abcompare.parse_blind_key(key_path.read_text(encoding="utf-8"))
    except (ValueError, UnicodeDecodeError):
        raise UserError(f"{key_path} is not a liftmag blind key") from None
    blind_dir = key_path.parent / folder
    result = []
    for take in takes:
        path = blind_dir / take.file
        if not path.is_file():
            status = "missing"
        elif audio_io.sha256_file(path) != take.sha256:
            status = "changed since the key was written"
        else:
            status = "ok"
        result.append({"file": take.file, "name": take.name, "source": take.source,
                       "status": status})
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
    from liftmag import compare_report

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
    planned = compare_report.planned_outputs(out_dir, len(names), image_names)
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
    comparison = dataclasses.replace(comparison, notes=(*input_notes, *comparison.notes))

    pngs = compare_report.figures(comparison, _progress)
    labels = abcompare.blind_labels(names)
    outputs = {
        "html": str(out_dir / compare_report.REPORT_HTML),
        "markdown": str(out_dir / compare_report.REPORT_MD),
        "json": str(out_dir / compare_report.SCORES_JSON),
        "blind_folder": str(out_dir / compare_report.BLIND_DIR),
        "blind_key": str(out_dir / compare_report.KEY_JSON),
    }
    sources = {name: inp.path for name, inp in inputs.items()}
    summary = compare_report.summary(comparison, sources, args.channel, outputs)
    try:
        compare_report.write_comparison(
            out_dir, comparison, sources, pngs, labels, summary, stale, bool(args.clean)
        )
    except OSError as exc:
        raise UserError(f"cannot write to {out_dir}: {exc.strerror or exc}") from None

    if args.json:
        print(json.dumps(summary, indent=2))
        print(compare_report.LISTENING_CAUTION, file=sys.stderr)
    else:
        print("\n".join(compare_report.human_lines(comparison, out_dir, bool(args.clean))))
    return 0
