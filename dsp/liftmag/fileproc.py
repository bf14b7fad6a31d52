"""File-level processing: the edge between audio files and the streaming engine.

Used by the ``process``, ``learn``, ``batch`` and ``demo`` verbs. Reading and writing go
through :mod:`liftmag.audio_io` (block reading, NaN checks, atomic writing, broadcast-WAV
chunk carrying); the DSP is :class:`liftmag.engine.Processor`. Memory does not grow with
the length of the file: audio flows block by block from reader to engine to writer.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from liftmag import audio_io
from liftmag.engine import NoiseLearner, Processor, run_processor
from liftmag.noise import NoiseModel
from liftmag.settings import Settings

BLOCK_FRAMES = 1 << 16
MIN_FRAMES_OF_AUDIO = 4  # STFT frames a take must span to be worth processing
# A channel whose peak stays below -120 dBFS holds no microphone signal: a live capsule's
# self-noise through any preamp sits far above that (common practice; 24-bit LSB -138 dBFS).
DEAD_CHANNEL_PEAK = 1e-6


@dataclass(frozen=True)
class ProcessResult:
    """Summary of one processed take (JSON-able through :meth:`to_dict`)."""

    inputs: tuple[str, ...]
    output: str
    sample_rate_hz: int
    channels_in: int
    channels_out: int
    frames: int
    duration_s: float
    elapsed_s: float
    estimator: str
    output_mode: str
    noise_source: str
    lifted_fraction: float
    lifted_share_by_band: tuple[tuple[float, float, float], ...]
    latency_samples: int
    clipped_samples: int
    peak_dbfs: float
    carried_chunks: tuple[str, ...]
    warnings: tuple[str, ...] = field(default_factory=tuple)

    @property
    def realtime_factor(self) -> float:
        return self.duration_s / self.elapsed_s if self.elapsed_s > 0 else float("inf")

    def to_dict(self) -> dict:
        d = {k: getattr(self, k) for k in self.__dataclass_fields__}
        d["realtime_factor"] = round(self.realtime_factor, 2)
        for k in ("inputs", "carried_chunks", "warnings"):
            d[k] = list(d[k])
        d["lifted_share_by_band"] = [
            {"low_hz": lo, "high_hz": hi, "share": round(share, 3)}
            for lo, hi, share in self.lifted_share_by_band
        ]
        return d


def open_source(inputs: Sequence[str | Path]) -> audio_io.AudioInfo | audio_io.AudioGroup:
    """One multichannel file, or several files grouped as one take; refuses mono."""
    if not inputs:
        raise audio_io.AudioInputError("no input file given")
    source = audio_io.probe(inputs[0]) if len(inputs) == 1 else audio_io.open_group(inputs)
    audio_io.require_multichannel(source)
    return source


def load_noise_model(path: str | Path) -> NoiseModel:
    """Read a noise model file written by ``liftmag learn``."""
    p = Path(path)
    if not p.is_file():
        raise audio_io.AudioInputError(f"{p}: no such noise model file")
    try:
        return NoiseModel.from_bytes(p.read_bytes())
    except ValueError as exc:
        raise audio_io.AudioInputError(f"{p}: {exc}") from exc


def _region_blocks(
    source, start_frame: int, stop_frame: int
) -> Iterator[np.ndarray]:
    """Blocks of ``source`` restricted to frames ``[start_frame, stop_frame)``."""
    position = 0
    for block in audio_io.read_blocks(source, BLOCK_FRAMES):
        end = position + block.shape[1]
        lo, hi = max(start_frame, position), min(stop_frame, end)
        if hi > lo:
            yield block[:, lo - position : hi - position]
        position = end
        if position >= stop_frame:
            return


def learn_noise(
    source: audio_io.AudioInfo | audio_io.AudioGroup,
    settings: Settings,
    regions_s: Sequence[tuple[float, float]] = (),
    description: str = "",
) -> NoiseModel:
    """Learn a noise model from the whole of ``source`` or from some of its regions (seconds).

    Raises ``AudioInputError`` for regions outside the file or too short to learn from.
    """
    fs = source.sample_rate_hz
    learner = NoiseLearner(fs, source.channels, settings)
    frame_s = learner.config.frame_length / fs
    if not regions_s:
        regions = [(0, source.frames)]
    else:
        regions = []
        for start_s, end_s in regions_s:
            if not (0 <= start_s < end_s):
                raise audio_io.AudioInputError(
                    f"noise region {start_s:g}:{end_s:g} s is not a forward range of times"
                )
            if end_s > source.duration_s + 1e-9:
                raise audio_io.AudioInputError(
                    f"noise region {start_s:g}:{end_s:g} s ends after the file "
                    f"({source.duration_s:.3f} s long)"
                )
            regions.append((round(start_s * fs), round(end_s * fs)))
    for lo, hi in merge_regions(regions):
        learner.add_segment(_region_blocks(source, lo, hi))
    if learner.frames < 2 * source.channels**2:
        raise audio_io.AudioInputError(
            f"too little room tone to learn from: {learner.frames * learner.config.hop / fs:.2f}"
            f" s of usable noise (each region must be longer than {frame_s:.3f} s; a few "
            f"seconds at least, 30 s is ordinary location practice)"
        )
    model = learner.model(description)
    silent = model.silent_channels()
    if silent:
        raise audio_io.AudioInputError(
            "the room tone is silent on channel(s) " + ", ".join(str(c + 1) for c in silent)
            + " (digital silence: a dead or unplugged microphone?); record the room with "
            "every microphone live"
        )
    return model


def merge_regions(regions: Sequence[tuple[int, int]]) -> list[tuple[int, int]]:
    """Sorted, non-overlapping frame ranges: a stretch given twice is learned from once."""
    merged: list[tuple[int, int]] = []
    for lo, hi in sorted(regions):
        if merged and lo <= merged[-1][1]:
            merged[-1] = (merged[-1][0], max(merged[-1][1], hi))
        else:
            merged.append((lo, hi))
    return merged


def process_file(
    inputs: Sequence[str | Path],
    output: str | Path,
    settings: Settings,
    *,
    noise_model: NoiseModel | None = None,
    noise_regions_s: Sequence[tuple[float, float]] = (),
    force: bool = False,
    subtype: str | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> ProcessResult:
    """Clean one take (a multichannel file or a group of mono stems) into ``output``.

    The output has the input's sample rate, exactly its length, and by default its format
    and subtype; ``bext``/``iXML`` chunks of a WAV input are carried over. It is written to
    a temporary file and renamed, so an interrupted run leaves nothing behind; an existing
    output is refused unless ``force``. ``progress(done_frames, total_frames)`` is called as
    blocks complete.
    """
    started = time.perf_counter()
    source = open_source(inputs)
    fs = source.sample_rate_hz
    warnings: list[str] = []
    if noise_regions_s:
        noise_model = learn_noise(source, settings, noise_regions_s, "regions of the take")
        noise_desc = "learned from " + ", ".join(f"{a:g}-{b:g} s" for a, b in noise_regions_s)
    elif noise_model is not None:
        noise_desc = f"noise model ({noise_model.duration_s:.1f} s of room tone)"
    else:
        noise_desc = "tracked during the take (no room tone given)"
    if noise_model is not None:
        problem = noise_model.mismatch(
            fs, *_geometry(fs, settings), source.channels
        )
        if problem:
            raise audio_io.AudioInputError(problem)
    proc = Processor(settings, fs, source.channels, noise_model)
    min_frames = proc.config.frame_length + (MIN_FRAMES_OF_AUDIO - 1) * proc.config.hop
    if source.frames < min_frames:
        raise audio_io.AudioInputError(
            f"the take is {source.frames / fs:.3f} s long; liftmag needs at least "
            f"{min_frames / fs:.3f} s (a few STFT frames) to tell speech from noise"
        )
    total = source.frames
    container, container_subtype, container_note = audio_io.output_container(output, source)
    if container_note and subtype is None:
        warnings.append("output format: " + container_note)
    peaks = np.zeros(source.channels)
    with audio_io.AtomicAudioWriter(
        output, like=source, channels=proc.n_output_channels, format=container,
        subtype=subtype or container_subtype, force=force,
    ) as writer:
        run_processor(
            proc,
            _track_peaks(audio_io.read_blocks(source, BLOCK_FRAMES), peaks),
            total,
            progress=(lambda done: progress(done, total)) if progress else None,
            sink=writer.write,
        )
    report = writer.report
    dead = np.flatnonzero(peaks < DEAD_CHANNEL_PEAK)
    if dead.size:
        which = ", ".join(str(c + 1) for c in dead)
        warnings.append(
            (f"channel {which} is" if dead.size == 1 else f"channels {which} are")
            + " silent throughout (a dead or unplugged microphone?): the estimators need "
            "every microphone live, so this output is not a proper clean-up; leave it out"
        )
    if report.clipped_samples:
        warnings.append(
            f"{report.clipped_samples} samples exceeded full scale (peak "
            f"{report.peak_dbfs:+.1f} dBFS) and were clipped; lower the input gain or write "
            "a float subtype (--subtype FLOAT)"
        )
    if report.dropped_chunks:
        warnings.append(
            "could not carry " + ", ".join(report.dropped_chunks) + " into this output format"
        )
    return ProcessResult(
        inputs=tuple(str(p) for p in inputs), output=str(output), sample_rate_hz=fs,
        channels_in=source.channels, channels_out=proc.n_output_channels,
        frames=report.frames_written, duration_s=total / fs,
        elapsed_s=time.perf_counter() - started, estimator=settings.estimator,
        output_mode=settings.output_mode, noise_source=noise_desc,
        lifted_fraction=proc.report.lifted_fraction,
        lifted_share_by_band=tuple(proc.report.lifted_share_by_band(proc.config.frequencies_hz)),
        latency_samples=proc.latency_samples,
        clipped_samples=report.clipped_samples, peak_dbfs=report.peak_dbfs,
        carried_chunks=tuple(report.carried_chunks), warnings=tuple(warnings),
    )


def _track_peaks(blocks: Iterator[np.ndarray], peaks: np.ndarray) -> Iterator[np.ndarray]:
    for block in blocks:
        np.maximum(peaks, np.abs(block).max(axis=1, initial=0.0), out=peaks)
        yield block


def _geometry(fs: int, settings: Settings) -> tuple[int, int]:
    from liftmag.stft import stft_config

    cfg = stft_config(fs, settings.frame_s)
    return cfg.frame_length, cfg.hop
