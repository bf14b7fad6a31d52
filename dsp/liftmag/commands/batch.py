"""``liftmag batch``: clean many takes in parallel, resumably (the work is in liftmag.batch)."""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path
from typing import Any

from liftmag.commands.common import (
    CAUTION,
    add_settings_arguments,
    print_json,
    stop_signals_as_interrupt,
)
from liftmag.commands.process import (
    add_mics_argument,
    offer_file_output_modes,
    split_output_mode,
)

HELP = (
    "Clean many takes with one command: files, folders (searched recursively) and globs, "
    "or a CSV manifest with one row per take. Outputs mirror the input tree under --out, "
    "keep each input's format, and are written atomically; originals are only read. "
    "A log of every take (JSON lines) is kept in DIR/liftmag-batch.jsonl, and what made "
    "each output in DIR/.liftmag-batch/ (nothing hidden sits beside the outputs). Running the "
    "same command again skips takes whose output was made from the same input bytes, "
    "settings, noise model and liftmag version (--redo forces them); Ctrl-C stops "
    "cleanly and leaves no partial files. Mono stems of one take are grouped by a "
    "channel suffix (--group-by-suffix '_(\\d+)$' groups take7_1.wav, take7_2.wav into "
    "take7.wav) or by listing them in one manifest row, separated by ';' or '|'. "
    "Manifest columns: input, output (relative to --out), optional room_tone or "
    "noise_model (input, room-tone and model paths are relative to the manifest's "
    "folder), and any processing setting by its field name (e.g. estimator, "
    "reduction_limit_db) to override the batch-wide value for that row, and mics "
    "(e.g. \"BOOM,LAV1\" or \"1,2\", quoted) to choose that take's microphones. "
    "With --cluster, takes go to an existing Dask scheduler instead of local processes "
    "(needs pip install 'liftmag[cluster]' on this machine and every worker): start one "
    "with `dask scheduler` (it prints its address, e.g. tcp://10.0.0.5:8786) and a "
    "worker per machine with `dask worker tcp://10.0.0.5:8786 --nthreads 1 --nworkers N`. "
    "Every worker must see the inputs, the room tone or noise model and --out at the "
    "same absolute paths (shared storage), and only one batch may write into a folder "
    "at a time. Dask's worker nanny sets MALLOC_TRIM_THRESHOLD_=65536, which halves "
    "liftmag's speed; set distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_ to "
    "null in the workers' Dask config (or start them with --no-nanny). "
    "Exit status: 0 when every take is done or up to date, 1 when any take "
    "failed, 2 for a bad request, 130 when interrupted. " + CAUTION
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "inputs", nargs="*", metavar="INPUT", help="take files, folders or globs (quote globs)"
    )
    parser.add_argument("--manifest", metavar="FILE.csv", help="one row per take (see above)")
    parser.add_argument("--out", required=True, metavar="DIR", help="folder for the outputs")
    parser.add_argument(
        "--group-by-suffix", metavar="REGEX",
        help="group mono files whose names differ only by this channel suffix; the "
             r"captured number orders the channels, e.g. '_(\d+)$' or '.ch(\d)'",
    )
    noise = parser.add_mutually_exclusive_group()
    noise.add_argument(
        "--room-tone", action="append", metavar="FILE",
        help="room tone to learn one noise model from, used for every take (repeat the "
             "option for mono stems, in channel order)",
    )
    noise.add_argument("--noise-model", metavar="FILE", help="noise model for every take")
    parser.add_argument(
        "--jobs", type=int, metavar="N", help="local worker processes (default: one per core)"
    )
    parser.add_argument(
        "--cluster", metavar="ADDRESS",
        help="address of a running Dask scheduler, e.g. tcp://10.0.0.5:8786",
    )
    parser.add_argument("--redo", action="store_true", help="process up-to-date takes again")
    parser.add_argument("--subtype", help="output subtype, e.g. PCM_24 or FLOAT (default: input's)")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")
    add_mics_argument(parser)
    add_settings_arguments(parser)
    offer_file_output_modes(parser)


def run(args: argparse.Namespace) -> int:
    from liftmag import batch
    from liftmag.errors import UserError
    from liftmag.settings import settings_fields
    from liftmag.tracks import parse_mics

    out_dir = Path(os.path.abspath(args.out))
    base_values = {
        f.name: getattr(args, f.name)
        for f in settings_fields()
        if getattr(args, f.name, None) is not None
    }
    output_mode, same_tracks = split_output_mode(base_values.pop("output_mode", None))
    if output_mode is not None:
        base_values["output_mode"] = output_mode
    try:
        mics = parse_mics(args.mics) if args.mics is not None else ()
        _check_request(args, base_values)
        plans = batch.check_outputs(
            _plans(args, out_dir), protected=[*(args.room_tone or ()), *filter(None, [
                args.noise_model])],
        )
        resolver = batch.NoiseResolver(out_dir / batch.STATE_DIR_NAME)
        batch_noise = _batch_noise(args, resolver, base_values, mics)
        jobs, refused = batch.build_jobs(
            plans, base_values, batch_noise, resolver, subtype=args.subtype, redo=args.redo,
            mics=mics, same_tracks=same_tracks,
        )
        n_workers = min(args.jobs or batch.default_workers(), max(1, len(jobs)))
        options = batch.BatchOptions(
            out_dir=out_dir, n_workers=n_workers, cluster=args.cluster, redo=args.redo,
            subtype=args.subtype,
        )
        # `kill` (SIGTERM) and a closed terminal (SIGHUP) stop the batch as Ctrl-C does.
        with stop_signals_as_interrupt(), _progress(len(jobs) + len(refused)) as on_record:
            outcome = batch.run_batch(
                jobs, refused, options, on_record,
                log_header={"settings": base_values, "argv": sys.argv[1:]},
                on_note=lambda text: print(f"liftmag batch: note: {text}", file=sys.stderr),
            )
    except (batch.BatchError, ValueError, OSError) as exc:
        raise UserError(batch.one_line(exc)) from exc
    _report(outcome, out_dir / batch.LOG_NAME, args.json)
    if outcome.interrupted:
        return 130
    return 1 if outcome.failed else 0


def _check_request(args: argparse.Namespace, base_values: dict[str, Any]) -> None:
    from liftmag.batch import BatchError
    from liftmag.settings import Settings

    if Path(args.out).exists() and not Path(args.out).is_dir():
        raise BatchError(f"--out {args.out} is a file; give a folder for the outputs")
    if args.manifest and args.inputs:
        raise BatchError("give input files/folders or --manifest, not both")
    if not args.manifest and not args.inputs:
        raise BatchError("nothing to process: give files, folders, globs or --manifest")
    if args.manifest and args.group_by_suffix:
        raise BatchError("--group-by-suffix applies to files and folders; in a manifest, "
                         "list a take's stems in its input cell separated by ';'")
    if args.jobs is not None and args.jobs < 1:
        raise BatchError(f"--jobs must be at least 1, got {args.jobs}")
    if args.subtype and args.subtype.upper() not in _known_subtypes():
        raise BatchError(f"--subtype {args.subtype}: unknown; e.g. PCM_16, PCM_24, FLOAT")
    if args.jobs is not None and args.cluster:
        raise BatchError("--jobs is for local workers; with --cluster, Dask decides")
    Settings(**base_values)  # refuse bad batch-wide settings before any work


def _known_subtypes() -> set[str]:
    import soundfile as sf

    return set(sf.available_subtypes())


def _plans(args: argparse.Namespace, out_dir: Path):
    from liftmag import batch

    if args.manifest:
        return batch.read_manifest(args.manifest, out_dir)
    return batch.plan_from_selection(args.inputs, out_dir, args.group_by_suffix)


def _batch_noise(
    args: argparse.Namespace, resolver, base_values: dict[str, Any], mics: tuple[str, ...]
):
    from liftmag.batch import NoiseSource
    from liftmag.settings import Settings

    if args.noise_model:
        source = NoiseSource("model", (args.noise_model,))
    elif args.room_tone:
        source = NoiseSource("room-tone", tuple(args.room_tone))
    else:
        return None
    # A bad batch-wide room tone would fail every take: refuse the batch at once.
    return resolver.resolve(source, Settings(**base_values).frame_s, mics)


class _progress:
    """An overall tqdm bar on stderr, and one status line per take above it."""

    def __init__(self, total: int) -> None:
        self.total = total

    def __enter__(self):
        from tqdm import tqdm

        self.bar = tqdm(
            total=self.total, desc="batch", unit="take", file=sys.stderr, leave=False,
            disable=not sys.stderr.isatty(), mininterval=0.2,
        )
        return self.update

    def update(self, record) -> None:
        from liftmag.batch import describe

        self.bar.write(describe(record), file=sys.stderr)
        self.bar.update(1)

    def __exit__(self, *exc) -> None:
        self.bar.close()


def _report(outcome, log_path: Path, as_json: bool) -> None:
    note = "Originals are untouched: liftmag batch only reads them. " + CAUTION
    if as_json:
        print_json({**outcome.to_dict(), "log": str(log_path), "note": note})
        return
    parts = [
        f"{outcome.count('done')} done",
        f"{outcome.count('skipped')} skipped (up to date)",
        f"{outcome.count('failed')} failed",
    ]
    if outcome.not_run:
        parts.append(f"{outcome.not_run} not run")
    head = "interrupted" if outcome.interrupted else "finished"
    print(
        f"liftmag batch {head}: " + ", ".join(parts)
        + f"; {outcome.processed_audio_s / 60:.1f} min of audio cleaned in "
        f"{outcome.elapsed_s:.1f} s"
    )
    for record in outcome.failed:
        print(f"  failed {record.label}: {record.reason}")
    if outcome.interrupted:
        print("No partial output was left; run the same command again to finish the rest.")
    print(f"log: {log_path}")
    print(note)
