"""``liftmag process``: clean one multichannel take (or a group of mono stems)."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from liftmag.commands.common import (
    CAUTION,
    add_settings_arguments,
    check_figure_path,
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
    "bext/iXML chunks of a broadcast WAV, rewritten to describe the output: the iXML "
    "track list names the output's tracks and the bext coding history gains one line "
    "saying what liftmag did. Choose the array's microphones among a take's tracks with "
    "--mics (see them with `liftmag tracks FILE`). " + CAUTION
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
    parser.add_argument(
        "--one-pass", action="store_true",
        help="skip the first pass over the whole take (its noise pauses and talker); the "
             "output then equals the LV2 plugin's with the same settings, delayed by its "
             "reported latency",
    )
    add_talker_arguments(parser)
    parser.add_argument(
        "--talker-map", metavar="FILE",
        help="also draw who talks from where (.png, .svg or .pdf): each 64 ms frame's time "
             "difference between the first and last microphone, coloured by the voice it "
             "belongs to and what was done with it; only when the voices were searched (no "
             "room tone or noise region, --other-voices find)",
    )
    add_mics_argument(parser)
    add_settings_arguments(parser)
    offer_file_output_modes(parser)


def add_talker_arguments(parser: argparse.ArgumentParser) -> None:
    """``--talker-region`` and ``--other-voices``, shared by ``process`` and ``batch``."""
    parser.add_argument(
        "--talker-region", action="append", type=parse_region, default=[],
        metavar="START:END",
        help="a stretch of the take in seconds where only the wanted talker speaks "
             "(repeatable): decides which voice is kept when the take holds several",
    )
    parser.add_argument(
        "--other-voices", choices=("find", "ignore"), default="find",
        help="find: when no room tone or noise region is given, read the take once more to "
             "find voices from other directions and learn them as noise, keeping the most "
             "direct one (or the one chosen by --target-deg or --talker-region); "
             "ignore: treat every voice as the talker (default: find)",
    )


def add_mics_argument(parser: argparse.ArgumentParser) -> None:
    """``--mics LIST``, shared by ``process`` and ``batch`` (parsed by ``tracks.parse_mics``)."""
    parser.add_argument(
        "--mics", metavar="LIST",
        help="the tracks that form the microphone array, in order, by 1-based number or "
             "iXML track name, e.g. 1,2 or BOOM,LAV1 (default: every track). The first is "
             "the reference; --reference-channel, if given, counts positions in this list "
             "from 0. Other tracks (mix tracks) are not used by the estimate",
    )


def offer_file_output_modes(parser: argparse.ArgumentParser) -> None:
    """Add the file-only output modes (``same-tracks``) to ``--output-mode``.

    They are not engine settings (so not LV2 controls): the engine cleans the reference
    as in ``cleaned`` mode and the file layer writes the other tracks around it.
    """
    from liftmag.tracks import FILE_OUTPUT_MODE_HELP, FILE_OUTPUT_MODES

    action = next(a for a in parser._actions if a.dest == "output_mode")
    action.choices = (*action.choices, *FILE_OUTPUT_MODES)
    action.metavar = "{" + ",".join(action.choices) + "}"
    action.help = (action.help or "") + ". " + "; ".join(
        f"{mode}: {text}" for mode, text in FILE_OUTPUT_MODE_HELP.items()
    )


def split_output_mode(output_mode: str | None) -> tuple[str | None, bool]:
    """``--output-mode`` -> (the engine's output mode, whether to write the same tracks)."""
    from liftmag.tracks import SAME_TRACKS

    if output_mode == SAME_TRACKS:
        return "cleaned", True
    return output_mode, False


def _write_talker_map(path: Path, result, settings) -> bool:
    """Draw the take's talker map into ``path``, or say why there is none."""
    from liftmag import report
    from liftmag.audio_io import AudioOutputError, write_atomically
    from liftmag.errors import UserError

    talker_map = result.talker_map
    if talker_map is None or talker_map.features is None:
        print("liftmag process: warning: no talker map written: the voices are searched only "
              "without room tone or a noise region, and with --other-voices find",
              file=sys.stderr)
        return False
    data = report.talker_map_figure(talker_map.features, talker_map,
                                    spacing_m=settings.mic_spacing_m,
                                    fmt=path.suffix.lower().lstrip("."))
    try:
        write_atomically(path, data)
    except AudioOutputError as exc:
        raise UserError(str(exc)) from exc
    return True


@stoppable("process")
def run(args: argparse.Namespace) -> int:
    from liftmag.audio_io import (
        AudioInputError,
        AudioOutputError,
        OutputExistsError,
        refuse_destination,
    )
    from liftmag.errors import UserError
    from liftmag.fileproc import load_noise_model, open_source, process_file
    from liftmag.settings import noise_mode_given_learned
    from liftmag.tracks import parse_mics

    learned = bool(args.noise_region or args.noise_model)
    args.output_mode, same_tracks = split_output_mode(args.output_mode)
    settings = settings_from_args(
        args, noise_mode=noise_mode_given_learned(args.noise_mode, learned)
    )
    try:
        mics = parse_mics(args.mics) if args.mics is not None else ()
        source = open_source(args.inputs)
        model = load_noise_model(args.noise_model) if args.noise_model else None
        out = Path(args.output)
        refuse_destination(out, args.inputs, args.force)
        figure = Path(args.talker_map) if args.talker_map else None
        if figure is not None:
            if figure.resolve() == out.resolve():
                raise UserError(f"--talker-map {figure} is the output file; give another name")
            check_figure_path(figure, "--talker-map", args.force, args.inputs)
        result = process_file(
            args.inputs, out, settings, noise_model=model, noise_regions_s=args.noise_region,
            force=args.force, subtype=args.subtype, mics=mics, same_tracks=same_tracks,
            whole_take=not args.one_pass,
            find_talkers=args.other_voices == "find", talker_regions_s=args.talker_region,
            progress=progress_bar("cleaning", source.frames, source.sample_rate_hz),
        )
    except OutputExistsError:
        raise UserError(f"{out} exists; add --force to replace it") from None
    except (AudioInputError, AudioOutputError, ValueError) as exc:
        raise UserError(str(exc)) from exc
    drawn = figure is not None and _write_talker_map(figure, result, settings)
    for warning in result.warnings:
        print(f"liftmag process: warning: {warning}", file=sys.stderr)
    if args.json:
        print_json({**result.to_dict(), "talker_map_file": str(figure) if drawn else None})
        return 0
    lifted = (
        f"; lift used in {100 * result.lifted_fraction:.0f} % of bins"
        if settings.estimator == "auto" else ""
    )
    print(
        f"wrote {result.output} ({result.channels_out} ch, {result.duration_s:.1f} s, "
        f"{settings.estimator}, {result.output_mode}{lifted}; noise: "
        f"{result.noise_source}; {result.realtime_factor:.0f}x real time)"
    )
    if settings.estimator == "auto" and result.lifted_share_by_band:
        # Where the lift was used: bands whose noise showed non-Gaussian structure.
        bands = ", ".join(
            f"{lo:g}-{hi:g} Hz {100 * share:.0f} %" for lo, hi, share in result.lifted_share_by_band
        )
        print(f"  lifted estimator, share of frames per band: {bands}")
    if result.talker_summary:
        print(f"  talkers: {result.talker_summary}")
    if drawn:
        print(f"  talker map: {figure}")
    return 0
