"""Pieces shared by the verbs: settings options generated from ``Settings``, progress, output."""

from __future__ import annotations

import argparse
import contextlib
import dataclasses
import functools
import json
import signal
import sys
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

from liftmag.settings import ESTIMATOR_HELP, Settings, settings_fields

CLI_HIDDEN_FIELDS = ("bypass",)  # a host control; on the command line, use passthrough


def option_name(field_name: str) -> str:
    """``reduction_limit_db`` -> ``--reduction-limit-db``, or the field's own ``option``."""
    meta = {f.name: f.metadata for f in settings_fields()}.get(field_name, {})
    return "--" + (meta.get("option") or field_name.replace("_", "-"))


def _describe(f: dataclasses.Field) -> str:
    meta = f.metadata
    text = meta["help"]
    if meta.get("unit") and meta.get("minimum") is not None:
        text += f" [{meta['minimum']:g}..{meta['maximum']:g} {meta['unit']}]"
    if f.default not in (None, ()) and not isinstance(f.default, bool):
        text += f" (default: {f.default})"
    return text


def add_settings_arguments(parser: argparse.ArgumentParser) -> None:
    """Add one option per ``Settings`` field (except host-only ones), with its help and range."""
    group = parser.add_argument_group("processing settings")
    for f in settings_fields():
        if f.name in CLI_HIDDEN_FIELDS:
            continue
        meta = f.metadata
        kwargs: dict[str, Any] = {"dest": f.name, "default": None, "help": _describe(f)}
        if meta.get("choices"):
            kwargs["choices"] = meta["choices"]
            kwargs["metavar"] = "{" + ",".join(meta["choices"]) + "}"
            if f.name == "estimator":
                kwargs["help"] += ". " + "; ".join(f"{k}: {v}" for k, v in ESTIMATOR_HELP.items())
        elif f.name == "null_deg":
            kwargs["type"] = _float_list
            kwargs["metavar"] = "DEG[,DEG...]"
        elif isinstance(f.default, int) and not isinstance(f.default, bool):
            kwargs["type"] = int
        else:
            kwargs["type"] = float
        if meta.get("option") and "metavar" not in kwargs:
            kwargs["metavar"] = meta["option"].upper().replace("-", "_")
        group.add_argument(option_name(f.name), **kwargs)
        for old in meta.get("old_options", ()):
            # The earlier spelling, same destination, hidden from --help (kept one release).
            group.add_argument(f"--{old}", **{**kwargs, "help": argparse.SUPPRESS})


def _float_list(text: str) -> tuple[float, ...]:
    try:
        return tuple(float(part) for part in text.split(",") if part.strip())
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"expected numbers separated by commas: {text}") from exc


def settings_from_args(args: argparse.Namespace, **overrides: Any) -> Settings:
    """Build validated ``Settings`` from parsed options (unset options keep their defaults)."""
    from liftmag.errors import UserError

    values = {
        f.name: getattr(args, f.name)
        for f in settings_fields()
        if getattr(args, f.name, None) is not None
    }
    values.update({k: v for k, v in overrides.items() if v is not None})
    try:
        return Settings(**values)
    except ValueError as exc:
        raise UserError(str(exc)) from exc


def parse_region(text: str) -> tuple[float, float]:
    """argparse type for ``START:END`` in seconds: :func:`liftmag.regions.parse_region`."""
    from liftmag.regions import parse_region as parse

    try:
        return parse(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


# Image formats matplotlib's Agg back end writes (its savefig documentation).
IMAGE_SUFFIXES = (".png", ".svg", ".pdf")


def check_figure_path(path: Path, option: str, force: bool, inputs: Sequence = ()) -> None:
    """Refuse a figure destination before any work: an extension matplotlib cannot write, an
    input, a folder, device or FIFO, or an existing file without ``force``."""
    from liftmag.audio_io import AudioOutputError, refuse_destination
    from liftmag.errors import UserError

    if path.suffix.lower() not in IMAGE_SUFFIXES:
        raise UserError(
            f"{option} {path}: the extension {path.suffix or '(none)'!r} is not an image "
            f"format liftmag writes; use {', '.join(IMAGE_SUFFIXES)}"
        )
    try:
        refuse_destination(path, inputs, force)
    except AudioOutputError as exc:
        raise UserError(str(exc)) from None


def progress_bar(label: str, total: int, unit_scale: float) -> Callable[[int, int], None] | None:
    """A tqdm bar on stderr for long work (hidden when stderr is not a terminal)."""
    from tqdm import tqdm

    bar = tqdm(
        total=round(total / unit_scale, 1), desc=label, unit="s", leave=False,
        disable=not sys.stderr.isatty(), file=sys.stderr, mininterval=0.5,
        bar_format="{desc}: {percentage:3.0f}%|{bar}| {n:.0f}/{total:.0f} s of audio "
                   "[{elapsed}<{remaining}]",
    )

    def update(done: int, _total: int) -> None:
        bar.n = round(done / unit_scale, 1)
        bar.refresh()
        if done >= _total:
            bar.close()

    return update


def print_json(data: Any) -> None:
    json.dump(data, sys.stdout, indent=2, default=str)
    sys.stdout.write("\n")


CAUTION = (
    "Enhanced audio is not the original recording: keep the originals, and use the "
    "unprocessed file for any forensic or evidential purpose. Start playback at a low "
    "monitoring level."
)


def settings_table_markdown() -> str:
    """The settings table of the README, generated from ``Settings`` (a test keeps them equal)."""
    lines = [
        "| option | LV2 control | default | range / choices | what it does |",
        "|---|---|---|---|---|",
    ]
    for f in settings_fields():
        meta = f.metadata
        option = "(host only)" if f.name in CLI_HIDDEN_FIELDS else f"`{option_name(f.name)}`"
        port = meta["lv2_label"] if meta.get("lv2_port") else ""
        default = "unset" if f.default in (None, ()) else f"{f.default}"
        if meta.get("choices"):
            span = ", ".join(meta["choices"])
        elif meta.get("minimum") is not None:
            span = f"{meta['minimum']:g} to {meta['maximum']:g} {meta.get('unit', '')}".strip()
        else:
            span = "on / off"
        lines.append(f"| {option} | {port} | {default} | {span} | {meta['help']} |")
    return "\n".join(lines)


class Stopped(KeyboardInterrupt):
    """SIGTERM or SIGHUP, raised where the process was so that writers remove their
    temporary files on the way out, exactly as for Ctrl-C."""

    def __init__(self, signum: int) -> None:
        super().__init__(signum)
        self.signum = signum


def _raise_stopped(signum: int, frame: Any) -> None:
    raise Stopped(signum)


@contextlib.contextmanager
def stop_signals_as_interrupt() -> Iterator[None]:
    """Turn SIGTERM and SIGHUP into :class:`Stopped` while the block runs.

    A signal the process was started with ignored (``nohup`` ignores SIGHUP) stays ignored:
    whoever started us asked for that.
    """
    previous = {}
    for signum in (signal.SIGTERM, signal.SIGHUP):
        if signal.getsignal(signum) == signal.SIG_DFL:
            previous[signum] = signal.signal(signum, _raise_stopped)
    try:
        yield
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)


def stoppable(verb: str) -> Callable[[Callable[[argparse.Namespace], int]], Callable]:
    """Decorate a verb's ``run``: SIGTERM/SIGHUP stop it cleanly, exit status 128 + N."""

    def decorate(run: Callable[[argparse.Namespace], int]) -> Callable:
        @functools.wraps(run)
        def wrapper(args: argparse.Namespace) -> int:
            try:
                with stop_signals_as_interrupt():
                    return run(args)
            except Stopped as exc:
                name = signal.Signals(exc.signum).name
                print(f"liftmag {verb}: stopped by {name}; no partial output was left.",
                      file=sys.stderr)
                return 128 + exc.signum

        return wrapper

    return decorate
