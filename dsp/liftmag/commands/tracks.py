"""``liftmag tracks``: list a take's tracks (number, name, level) to choose ``--mics`` from."""

from __future__ import annotations

import argparse

from liftmag.commands.common import print_json

HELP = (
    "List the tracks of one or more takes: number, iXML track name, the recorder's own "
    "track number, and level (peak and RMS in dBFS, RMS against full-scale DC so a "
    "full-scale sine reads -3.0). Use the numbers or names with `liftmag process --mics`. "
    "Reads the whole file to measure the levels; changes nothing."
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("inputs", nargs="+", metavar="FILE", help="take file(s)")
    parser.add_argument("--json", action="store_true", help="print the list as JSON")


def run(args: argparse.Namespace) -> int:
    from liftmag import audio_io
    from liftmag.errors import UserError
    from liftmag.fileproc import BLOCK_FRAMES
    from liftmag.tracks import dbfs_text, source_tracks, track_levels_db

    listed = []
    try:
        for path in args.inputs:
            info = audio_io.probe(path)
            found = source_tracks(info)
            peak_db, rms_db = track_levels_db(audio_io.read_blocks(info, BLOCK_FRAMES))
            listed.append((info, found, peak_db, rms_db))
    except ValueError as exc:
        raise UserError(str(exc)) from exc
    if args.json:
        print_json([
            {
                "file": str(info.path), "sample_rate_hz": info.sample_rate_hz,
                "duration_s": round(info.duration_s, 3),
                "tracks": [
                    {
                        "number": t.index, "name": t.name,
                        "recorder_track": t.ixml.channel_index if t.ixml else None,
                        "peak_dbfs": _json_level(peak), "rms_dbfs": _json_level(rms),
                    }
                    for t, peak, rms in zip(found, peak_db, rms_db, strict=True)
                ],
            }
            for info, found, peak_db, rms_db in listed
        ])
        return 0
    for info, found, peak_db, rms_db in listed:
        print(f"{info.path}: {len(found)} tracks, {info.sample_rate_hz} Hz, "
              f"{info.duration_s:.1f} s")
        names = [t.name or "(no name)" for t in found]
        width = max(4, *(len(n) for n in names))
        print(f"  {'#':>3}  {'name':<{width}}  {'rec':>3}  {'peak dBFS':>9}  {'RMS dBFS':>8}")
        for t, name, peak, rms in zip(found, names, peak_db, rms_db, strict=True):
            rec = str(t.ixml.channel_index) if t.ixml and t.ixml.channel_index else "-"
            print(f"  {t.index:>3}  {name:<{width}}  {rec:>3}  {dbfs_text(peak):>9}  "
                  f"{dbfs_text(rms):>8}")
    return 0


def _json_level(level_db: float) -> float | None:
    return round(float(level_db), 2) if level_db > -float("inf") else None
