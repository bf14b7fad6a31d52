"""Batch processing: many takes, planned, hashed, run in parallel, resumable.

A batch is planned first (pure functions: selection, stem grouping, manifests, output
names, clashes), then each planned take becomes a :class:`Job` with its full settings and
noise model, and the jobs run either on local worker processes or on an existing Dask
cluster. The worker entry point, :func:`run_job`, is the same on both: it checks the
inputs, hashes them, skips the take if its output is up to date, and otherwise calls
:func:`liftmag.fileproc.process_file` (which writes atomically) and leaves a small record
in the batch's own folder (``<out>/.liftmag-batch/records/``, mirroring the outputs) so
that the next run knows what made it. Delivery folders hold the outputs only.

Why a record per output rather than only the log: a worker that finishes after its batch
was interrupted (a Dask task cannot be stopped half-way) still leaves a true account of
its output, and the log may be deleted without losing resume.
"""

from __future__ import annotations

import contextlib
import csv
import dataclasses
import glob
import hashlib
import json
import os
import re
import secrets
import signal
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from liftmag import __version__, audio_io
from liftmag.errors import LiftmagError
from liftmag.fileproc import (
    learn_noise,
    load_noise_model,
    mic_channels,
    open_source,
    process_file,
)
from liftmag.settings import Settings, noise_mode_given_learned, settings_fields
from liftmag.tracks import SAME_TRACKS, parse_mics

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


# ----------------------------------------------------------------------- manifest


def manifest_columns() -> tuple[str, ...]:
    """Column names a manifest may use."""
    settings = tuple(
        f.name for f in settings_fields() if f.name not in MANIFEST_HIDDEN_SETTINGS
    )
    return MANIFEST_PATH_COLUMNS + MANIFEST_TAKE_COLUMNS + settings


def _column_name(header: str) -> str:
    return header.strip().lower().replace("-", "_").replace(" ", "_")


def read_manifest(path: str | Path, out_dir: str | Path) -> list[TakePlan]:
    """Plan takes from a CSV manifest, one row per take.

    Columns: ``input`` (one file, or mono stems separated by ``;`` or ``|``), ``output``,
    optional ``room_tone`` or ``noise_model``, and any Settings field as an override.
    Input, room-tone and model paths are relative to the manifest's folder; outputs are
    relative to ``out_dir``. A bad cell fails its row only; bad columns refuse the manifest.
    """
    manifest = Path(path)
    if not manifest.is_file():
        raise BatchError(f"manifest {manifest}: no such file")
    try:
        with manifest.open(newline="", encoding="utf-8-sig") as fh:
            rows = list(csv.reader(fh))
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise BatchError(f"manifest {manifest}: cannot read it as CSV text ({exc})") from exc
    rows = [r for r in rows if any(cell.strip() for cell in r)]
    if not rows:
        raise BatchError(f"manifest {manifest}: empty; the first row must name the columns")
    header = [_column_name(h) for h in rows[0]]
    _check_manifest_header(manifest, header)
    if len(rows) == 1:
        raise BatchError(f"manifest {manifest}: no takes listed under the column names")
    base = manifest.parent
    out = Path(os.path.abspath(out_dir))
    plans = []
    for number, cells in enumerate(rows[1:], start=2):
        plan = _manifest_row(dict(zip(header, cells, strict=False)), number, base, out)
        if len(cells) > len(header):
            # Usually an unquoted comma, e.g. null_deg 20,160 written without quotes: later
            # cells shift into the wrong columns even when the extra one is empty.
            plan = dataclasses.replace(plan, problem=(
                f"the row has {len(cells)} cells but the first row names {len(header)} "
                "columns (put quotes around cells that contain commas)"
            ))
        plans.append(plan)
    return plans


def _check_manifest_header(manifest: Path, header: list[str]) -> None:
    known = manifest_columns()
    unknown = [h for h in header if h not in known]
    if unknown:
        raise BatchError(
            f"manifest {manifest}: unknown column(s) {', '.join(repr(u) for u in unknown)}; "
            f"known columns are {', '.join(known)}"
        )
    repeated = sorted({h for h in header if header.count(h) > 1})
    if repeated:
        raise BatchError(f"manifest {manifest}: column(s) given twice: {', '.join(repeated)}")
    lacking = [c for c in MANIFEST_REQUIRED if c not in header]
    if lacking:
        raise BatchError(f"manifest {manifest}: needs the column(s) {', '.join(lacking)}")


def _split_paths(cell: str, base: Path) -> tuple[str, ...]:
    parts = [p.strip() for p in STEM_SEPARATORS.split(cell) if p.strip()]
    return tuple(os.path.normpath(base / p) for p in parts)


def _manifest_row(row: dict[str, str], number: int, base: Path, out: Path) -> TakePlan:
    cells = {k: (v or "").strip() for k, v in row.items()}
    inputs = _split_paths(cells.get("input", ""), base)
    label = f"row {number}" + (f": {Path(inputs[0]).name}" if inputs else "")
    output = os.path.normpath(out / cells["output"]) if cells.get("output") else ""
    problems = []
    if not inputs:
        problems.append("no input file in the 'input' column")
    if not output:
        problems.append("no output file in the 'output' column")
    elif escapes(cells["output"]):
        problems.append(
            f"output {cells['output']!r} leaves --out; give a path inside it (no '..', not "
            "absolute)"
        )
        output = ""
    noise = None
    if cells.get("room_tone") and cells.get("noise_model"):
        problems.append("give room_tone or noise_model, not both")
    elif cells.get("room_tone"):
        noise = NoiseSource("room-tone", _split_paths(cells["room_tone"], base))
    elif cells.get("noise_model"):
        noise = NoiseSource("model", _split_paths(cells["noise_model"], base))
    overrides = []
    for name, text in cells.items():
        if name in MANIFEST_PATH_COLUMNS or not text:
            continue
        try:
            value = parse_mics(text) if name == "mics" else parse_setting(name, text)
            overrides.append((name, value))
        except ValueError as exc:
            problems.append(str(exc))
    return TakePlan(
        label=label, inputs=inputs, output=output, overrides=tuple(overrides), noise=noise,
        problem="; ".join(problems),
    )


def escapes(relative: str) -> bool:
    """True if a manifest output path would land outside ``--out`` (absolute, or via ``..``)."""
    path = Path(relative)
    return path.is_absolute() or bool(path.drive) or ".." in Path(os.path.normpath(path)).parts


def parse_setting(name: str, text: str) -> Any:
    """A manifest cell -> the Settings field's type (range checks come with Settings)."""
    f = next(f for f in settings_fields() if f.name == name)
    if f.metadata.get("choices"):
        return text
    try:
        if isinstance(f.default, tuple):
            return tuple(float(part) for part in re.split(r"[,\s]+", text) if part)
        if isinstance(f.default, int) and not isinstance(f.default, bool):
            return int(text)
        return float(text)
    except ValueError:
        raise ValueError(f"{name}: {text!r} is not a number") from None


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


# ------------------------------------------------------------------------ hashing


sha256_file = audio_io.sha256_file  # one implementation; the name stays for callers


def take_key(
    input_sha256: Sequence[str],
    settings: Settings,
    noise_sha256: str | None,
    subtype: str | None,
    version: str = __version__,
    tracks: dict[str, Any] | None = None,
) -> str:
    """What an output was made from: input content, settings, noise model, liftmag version.

    ``tracks`` (the chosen mics, same-tracks output) joins the key only when set, so the
    keys of takes that use neither stay as they were.
    """
    payload = {
        "liftmag": version,
        "inputs": list(input_sha256),
        "settings": settings.to_dict(),
        "noise_model": noise_sha256,
        "subtype": subtype.upper() if subtype else None,
    }
    if tracks:
        payload["tracks"] = tracks
    blob = json.dumps(payload, sort_keys=True, separators=(",", ":")).encode()
    return hashlib.sha256(blob).hexdigest()


# ------------------------------------------------------------------------ records


def record_path(output: str | Path, out_dir: str | Path | None = None) -> Path:
    """Where the record of ``output`` lives: ``<out_dir>/.liftmag-batch/records/<same tree>``.

    Without ``out_dir``, the hidden file beside the output that earlier versions wrote
    (read once to resume their runs, then removed).
    """
    out = Path(output)
    if out_dir is None:
        return out.with_name(f".{out.name}{RECORD_SUFFIX}")
    records = Path(out_dir) / STATE_DIR_NAME / RECORDS_DIR_NAME
    relative = os.path.relpath(os.path.abspath(out), os.path.abspath(out_dir))
    if escapes(relative):  # outputs all lie under --out; this is only a safe fallback
        relative = hashlib.sha256(os.path.abspath(out).encode()).hexdigest()[:32]
    return records / f"{relative}.json"


def _job_record(job: Job) -> Path:
    return Path(job.record) if job.record else record_path(job.output)


def read_record(path: str | Path) -> dict[str, Any] | None:
    """The record stored at ``path``, or None if there is none (or it is unreadable)."""
    try:
        data = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) and data.get("format") == RECORD_FORMAT else None


def _write_record(output: Path, state: str, key: str, job: Job, **extra: Any) -> None:
    record = {
        "format": RECORD_FORMAT, "format_version": RECORD_VERSION, "state": state,
        "key": key, "liftmag": __version__, "inputs": list(job.inputs),
        "settings": job.settings.to_dict(), "subtype": job.subtype,
        "noise_model": job.noise.path if job.noise else None,
        "written_at": time.strftime("%Y-%m-%dT%H:%M:%S%z"), **extra,
    }
    target = _job_record(job)
    target.parent.mkdir(parents=True, exist_ok=True)
    audio_io.write_atomically(target, json.dumps(record, indent=1).encode())
    legacy = record_path(output)
    if legacy != target and read_record(legacy) is not None:
        legacy.unlink(missing_ok=True)  # an earlier version's record: now kept in one place


def is_up_to_date(output: Path, record: dict[str, Any] | None, key: str) -> bool:
    """True if ``output`` is the very file the record describes, made from ``key``."""
    if record is None or record.get("state") != "done" or record.get("key") != key:
        return False
    try:
        st = output.stat()
    except OSError:
        return False
    return st.st_size == record.get("output_size") and st.st_mtime_ns == record.get(
        "output_mtime_ns"
    )


# --------------------------------------------------------------------------- noise


class NoiseResolver:
    """Turns noise sources into model files the workers read, learning room tone once.

    A learned model is cached under ``<out>/.liftmag-batch/`` named by the hash of the
    room tone's bytes, the STFT frame length and the liftmag version, so re-runs reuse it.
    """

    def __init__(self, state_dir: Path) -> None:
        self.state_dir = state_dir
        self._cache: dict[tuple[NoiseSource, float, tuple[str, ...]], NoiseRef] = {}

    def resolve(
        self, source: NoiseSource, frame_s: float, mics: tuple[str, ...] = ()
    ) -> NoiseRef:
        """Raises ``AudioInputError`` (a ValueError) naming the file if it cannot be used.

        ``mics`` restricts room tone to the takes' microphones (a model file is as learned).
        """
        cache_key = (source, frame_s, mics)
        if cache_key not in self._cache:
            if source.kind == "model":
                self._cache[cache_key] = self._model_file(source.paths)
            else:
                self._cache[cache_key] = self._learned(source.paths, frame_s, mics)
        return self._cache[cache_key]

    @staticmethod
    def _model_file(paths: tuple[str, ...]) -> NoiseRef:
        if len(paths) != 1:
            raise audio_io.AudioInputError("give one noise model file, not several")
        load_noise_model(paths[0])  # refuses a file that is not a noise model, clearly
        return NoiseRef(os.path.abspath(paths[0]), sha256_file(paths[0]))

    def _learned(self, paths: tuple[str, ...], frame_s: float, mics: tuple[str, ...]) -> NoiseRef:
        source = open_source(paths)
        channels = mic_channels(source, mics)
        identity = [__version__, frame_s, [sha256_file(p) for p in paths]]
        if channels is not None:  # only then, so models cached before --mics stay valid
            identity.append(list(channels))
        digest = hashlib.sha256(json.dumps(identity).encode()).hexdigest()
        target = self.state_dir / f"room-tone-{digest[:20]}.npz"
        if not target.is_file():
            # Learned exactly as `liftmag learn` does (frame length is all it depends on).
            model = learn_noise(
                source, Settings(frame_s=frame_s), (),
                description="learned from " + ", ".join(Path(p).name for p in paths),
                channels=channels,
            )
            self.state_dir.mkdir(parents=True, exist_ok=True)
            audio_io.write_atomically(target, model.to_bytes())
        return NoiseRef(str(target), sha256_file(target))


def build_jobs(
    plans: Sequence[TakePlan],
    base_values: dict[str, Any],
    batch_noise: NoiseRef | None,
    resolver: NoiseResolver,
    *,
    subtype: str | None = None,
    redo: bool = False,
    mics: tuple[str, ...] = (),
    same_tracks: bool = False,
) -> tuple[list[Job], list[TakeRecord]]:
    """Planned takes -> runnable jobs, and failure records for takes refused before running.

    ``mics`` and ``same_tracks`` are the batch-wide choices; a manifest's ``mics`` and
    ``output_mode`` cells override them for their take.
    Each job's resume record goes under the resolver's state folder (``<out>/.liftmag-batch``).
    """
    out_dir = resolver.state_dir.parent
    jobs: list[Job] = []
    refused: list[TakeRecord] = []
    for plan in plans:
        if plan.problem:
            refused.append(_refusal(plan, plan.problem))
            continue
        try:
            overrides, take_mics, take_same = take_track_options(
                plan.overrides, mics, same_tracks
            )
            frame_s = Settings(**{**base_values, **dict(overrides)}).frame_s
            noise = (
                resolver.resolve(plan.noise, frame_s, take_mics) if plan.noise else batch_noise
            )
            settings = take_settings(base_values, overrides, noise is not None)
        except (ValueError, OSError) as exc:
            refused.append(_refusal(plan, one_line(exc)))
            continue
        jobs.append(
            Job(
                label=plan.label, inputs=tuple(os.path.abspath(p) for p in plan.inputs),
                output=os.path.abspath(plan.output), settings=settings, noise=noise,
                subtype=subtype, redo=redo, mics=take_mics, same_tracks=take_same,
                record=str(record_path(plan.output, out_dir)),
            )
        )
    return jobs, refused


def take_track_options(
    overrides: Sequence[tuple[str, Any]], mics: tuple[str, ...], same_tracks: bool
) -> tuple[tuple[tuple[str, Any], ...], tuple[str, ...], bool]:
    """Take the ``mics`` and ``same-tracks`` choices out of a take's overrides.

    Returns the overrides left for ``Settings``, the take's mics and whether it writes
    the same tracks (``output_mode`` ``same-tracks`` cleans as ``cleaned`` does).
    """
    rest = []
    for name, value in overrides:
        if name == "mics":
            mics = value
        elif name == "output_mode":
            same_tracks = value == SAME_TRACKS
            rest.append((name, "cleaned" if same_tracks else value))
        else:
            rest.append((name, value))
    return tuple(rest), mics, same_tracks


def _refusal(plan: TakePlan, reason: str) -> TakeRecord:
    return TakeRecord(plan.label, "failed", plan.inputs, plan.output, reason=reason)


# -------------------------------------------------------------------------- worker


def one_line(exc: BaseException) -> str:
    """An exception as one line of text, naming the file for OS errors."""
    if isinstance(exc, OSError) and exc.filename and exc.strerror:
        return f"{exc.filename}: {exc.strerror}"
    text = " ".join(str(exc).split())
    return text or type(exc).__name__


def run_job(job: Job) -> TakeRecord:
    """Run one take (in a worker process or on a Dask worker); never raises for bad input.

    Order: the inputs are opened first (clear reasons for missing, corrupt, mono or
    mismatched files), then hashed; an up-to-date output is skipped; otherwise the take is
    processed into a hidden temporary file that is renamed on success.
    """
    started = time.perf_counter()
    try:
        return _run_job(job, started)
    except Exception as exc:  # one bad take must not sink the batch
        kind = "" if isinstance(exc, (ValueError, OSError)) else f"{type(exc).__name__}: "
        return TakeRecord(
            job.label, "failed", job.inputs, job.output, reason=kind + one_line(exc),
            elapsed_s=time.perf_counter() - started,
        )


def _run_job(job: Job, started: float) -> TakeRecord:
    for path in job.inputs:
        if os.path.islink(path) and not os.path.exists(path):
            raise audio_io.AudioInputError(
                f"{path}: broken link (points to {os.readlink(path)}, which does not exist)"
            )
    source = open_source(job.inputs)
    input_sha = [sha256_file(p) for p in job.inputs]
    model = _load_checked_model(job.noise) if job.noise else None
    key = take_key(
        input_sha, job.settings, job.noise.sha256 if job.noise else None, job.subtype,
        tracks=_track_key(job),
    )
    out = Path(job.output)
    previous = read_record(_job_record(job)) or read_record(record_path(out))
    if not job.redo and is_up_to_date(out, previous, key):
        return TakeRecord(
            job.label, "skipped", job.inputs, job.output, reason="up to date",
            duration_s=source.duration_s, elapsed_s=time.perf_counter() - started, key=key,
        )
    if out.exists() and previous is None and not job.redo:
        raise audio_io.AudioOutputError(
            f"{out} exists and was not written by liftmag batch; move it away, or add "
            "--redo to replace it"
        )
    out.parent.mkdir(parents=True, exist_ok=True)
    # "pending" claims the output as ours before it exists, so a run killed between the
    # rename and the final record still lets the next run replace (not refuse) it.
    _write_record(out, "pending", key, job, input_sha256=input_sha)
    try:
        result = process_file(
            job.inputs, out, job.settings, noise_model=model, force=out.exists(),
            subtype=job.subtype, mics=job.mics, same_tracks=job.same_tracks,
        )
    except BaseException:
        if not out.exists():
            _job_record(job).unlink(missing_ok=True)
        raise
    st = out.stat()
    _write_record(
        out, "done", key, job, input_sha256=input_sha, output_size=st.st_size,
        output_mtime_ns=st.st_mtime_ns, result=result.to_dict(),
    )
    return TakeRecord(
        job.label, "done", job.inputs, job.output, duration_s=result.duration_s,
        elapsed_s=time.perf_counter() - started, key=key, warnings=result.warnings,
    )


def _track_key(job: Job) -> dict[str, Any] | None:
    if not job.mics and not job.same_tracks:
        return None
    return {"mics": list(job.mics), "same_tracks": job.same_tracks}


def _load_checked_model(ref: NoiseRef):
    data = Path(ref.path).read_bytes()
    if hashlib.sha256(data).hexdigest() != ref.sha256:
        raise audio_io.AudioInputError(
            f"{ref.path}: the noise model changed while the batch was running"
        )
    return load_noise_model(ref.path)


# --------------------------------------------------------- partial files and lock


def partial_files(targets: Sequence[str | Path]) -> list[Path]:
    """Hidden temporary files (``.NAME.partial-*``) of these files (outputs, records)."""
    found: list[Path] = []
    for target in map(Path, targets):
        pattern = glob.escape(audio_io.temp_prefix(target)) + "*"
        found.extend(Path(p) for p in glob.glob(str(target.parent / pattern)))
    return found


def job_targets(jobs: Sequence[Job]) -> list[str]:
    """Every file the jobs write: outputs and their records."""
    return [job.output for job in jobs] + [str(_job_record(job)) for job in jobs]


def sweep_partials(targets: Sequence[str | Path]) -> int:
    """Remove temporary files left by killed workers; returns how many were removed.

    A worker killed by SIGKILL (or the out-of-memory killer) cannot clean up after
    itself: POSIX gives it no chance to run code. The batch that owns the outputs does.
    A temporary file still locked by its writer (``liftmag process`` writing the same
    name into the same folder, say) is left alone: see :func:`audio_io.remove_stale_temp`.
    """
    return sum(audio_io.remove_stale_temp(path) for path in partial_files(targets))


@contextlib.contextmanager
def batch_lock(out_dir: Path) -> Iterator[None]:
    """One batch at a time per output folder (another one's temporary files look stale)."""
    try:
        import fcntl
    except ImportError:  # no POSIX advisory locks (Windows): go on without
        yield
        return
    state = out_dir / STATE_DIR_NAME
    state.mkdir(parents=True, exist_ok=True)
    with open(state / LOCK_NAME, "a+") as fh:
        try:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            raise BatchError(
                f"another liftmag batch is writing into {out_dir}; wait for it to finish"
            ) from None
        try:
            yield
        finally:
            fcntl.flock(fh.fileno(), fcntl.LOCK_UN)


# ----------------------------------------------------------------------- executors

RecordSink = Callable[[TakeRecord], None]


def _worker_loop(conn) -> None:
    """Body of a local worker process: takes arrive on the pipe, records go back.

    ``None`` asks the worker to finish. A worker lives for the whole batch, so its caches
    stay warm, and the main process always knows which take each worker is on.
    """
    # terminate() sends SIGTERM; turning it into KeyboardInterrupt unwinds the writer,
    # which then removes its hidden temporary file.
    signal.signal(signal.SIGTERM, _raise_interrupt)
    try:
        while (job := conn.recv()) is not None:
            conn.send(run_job(job))
    except (KeyboardInterrupt, EOFError):
        raise SystemExit(INTERRUPTED_STATUS) from None
    finally:
        conn.close()


def _raise_interrupt(signum, frame) -> None:
    raise KeyboardInterrupt


def _mp_context():
    import multiprocessing as mp

    # forkserver: workers fork from a clean, pre-imported server (quick to start, and no
    # fork of a process that has threads); spawn where forkserver does not exist.
    if "forkserver" in mp.get_all_start_methods():
        ctx = mp.get_context("forkserver")
        ctx.set_forkserver_preload(["liftmag.batch"])
        return ctx
    return mp.get_context("spawn")


def _death_reason(exitcode: int | None) -> str:
    if exitcode == INTERRUPTED_STATUS:
        return "the worker process was interrupted (Ctrl-C); nothing was written"
    if exitcode is not None and exitcode < 0:
        try:
            how = f"killed by {signal.Signals(-exitcode).name}"
        except ValueError:
            how = f"killed by signal {-exitcode}"
    else:
        how = f"ended with status {exitcode}"
    return (
        f"the worker process was {how} before finishing (stopped by hand, or out of "
        "memory); nothing was written; run the batch again to retry"
    )


class _Worker:
    """A local worker process, its end of the pipe, and the take it is on (if any)."""

    def __init__(self, ctx) -> None:
        self.conn, child_end = ctx.Pipe(duplex=True)
        self.proc = ctx.Process(target=_worker_loop, args=(child_end,), daemon=True)
        self.proc.start()
        child_end.close()  # so our end reports EOF when the worker dies
        self.job: Job | None = None

    def give(self, job: Job) -> None:
        self.conn.send(job)
        self.job = job

    def receive(self) -> TakeRecord:
        """The record of the current take; a failure naming the signal if the worker died."""
        job, self.job = self.job, None
        assert job is not None
        try:
            record = self.conn.recv()
        except (EOFError, OSError):
            record = None
        if isinstance(record, TakeRecord):
            return record
        self.proc.join()
        return TakeRecord(
            job.label, "failed", job.inputs, job.output, reason=_death_reason(self.proc.exitcode)
        )

    @property
    def alive(self) -> bool:
        return self.proc.is_alive()


def run_local(jobs: Sequence[Job], n_workers: int, on_record: RecordSink) -> None:
    """Run jobs on up to ``n_workers`` local processes; a dead worker fails its take only.

    Each worker takes one job at a time, so a worker that dies (SIGKILL, out of memory)
    is charged with exactly the take it was on; it is replaced and the batch goes on.
    """
    from multiprocessing.connection import wait

    ctx = _mp_context()
    queue = list(reversed(jobs))
    workers = [_Worker(ctx) for _ in range(min(max(1, n_workers), len(jobs)))]
    try:
        for i in range(len(workers)):
            workers[i] = _feed(workers[i], queue, ctx)
        while busy := {w.conn: w for w in workers if w.job is not None}:
            for conn in wait(list(busy)):
                worker = busy[conn]
                on_record(worker.receive())
                if not worker.alive:
                    worker.conn.close()
                    workers.remove(worker)
                    if not queue:
                        continue
                    worker = _Worker(ctx)
                    workers.append(worker)
                workers[workers.index(worker)] = _feed(worker, queue, ctx)
        _finish(workers)
    except BaseException:
        _stop_workers([w.proc for w in workers])
        raise


def _feed(worker: _Worker, queue: list[Job], ctx) -> _Worker:
    """Give the next job to ``worker`` (or to a fresh one if it died while idle)."""
    if not queue:
        return worker
    try:
        worker.give(queue[-1])
    except (BrokenPipeError, ConnectionResetError):
        worker.proc.join()
        worker.conn.close()
        worker = _Worker(ctx)
        worker.give(queue[-1])
    queue.pop()
    return worker


def _finish(workers: Sequence[_Worker]) -> None:
    for worker in workers:
        with contextlib.suppress(OSError):
            worker.conn.send(None)
    _stop_workers([w.proc for w in workers], grace_s=WORKER_STOP_GRACE_S)


def _stop_workers(procs: Sequence[Any], grace_s: float = 0.0) -> None:
    """Stop our own workers: let them end (grace), ask (SIGTERM: they remove their
    temporary files), then insist (SIGKILL)."""
    deadline = time.monotonic() + grace_s
    for proc in procs:
        proc.join(max(0.0, deadline - time.monotonic()))
    for proc in procs:
        if proc.is_alive():
            proc.terminate()
    deadline = time.monotonic() + WORKER_STOP_GRACE_S
    for proc in procs:
        proc.join(max(0.0, deadline - time.monotonic()))
        if proc.is_alive():
            proc.kill()
            proc.join()


def run_on_cluster(
    jobs: Sequence[Job],
    address: str,
    on_record: RecordSink,
    on_note: Callable[[str], None] = lambda text: None,
) -> None:
    """Send each job to an existing Dask distributed scheduler and gather the records.

    Workers must see the inputs and the output folder at the same absolute paths (shared
    storage) and must have liftmag installed. Dask chooses the worker; a worker that dies
    has its task re-run elsewhere by the scheduler, and the temporary file it left is
    removed by :func:`sweep_partials` when the batch ends.
    """
    try:
        from distributed import Client, as_completed
    except ImportError as exc:
        raise BatchError(
            "--cluster needs Dask distributed: pip install 'liftmag[cluster]'"
        ) from exc
    try:
        client = Client(address, timeout="20s", set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise BatchError(f"cannot reach a Dask scheduler at {address}: {one_line(exc)}") from exc
    run_id = secrets.token_hex(4)
    with client:
        _check_worker_allocator(client, on_note)
        futures = {
            client.submit(run_job, job, key=f"liftmag-take-{run_id}-{i}", pure=False): job
            for i, job in enumerate(jobs)
        }
        try:
            for future in as_completed(list(futures), loop=client.loop):
                job = futures[future]
                try:
                    record = future.result()
                except Exception as exc:  # worker lost too often, cancelled, comm error
                    record = TakeRecord(
                        job.label, "failed", job.inputs, job.output,
                        reason=f"on the cluster: {type(exc).__name__}: {one_line(exc)}",
                    )
                on_record(record)
        except BaseException:
            # Tasks already running finish on their own (Dask cannot stop them); their
            # outputs are complete and recorded, so the next run skips them.
            client.cancel(list(futures))
            raise


def _trim_threshold() -> str | None:
    return os.environ.get("MALLOC_TRIM_THRESHOLD_")


def _check_worker_allocator(client, on_note: Callable[[str], None]) -> None:
    """Warn when workers run with a fixed glibc trim threshold (Dask's nanny default).

    A fixed threshold turns off glibc's adaptive thresholds, so each large temporary array
    is mapped and unmapped afresh; bench_batch.py measured takes running about twice as
    slowly that way.
    """
    try:
        values = set(client.run(_trim_threshold).values())
    except Exception:  # a worker that cannot answer is not a reason to stop the batch
        return
    set_values = sorted(v for v in values if v is not None)
    if set_values:
        on_note(
            f"the Dask workers run with MALLOC_TRIM_THRESHOLD_={', '.join(set_values)} (the "
            "nanny's default), which makes liftmag about half as fast; start them with "
            "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_ set to null in "
            "their Dask config, or with --no-nanny"
        )


# ------------------------------------------------------------------------ the batch


class BatchLog:
    """JSON lines appended beside the outputs: a start line, one per take, an end line."""

    def __init__(self, path: Path) -> None:
        self.path = path

    def write(self, event: str, **data: Any) -> None:
        line = {"event": event, "time": time.strftime("%Y-%m-%dT%H:%M:%S%z"), **data}
        with open(self.path, "a", encoding="utf-8") as fh:
            fh.write(json.dumps(line, default=str) + "\n")


@dataclass(frozen=True)
class BatchOptions:
    out_dir: Path
    n_workers: int = 1
    cluster: str | None = None
    redo: bool = False
    subtype: str | None = None


def run_batch(
    jobs: Sequence[Job],
    refused: Sequence[TakeRecord],
    options: BatchOptions,
    on_record: RecordSink = lambda record: None,
    log_header: dict[str, Any] | None = None,
    on_note: Callable[[str], None] = lambda text: None,
) -> BatchOutcome:
    """Run the jobs, log every outcome, and return the outcome.

    On interruption (``KeyboardInterrupt``: Ctrl-C, or SIGTERM/SIGHUP where the caller
    turns them into it, as ``liftmag batch`` does) the workers are stopped, every temporary
    file of this batch's outputs is removed, and the outcome so far comes back marked
    ``interrupted``; takes not reached count as not run.
    """
    started = time.perf_counter()
    out_dir = options.out_dir
    out_dir.mkdir(parents=True, exist_ok=True)
    log = BatchLog(out_dir / LOG_NAME)
    records: list[TakeRecord] = []
    outputs = job_targets(jobs)

    def take_done(record: TakeRecord) -> None:
        records.append(record)
        log.write("take", **record.to_dict())
        on_record(record)

    def note(text: str) -> None:
        log.write("note", text=text)
        on_note(text)

    with batch_lock(out_dir):
        sweep_partials(outputs)  # left by a run whose workers were killed
        log.write(
            "start", liftmag=__version__, takes=len(jobs) + len(refused),
            executor=f"dask {options.cluster}" if options.cluster else
            f"{options.n_workers} local worker(s)", **(log_header or {}),
        )
        for record in refused:
            take_done(record)
        interrupted = False
        try:
            if options.cluster:
                run_on_cluster(jobs, options.cluster, take_done, note)
            elif jobs:
                run_local(jobs, options.n_workers, take_done)
        except KeyboardInterrupt:
            interrupted = True
        except BaseException as exc:
            log.write("end", error=one_line(exc), done_so_far=len(records))
            raise
        finally:
            sweep_partials(outputs)
        outcome = BatchOutcome(
            tuple(records), len(jobs) + len(refused), time.perf_counter() - started,
            interrupted,
        )
        log.write("end", **outcome.to_dict())
    return outcome


def default_workers() -> int:
    """Cores this process may use."""
    if hasattr(os, "sched_getaffinity"):
        return max(1, len(os.sched_getaffinity(0)))
    return max(1, os.cpu_count() or 1)


def describe(record: TakeRecord) -> str:
    """One status line for a take, for the terminal."""
    if record.status == "done":
        return f"done     {record.label} ({record.duration_s:.1f} s in {record.elapsed_s:.1f} s)"
    if record.status == "skipped":
        return f"skipped  {record.label} (up to date)"
    return f"FAILED   {record.label}: {record.reason}"
