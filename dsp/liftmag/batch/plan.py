"""Planning a batch: constants, the plan's data, selection, stem grouping, clash checks."""

from __future__ import annotations

import dataclasses
import glob
import os
import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from liftmag import audio_io
from liftmag.errors import LiftmagError
from liftmag.settings import Settings, noise_mode_given_learned

LOG_NAME = "liftmag-batch.jsonl"
STATE_DIR_NAME = ".liftmag-batch"  # learned noise models and the lock live here
LOCK_NAME = "lock"
RECORDS_DIR_NAME = "records"  # under STATE_DIR_NAME: one record per output, same tree
RECORD_SUFFIX = ".liftmag-batch.json"  # beside each output, as runs before 0.x kept them
RECORD_FORMAT = "liftmag-batch-record"
RECORD_VERSION = 1
HASH_CHUNK_BYTES = audio_io.HASH_CHUNK_BYTES
# What a folder or glob picks up: formats libsndfile reads losslessly and can write back.
AUDIO_SUFFIXES = frozenset(
    {".wav", ".wave", ".bwf", ".rf64", ".w64", ".flac", ".aif", ".aiff", ".aifc", ".caf"}
)
MANIFEST_PATH_COLUMNS = ("input", "output", "room_tone", "noise_model")
MANIFEST_REQUIRED = ("input", "output")
MANIFEST_TAKE_COLUMNS = ("mics",)  # per-take choices that are not engine settings
MANIFEST_HIDDEN_SETTINGS = ("bypass",)  # a host control, as on the command line
STEM_SEPARATORS = re.compile(r"[;|]")
WORKER_STOP_GRACE_S = 10.0  # time a stopped worker gets to remove its temporary file
INTERRUPTED_STATUS = 130  # exit status of a worker stopped by Ctrl-C (128 + SIGINT, shells' use)


class BatchError(LiftmagError, ValueError):
    """A problem with the batch as a whole (bad selection, manifest or option): one line."""


# --------------------------------------------------------------------------- data


@dataclass(frozen=True)
class NoiseSource:
    """Where a take's noise model comes from: a model file, or room tone to learn from."""

    kind: str  # "model" or "room-tone"
    paths: tuple[str, ...]


@dataclass(frozen=True)
class TakePlan:
    """One take as planned: inputs (one file, or mono stems in channel order) and output.

    ``overrides`` holds per-take settings (manifest cells) as (field, value) pairs.
    A non-empty ``problem`` means the take was refused while planning; it is reported as
    failed without being run.
    """

    label: str
    inputs: tuple[str, ...]
    output: str
    overrides: tuple[tuple[str, Any], ...] = ()
    noise: NoiseSource | None = None
    problem: str = ""


@dataclass(frozen=True)
class NoiseRef:
    """A noise model file as a job sees it: path (shared storage) and content hash."""

    path: str
    sha256: str


@dataclass(frozen=True)
class Job:
    """Everything a worker needs for one take; picklable, absolute paths only."""

    label: str
    inputs: tuple[str, ...]
    output: str
    settings: Settings
    noise: NoiseRef | None = None
    subtype: str | None = None
    redo: bool = False
    mics: tuple[str, ...] = ()
    same_tracks: bool = False
    record: str = ""  # where the resume record lives (default: beside the output, as before)


@dataclass(frozen=True)
class TakeRecord:
    """The outcome of one take: ``done``, ``skipped`` (up to date) or ``failed``."""

    label: str
    status: str
    inputs: tuple[str, ...]
    output: str
    reason: str = ""
    duration_s: float = 0.0
    elapsed_s: float = 0.0
    key: str = ""
    warnings: tuple[str, ...] = field(default_factory=tuple)

    def to_dict(self) -> dict[str, Any]:
        d = dataclasses.asdict(self)
        d["inputs"], d["warnings"] = list(self.inputs), list(self.warnings)
        d["duration_s"], d["elapsed_s"] = round(self.duration_s, 3), round(self.elapsed_s, 3)
        return d


@dataclass(frozen=True)
class BatchOutcome:
    """All take records of one run, and whether the run was cut short."""

    records: tuple[TakeRecord, ...]
    planned: int
    elapsed_s: float
    interrupted: bool = False

    def count(self, status: str) -> int:
        return sum(r.status == status for r in self.records)

    @property
    def failed(self) -> tuple[TakeRecord, ...]:
        return tuple(r for r in self.records if r.status == "failed")

    @property
    def not_run(self) -> int:
        return self.planned - len(self.records)

    @property
    def processed_audio_s(self) -> float:
        return sum(r.duration_s for r in self.records if r.status == "done")

    def to_dict(self) -> dict[str, Any]:
        return {
            "planned": self.planned, "done": self.count("done"),
            "skipped": self.count("skipped"), "failed": self.count("failed"),
            "not_run": self.not_run, "interrupted": self.interrupted,
            "elapsed_s": round(self.elapsed_s, 3),
            "processed_audio_s": round(self.processed_audio_s, 3),
            "failures": [{"take": r.label, "reason": r.reason} for r in self.failed],
        }


# ---------------------------------------------------------------------- selection


@dataclass(frozen=True)
class Selection:
    """Files picked from the command line, the roots they hang from, and missing items."""

    files: tuple[Path, ...]
    roots: tuple[Path, ...]
    missing: tuple[str, ...]


def has_glob_magic(text: str) -> bool:
    return any(ch in text for ch in "*?[")


def _glob_root(pattern: str) -> Path:
    """The folder a glob starts from: its leading path parts without wildcards."""
    parts = Path(pattern).parts
    fixed = []
    for part in parts[:-1]:
        if has_glob_magic(part):
            break
        fixed.append(part)
    return Path(*fixed) if fixed else Path(".")


def _is_audio_name(path: Path) -> bool:
    return path.suffix.lower() in AUDIO_SUFFIXES and not path.name.startswith(".")


def _inside(path: Path, folders: Sequence[Path]) -> bool:
    return any(path == f or f in path.parents for f in folders)


def _walk_audio(folder: Path, exclude: Sequence[Path]) -> Iterator[Path]:
    # os.walk lists broken links as files, so an unreadable entry is reported, not skipped.
    for here, dirs, files in os.walk(folder):
        here_path = Path(here)
        dirs[:] = sorted(
            d for d in dirs if not d.startswith(".") and not _inside(here_path / d, exclude)
        )
        for name in sorted(files):
            path = here_path / name
            if _is_audio_name(path):
                yield path


def expand_selection(items: Sequence[str], exclude: Sequence[Path] = ()) -> Selection:
    """Files, folders (recursive, audio files only) and globs -> a selection.

    Files under ``exclude`` (the output folder) are never picked up, so a re-run does not
    take its own outputs for inputs. An explicit file is kept whatever its name.
    """
    exclude = [Path(os.path.abspath(e)) for e in exclude]
    files: dict[Path, None] = {}
    roots: list[Path] = []
    missing: list[str] = []
    for item in items:
        path = Path(os.path.abspath(item))
        if path.is_dir():
            roots.append(path)
            found = list(_walk_audio(path, exclude))
        elif path.exists() or path.is_symlink():
            roots.append(path.parent)
            found = [path]
        elif has_glob_magic(item):
            roots.append(Path(os.path.abspath(_glob_root(item))))
            found = []
            hits = sorted(glob.glob(item, recursive=True))
            if not hits:
                missing.append(item)
            for hit in hits:
                hit_path = Path(os.path.abspath(hit))
                if hit_path.is_dir():
                    found.extend(_walk_audio(hit_path, exclude))
                elif _is_audio_name(hit_path):
                    found.append(hit_path)
        else:
            missing.append(item)
            continue
        for f in found:
            if not _inside(f, exclude):
                files[f] = None
    return Selection(tuple(files), tuple(roots), tuple(missing))


# ----------------------------------------------------------------------- grouping


@dataclass(frozen=True)
class TakeFiles:
    """Files making one take, and the file name its output gets."""

    members: tuple[Path, ...]
    name: str
    problem: str = ""


def compile_group_pattern(pattern: str) -> re.Pattern[str]:
    """The channel-suffix rule, anchored at the end of the file name's stem."""
    try:
        compiled = re.compile(f"(?:{pattern})$")
    except re.error as exc:
        raise BatchError(f"--group-by-suffix {pattern!r} is not a valid pattern: {exc}") from exc
    if compiled.groups < 1:
        raise BatchError(
            f"--group-by-suffix {pattern!r} needs one (group) that captures the channel "
            r"number, e.g. '_(\d+)$' or '.ch(\d)'"
        )
    return compiled


def group_takes(files: Sequence[Path], pattern: re.Pattern[str] | None) -> list[TakeFiles]:
    """Gather mono stems into takes by their channel suffix; other files stay single.

    Files in the same folder whose stems differ only by the suffix form one take, in the
    order of the captured channel number. Two files claiming the same number make the
    take refused (with a reason).
    """
    singles: list[TakeFiles] = []
    groups: dict[tuple[Path, str, str], list[tuple[int, Path]]] = {}
    for path in files:
        match = pattern.search(path.stem) if pattern else None
        number = _channel_number(match)
        if match is None or number is None:
            singles.append(TakeFiles((path,), path.name))
            continue
        base = path.stem[: match.start()]
        groups.setdefault((path.parent, base, path.suffix), []).append((number, path))
    takes = list(singles)
    for (_, base, suffix), members in groups.items():
        members.sort()
        numbers = [n for n, _ in members]
        paths = tuple(p for _, p in members)
        name = (base or "take") + suffix
        problem = ""
        repeated = sorted({n for n in numbers if numbers.count(n) > 1})
        if repeated:
            problem = (
                f"more than one file claims channel {', '.join(map(str, repeated))}: "
                + ", ".join(p.name for p in paths)
            )
        takes.append(TakeFiles(paths, name, problem))
    return sorted(takes, key=lambda t: t.members[0])


def _channel_number(match: re.Match[str] | None) -> int | None:
    if match is None:
        return None
    captured = next((g for g in match.groups() if g is not None), None)
    try:
        return int(captured) if captured is not None else None
    except ValueError:
        return None


def _common_root(roots: Sequence[Path]) -> Path:
    return Path(os.path.commonpath([str(r) for r in roots])) if roots else Path.cwd()


def plan_from_selection(
    items: Sequence[str], out_dir: str | Path, group_pattern: str | None = None
) -> list[TakePlan]:
    """Plan takes from files, folders and globs; outputs mirror the input tree under out_dir.

    Raises :class:`BatchError` when nothing at all is selected.
    """
    out = Path(os.path.abspath(out_dir))
    pattern = compile_group_pattern(group_pattern) if group_pattern else None
    if any(Path(os.path.abspath(item)) == out for item in items):
        raise BatchError(
            f"--out {out} is an input folder; outputs would sit among the originals. "
            "Choose another folder."
        )
    selection = expand_selection(items, exclude=[out])
    if not selection.files:
        named = ", ".join(items[:3]) + (", ..." if len(items) > 3 else "")
        raise BatchError(
            f"nothing to process: no audio files ({', '.join(sorted(AUDIO_SUFFIXES))}) "
            f"in {named}"
            + (f"; not found: {', '.join(selection.missing)}" if selection.missing else "")
        )
    root = _common_root(selection.roots)
    plans = [
        TakePlan(label=item, inputs=(item,), output="", problem="no such file or folder")
        for item in selection.missing
    ]
    for take in group_takes(selection.files, pattern):
        folder = take.members[0].parent
        output = out / os.path.relpath(folder, root) / take.name
        plans.append(
            TakePlan(
                label=_take_label(take, root), inputs=tuple(str(p) for p in take.members),
                output=os.path.normpath(output), problem=take.problem,
            )
        )
    return plans


def _take_label(take: TakeFiles, root: Path) -> str:
    first = os.path.relpath(take.members[0], root)
    if len(take.members) == 1:
        return first
    return f"{os.path.join(os.path.dirname(first), take.name)} ({len(take.members)} stems)"


# ---------------------------------------------------------------- plan checking


def check_outputs(plans: Sequence[TakePlan], protected: Sequence[str] = ()) -> list[TakePlan]:
    """Refuse takes whose output is any file the batch reads or is shared by two takes.

    Files read: every take's inputs, every row's room tone or noise model, and
    ``protected`` (the batch-wide room tone or noise model).
    """
    all_inputs = {os.path.realpath(p) for plan in plans for p in plan.inputs}
    all_inputs |= {
        os.path.realpath(p) for plan in plans if plan.noise for p in plan.noise.paths
    }
    all_inputs |= {os.path.realpath(p) for p in protected}
    writers: dict[str, list[str]] = {}
    for plan in plans:
        if plan.output and not plan.problem:
            writers.setdefault(os.path.abspath(plan.output), []).append(plan.label)
    checked = []
    for plan in plans:
        problem = plan.problem
        target = os.path.abspath(plan.output) if plan.output else ""
        if not problem and os.path.realpath(target) in all_inputs:
            problem = (
                f"{plan.output} is read by this batch (an input, room tone or noise model); "
                "originals are never replaced"
            )
        elif not problem and len(writers.get(target, ())) > 1:
            problem = (
                f"{plan.output} would be written by more than one take ("
                + ", ".join(writers[target]) + "); rename one of them"
            )
        checked.append(dataclasses.replace(plan, problem=problem))
    return checked


def take_settings(
    base_values: dict[str, Any], overrides: Sequence[tuple[str, Any]], has_noise_model: bool
) -> Settings:
    """Batch-wide values, then the take's overrides; raises ValueError for invalid ones.

    As ``liftmag process`` does, a take given a learned noise model holds it unless the
    user chose a noise mode, so batch output matches process output bit for bit.
    """
    values = {**base_values, **dict(overrides)}
    mode = noise_mode_given_learned(values.get("noise_mode"), has_noise_model)
    if mode is not None:
        values["noise_mode"] = mode
    return Settings(**values)
