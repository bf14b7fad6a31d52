"""``liftmag process``: clean one multichannel take (or a group of mono stems)."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from liftmag.commands.common import (
    CAUTION,
    add_settings_arguments,
    parse_region,
    print_json,
    progress_bar,
    settings_from_args,
    stoppable,
)

HELP = (
    "Clean dialogue in one take recorded with two or more microphones. Give one "
    "multichannel file, or one mono file per microphone (grouped in the order given). "
    "The output keeps the input's sample rate, length, format and subtype, and the "
    "bext/iXML chunks of a broadcast WAV. " + CAUTION
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("inputs", nargs="+", metavar="INPUT", help="take file(s)")
    parser.add_argument("-o", "--output", required=True, help="output file")
    noise = parser.add_mutually_exclusive_group()
    noise.add_argument(
        "--noise-region", action="append", type=parse_region, default=[],
        metavar="START:END", help="noise-only stretch of the take in seconds (repeatable)",
    )
    noise.add_argument(
        "--noise-model",
        help="noise model learned with `liftmag learn`; with it (or --noise-region) the noise "
        "is held as learned unless --noise-mode track is given",
    )
    parser.add_argument("--subtype", help="output subtype, e.g. PCM_24 or FLOAT (default: input's)")
    parser.add_argument("--force", action="store_true", help="replace an existing output")
    parser.add_argument("--json", action="store_true", help="print a JSON summary on stdout")
    add_settings_arguments(parser)


@stoppable("process")
def run(args: argparse.Namespace) -> int:
    from liftmag.audio_io import (
        AudioInputError,
        AudioOutputError,
        OutputExistsError,
        refuse_destination,
    )
    from liftmag.cli import UserError
    from liftmag.fileproc import load_noise_model, open_source, process_file

    learned = bool(args.noise_region or args.noise_model)
    # A learned model is held as learned unless the user asks the tracker to keep going.
    settings = settings_from_args(args, noise_mode=args.noise_mode or ("hold" if learned else None))
    try:
        source = open_source(args.inputs)
        model = load_noise_model(args.noise_model) if args.noise_model else None
        out = Path(args.output)
        refuse_destination(out, args.inputs, args.force)
        result = process_file(
            args.inputs, out, settings, noise_model=model, noise_regions_s=args.noise_region,
            force=args.force, subtype=args.subtype,
            progress=progress_bar("cleaning", source.frames, source.sample_rate_hz),
        )
    except OutputExistsError:
        raise UserError(f"{out} exists; add --force to replace it") from None
    except (AudioInputError, AudioOutputError, ValueError) as exc:
        raise UserError(str(exc)) from exc
    for warning in result.warnings:
        print(f"liftmag process: warning: {warning}", file=sys.stderr)
    if args.json:
        print_json(result.to_dict())
        return 0
    lifted = (
        f"; lift used in {100 * result.lifted_fraction:.0f} % of bins"
        if settings.estimator == "auto" else ""
    )
    print(
        f"wrote {result.output} ({result.channels_out} ch, {result.duration_s:.1f} s, "
        f"{settings.estimator}, {settings.output_mode}{lifted}; noise: "
        f"{result.noise_source}; {result.realtime_factor:.0f}x real time)"
    )
    if settings.estimator == "auto" and result.lifted_share_by_band:
        # Where the lift was used: bands whose noise showed non-Gaussian structure.
        bands = ", ".join(
            f"{lo:g}-{hi:g} Hz {100 * share:.0f} %" for lo, hi, share in result.lifted_share_by_band
        )
        print(f"  lifted estimator, share of frames per band: {bands}")
    return 0
