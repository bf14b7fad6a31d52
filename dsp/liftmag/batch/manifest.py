"""CSV manifests: one row per take, paths relative to the manifest, per-take settings."""

from __future__ import annotations

import csv
import dataclasses
import os
import re
from pathlib import Path
from typing import Any

from liftmag.batch.plan import (
    MANIFEST_HIDDEN_SETTINGS,
    MANIFEST_PATH_COLUMNS,
    MANIFEST_REQUIRED,
    MANIFEST_TAKE_COLUMNS,
    STEM_SEPARATORS,
    BatchError,
    NoiseSource,
    TakePlan,
)
from liftmag.settings import settings_fields
from liftmag.tracks import parse_mics

# ----------------------------------------------------------------------- manifest


def manifest_columns() -> tuple[str, ...]:
    """Column names a manifest may use."""
    settings = tuple(
        f.name for f in settings_fields() if f.name not in MANIFEST_HIDDEN_SETTINGS
    )
    return MANIFEST_PATH_COLUMNS + MANIFEST_TAKE_COLUMNS + settings


def _column_name(header: str) -> str:
    name = header.strip().lower().replace("-", "_").replace(" ", "_")
    # A setting may also be named as its command-line option is (prior_smoothing: smoothing).
    return _SETTING_BY_OPTION.get(name, name)


_SETTING_BY_OPTION = {
    f.metadata["option"].replace("-", "_"): f.name
    for f in settings_fields()
    if f.metadata.get("option")
}


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
