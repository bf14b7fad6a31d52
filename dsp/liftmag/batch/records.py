"""Resume records: the key of what makes an output, one record per output, partial files, lock."""

from __future__ import annotations

import contextlib
import glob
import hashlib
import json
import os
import time
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

from liftmag import __version__, audio_io
from liftmag.batch.manifest import escapes
from liftmag.batch.plan import (
    LOCK_NAME,
    RECORD_FORMAT,
    RECORD_SUFFIX,
    RECORD_VERSION,
    RECORDS_DIR_NAME,
    STATE_DIR_NAME,
    BatchError,
    Job,
)
from liftmag.settings import Settings

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
