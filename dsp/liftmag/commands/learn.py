"""``liftmag learn``: learn a reusable noise model from room tone."""

from __future__ import annotations

import argparse
from pathlib import Path

from liftmag.commands.common import parse_region, print_json, stoppable

HELP = (
    "Learn a noise model from room tone (a recording of the location with nobody "
    "talking, 30 s is ordinary practice) and save it for `liftmag process --noise-model`. "
    "All of the recording is used; give --region to use only parts of it."
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("inputs", nargs="+", metavar="ROOMTONE", help="room-tone file(s)")
    parser.add_argument("-o", "--output", required=True, help="noise model file (.npz)")
    parser.add_argument(
        "--region", action="append", type=parse_region, default=[], metavar="START:END",
        help="use only this stretch, in seconds (repeatable)",
    )
    parser.add_argument(
        "--frame-s", type=float, default=None,
        help="STFT frame length; must match the one used when processing (default 0.128)",
    )
    parser.add_argument(
        "--mics", metavar="LIST",
        help="learn only these tracks, by 1-based number or iXML track name, e.g. BOOM,LAV1: "
             "the same tracks as `process --mics` (default: every track)",
    )
    parser.add_argument("--force", action="store_true", help="replace an existing model file")
    parser.add_argument("--json", action="store_true", help="print a JSON summary on stdout")


@stoppable("learn")
def run(args: argparse.Namespace) -> int:
    from liftmag.audio_io import (
        AudioInputError,
        AudioOutputError,
        OutputExistsError,
        refuse_destination,
        write_atomically,
    )
    from liftmag.errors import UserError
    from liftmag.fileproc import learn_noise, mic_channels, open_source
    from liftmag.settings import Settings
    from liftmag.tracks import parse_mics

    out = Path(args.output)
    try:
        if out.parent.is_dir():  # a missing folder is made below
            refuse_destination(out, args.inputs, args.force)
    except OutputExistsError:
        raise UserError(f"{out} exists; add --force to replace it") from None
    except AudioOutputError as exc:
        raise UserError(str(exc)) from None
    try:
        settings = Settings() if args.frame_s is None else Settings(frame_s=args.frame_s)
        source = open_source(args.inputs)
        channels = mic_channels(source, parse_mics(args.mics)) if args.mics else None
        model = learn_noise(
            source, settings, args.region,
            description="learned from " + ", ".join(Path(p).name for p in args.inputs),
            channels=channels,
        )
    except (AudioInputError, ValueError) as exc:
        raise UserError(str(exc)) from exc
    data = model.to_bytes()
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        write_atomically(out, data)
    except AudioOutputError as exc:
        raise UserError(str(exc)) from None
    except OSError as exc:
        raise UserError(f"cannot write {out}: {exc.strerror or exc}") from None
    summary = {
        "output": str(out), "channels": model.n_channels, "sample_rate_hz": model.sample_rate_hz,
        "frames": model.frames, "duration_s": round(model.duration_s, 3),
        "frame_length": model.frame_length, "hop": model.hop,
    }
    if args.json:
        print_json(summary)
    else:
        print(
            f"wrote {out}: {model.n_channels}-channel noise model from "
            f"{model.duration_s:.1f} s of room tone at {model.sample_rate_hz:g} Hz"
        )
    return 0
