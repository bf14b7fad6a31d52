"""The ``liftmag`` command: a thin dispatcher over the verbs in ``liftmag.commands``."""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

# UserError stays importable from here for code written before liftmag.errors existed.
from liftmag.errors import LiftmagError, UserError  # noqa: F401

# Verb name -> module. Modules are imported lazily so `liftmag --help` stays fast
# and a broken optional part (plots, cluster) cannot stop the other verbs.
VERBS: dict[str, str] = {
    "process": "liftmag.commands.process",
    "batch": "liftmag.commands.batch",
    "tracks": "liftmag.commands.tracks",
    "learn": "liftmag.commands.learn",
    "compare": "liftmag.commands.compare",
    "pattern": "liftmag.commands.pattern",
    "study": "liftmag.commands.study",
    "demo": "liftmag.commands.demo",
    "plugin": "liftmag.commands.plugin",
}

VERB_SUMMARIES: dict[str, str] = {
    "process": "clean one multichannel take (or a group of mono stems)",
    "batch": "clean many takes: folders, globs or a manifest, in parallel, resumable",
    "tracks": "list a take's tracks (number, name, level) to choose --mics from",
    "learn": "learn a reusable noise model from a room-tone recording",
    "compare": "A/B liftmag against other versions: aligned, loudness-matched, scored",
    "pattern": "plot power beam patterns of the estimators",
    "study": "Monte-Carlo study of magnitude-estimation error versus SNR",
    "demo": "render the built-in scene, clean it, and write a report",
    "plugin": "install or inspect the LV2 plugin bundle",
}


def _build_parser(verb: str | None) -> argparse.ArgumentParser:
    from liftmag import __version__

    parser = argparse.ArgumentParser(
        prog="liftmag",
        description="Clean dialogue recorded with two or more microphones.",
    )
    parser.add_argument("--version", action="version", version=f"liftmag {__version__}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    for name, summary in VERB_SUMMARIES.items():
        if name == verb:
            module = importlib.import_module(VERBS[name])
            verb_parser = sub.add_parser(name, help=summary, description=module.HELP)
            module.add_arguments(verb_parser)
        else:
            sub.add_parser(name, help=summary)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``liftmag`` console script."""
    args_list = list(sys.argv[1:] if argv is None else argv)
    verb = next((a for a in args_list if not a.startswith("-")), None)
    if verb not in VERBS:
        verb = None
    parser = _build_parser(verb)
    args = parser.parse_args(args_list)
    if args.verb is None:
        parser.print_help()
        return 2
    module = importlib.import_module(VERBS[args.verb])
    try:
        return int(module.run(args) or 0)
    except LiftmagError as exc:
        # One line, whatever the message holds: the user reads it, a script tests the status.
        message = " ".join(str(exc).split())
        print(f"liftmag {args.verb}: error: {message}", file=sys.stderr)
        return 2
    except BrokenPipeError:
        # Output piped into `head` or similar: the reader left; that is not an error.
        sys.stderr.close()
        return 0
    except KeyboardInterrupt:
        print(f"liftmag {args.verb}: interrupted; no partial output was left.", file=sys.stderr)
        return 130


if __name__ == "__main__":
    # `python -m liftmag.cli` runs this file as __main__ while the verbs import liftmag.cli:
    # call the one imported copy so there is one module and one set of classes.
    from liftmag.cli import main as _main

    raise SystemExit(_main())
