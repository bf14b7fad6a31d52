"""Jobs: each planned take with its settings and noise model, and the worker entry point."""

from __future__ import annotations

import hashlib
import json
import os
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from liftmag import __version__, audio_io
from liftmag.batch.plan import Job, NoiseRef, NoiseSource, TakePlan, TakeRecord, take_settings
from liftmag.batch.records import (
    _job_record,
    _write_record,
    is_up_to_date,
    read_record,
    record_path,
    sha256_file,
    take_key,
)
from liftmag.fileproc import (
    learn_noise,
    load_noise_model,
    mic_channels,
    open_source,
    process_file,
)
from liftmag.settings import Settings
from liftmag.tracks import SAME_TRACKS

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
