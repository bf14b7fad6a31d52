"""File-level processing: the edge between audio files and the streaming engine.

Used by the ``process``, ``learn``, ``batch`` and ``demo`` verbs. Reading and writing go
through :mod:`liftmag.audio_io` (block reading, NaN checks, atomic writing, broadcast-WAV
chunk carrying); the DSP is :class:`liftmag.engine.Processor`. Memory does not grow with
the length of the file: audio flows block by block from reader to engine to writer.
"""

from __future__ import annotations

import time
from collections import deque
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from liftmag import __version__, audio_io, riffchunks, tracks
from liftmag.engine import (
    NoiseLearner,
    Processor,
    analyse_take,
    run_processor,
    talker_prior,
    uses_take_analysis,
)
from liftmag.noise import NoiseModel
from liftmag.regions import check_region
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
    mics: tuple[str, ...] = ()
    talkers: dict | None = None  # liftmag.talkers.TalkerMap.to_dict(), when the take was read
    talker_summary: str = ""
    # The talker map itself (liftmag.talkers.TalkerMap, with its frames), for drawing; not JSON.
    talker_map: object | None = field(default=None, compare=False, repr=False)

    @property
    def realtime_factor(self) -> float:
        return self.duration_s / self.elapsed_s if self.elapsed_s > 0 else float("inf")

    def to_dict(self) -> dict:
        d = {k: getattr(self, k) for k in self.__dataclass_fields__ if k != "talker_map"}
        d["realtime_factor"] = round(self.realtime_factor, 2)
        for k in ("inputs", "carried_chunks", "warnings", "mics"):
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
    source, start_frame: int, stop_frame: int, channels: Sequence[int] | None = None
) -> Iterator[np.ndarray]:
    """Blocks of ``source`` restricted to frames ``[start_frame, stop_frame)`` (and channels)."""
    position = 0
    for block in audio_io.read_blocks(source, BLOCK_FRAMES):
        end = position + block.shape[1]
        lo, hi = max(start_frame, position), min(stop_frame, end)
        if hi > lo:
            part = block[:, lo - position : hi - position]
            yield part if channels is None else part[list(channels)]
        position = end
        if position >= stop_frame:
            return


def learn_noise(
    source: audio_io.AudioInfo | audio_io.AudioGroup,
    settings: Settings,
    regions_s: Sequence[tuple[float, float]] = (),
    description: str = "",
    channels: Sequence[int] | None = None,
) -> NoiseModel:
    """Learn a noise model from the whole of ``source`` or from some of its regions (seconds).

    ``channels`` (0-based) restricts it to the microphones of the array; default: all.
    Raises ``AudioInputError`` for regions outside the file or too short to learn from.
    """
    fs = source.sample_rate_hz
    n_channels = source.channels if channels is None else len(channels)
    audio_io.require_at_most_max_mics(n_channels)
    learner = NoiseLearner(fs, n_channels, settings)
    frame_s = learner.config.frame_length / fs
    if not regions_s:
        regions = [(0, source.frames)]
    else:
        regions = []
        for start_s, end_s in regions_s:
            try:
                check_region(start_s, end_s)
            except ValueError as exc:
                raise audio_io.AudioInputError(f"noise region {exc}") from None
            if end_s > source.duration_s + 1e-9:
                raise audio_io.AudioInputError(
                    f"noise region {start_s:g}:{end_s:g} s ends after the file "
                    f"({source.duration_s:.3f} s long)"
                )
            regions.append((round(start_s * fs), round(end_s * fs)))
    for lo, hi in merge_regions(regions):
        learner.add_segment(_region_blocks(source, lo, hi, channels))
    if learner.frames < 2 * n_channels**2:
        raise audio_io.AudioInputError(
            f"too little room tone to learn from: {learner.frames * learner.config.hop / fs:.2f}"
            f" s of usable noise (each region must be longer than {frame_s:.3f} s; a few "
            f"seconds at least, 30 s is ordinary location practice)"
        )
    model = learner.model(description)
    silent = [c if channels is None else channels[c] for c in model.silent_channels()]
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
    mics: Sequence[str] = (),
    same_tracks: bool = False,
    whole_take: bool = True,
    find_talkers: bool = True,
    talker_regions_s: Sequence[tuple[float, float]] = (),
) -> ProcessResult:
    """Clean one take (a multichannel file or a group of mono stems) into ``output``.

    The output has the input's sample rate, exactly its length, and by default its format
    and subtype; ``bext``/``iXML`` chunks of a WAV input are carried over. It is written to
    a temporary file and renamed, so an interrupted run leaves nothing behind; an existing
    output is refused unless ``force``. ``progress(done_frames, total_frames)`` is called as
    blocks complete (over both passes).

    With ``whole_take`` the take is read twice: a first pass learns its noise (from every
    speech pause, unless a model is given) and its talker, so the engine starts warm
    (:func:`liftmag.engine.analyse_take`); without it the output is the plugin's.
    With ``find_talkers`` (and no noise model or region, or with ``talker_regions_s``) a
    pass before that finds the take's directional voices and which is the wanted talker
    (:mod:`liftmag.talkers`), so other voices are learned as noise; ``talker_regions_s``
    (stretches where only the wanted talker speaks) or a bearing in ``settings`` decide
    the wanted one.

    ``mics`` chooses the array's microphones (1-based numbers or iXML track names, see
    :func:`liftmag.tracks.choose_mics`); ``settings.reference_channel`` then counts
    positions in that list. ``same_tracks`` writes every track of the input, the
    reference one replaced by the cleaned sound. The output's ``iXML`` ``TRACK_LIST`` is
    rewritten to describe its channels and one EBU R 98 row is added to the ``bext``
    coding history (see :func:`take_tracks`).
    """
    started = time.perf_counter()
    source = open_source(inputs)
    take = take_tracks(source, mics, settings, same_tracks)
    audio_io.require_at_most_max_mics(len(take.mics))
    fs = source.sample_rate_hz
    warnings: list[str] = []
    if noise_regions_s:
        noise_model = learn_noise(
            source, settings, noise_regions_s, "regions of the take", channels=take.mics
        )
        noise_desc = "learned from " + ", ".join(f"{a:g}-{b:g} s" for a, b in noise_regions_s)
    elif noise_model is not None:
        noise_desc = f"noise model ({noise_model.duration_s:.1f} s of room tone)"
    else:
        noise_desc = "tracked during the take (no room tone given)"
    if noise_model is not None:
        problem = noise_model.mismatch(
            fs, *_geometry(fs, settings), len(take.mics)
        )
        if problem:
            raise audio_io.AudioInputError(problem)
    proc = Processor(settings, fs, len(take.mics), noise_model)
    min_frames = proc.config.frame_length + (MIN_FRAMES_OF_AUDIO - 1) * proc.config.hop
    if source.frames < min_frames:
        raise audio_io.AudioInputError(
            f"the take is {source.frames / fs:.3f} s long; liftmag needs at least "
            f"{min_frames / fs:.3f} s (a few STFT frames) to tell speech from noise"
        )
    total = source.frames
    n_mics = len(take.mics)
    analysing = whole_take and uses_take_analysis(settings)
    finding = analysing and (
        bool(talker_regions_s)
        or (find_talkers and noise_model is None and settings.noise_mode == "track")
    )
    passes = 1 + analysing + finding
    talker_map = spatial = None

    def pass_progress(index: int):
        if progress is None:
            return None
        return lambda done: progress((index * total + done) // passes, total)

    if finding:
        talker_map, spatial = talker_prior(
            settings, fs, n_mics, _mic_blocks(source, take.mics), tuple(talker_regions_s),
            progress=pass_progress(0),
        )
    if analysing:
        take_stats = analyse_take(
            settings, fs, n_mics, _mic_blocks(source, take.mics), noise_model,
            progress=pass_progress(passes - 2), spatial=spatial,
        )
        if noise_model is None and settings.noise_mode == "track":
            noise_desc = (
                f"learned from the take's own speech pauses ({take_stats.pause_duration_s:.1f} "
                "s), then tracked"
            )
        proc = Processor(settings, fs, n_mics, noise_model, take_stats, spatial)
    out_tracks = tracks.output_tracks(take.tracks, take.mics, take.reference, take.mode)
    container, container_subtype, container_note = audio_io.output_container(output, source)
    if container_note and subtype is None:
        warnings.append("output format: " + container_note)
    writer = audio_io.AtomicAudioWriter(
        output, like=source, channels=len(out_tracks), format=container,
        subtype=subtype or container_subtype, force=force, carry_chunks=False,
    )
    writer.use_chunks(_output_chunks(take, out_tracks, fs, writer.subtype, settings))
    peaks = np.zeros(len(take.mics))
    with writer:
        sink = writer.write
        if same_tracks:
            merger = _TrackMerger(take.mics[take.reference], writer.write)
            blocks = merger.feed(audio_io.read_blocks(source, BLOCK_FRAMES), take.mics)
            sink = merger.write
        else:
            blocks = _mic_blocks(source, take.mics)
        run_processor(
            proc,
            _track_peaks(blocks, peaks),
            total,
            progress=(
                pass_progress(passes - 1)
            ),
            sink=sink,
        )
    report = writer.report
    dead = np.flatnonzero(peaks < DEAD_CHANNEL_PEAK)
    if dead.size:
        which = ", ".join(str(take.mics[c] + 1) for c in dead)
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
        channels_in=source.channels, channels_out=len(out_tracks),
        frames=report.frames_written, duration_s=total / fs,
        elapsed_s=time.perf_counter() - started, estimator=settings.estimator,
        output_mode=take.mode, noise_source=noise_desc,
        lifted_fraction=proc.report.lifted_fraction,
        lifted_share_by_band=tuple(proc.report.lifted_share_by_band(proc.config.frequencies_hz)),
        latency_samples=proc.latency_samples,
        clipped_samples=report.clipped_samples, peak_dbfs=report.peak_dbfs,
        carried_chunks=tuple(report.carried_chunks), warnings=tuple(warnings),
        mics=tuple(take.tracks[i].label for i in take.mics),
        talkers=talker_map.to_dict(settings.mic_spacing_m) if talker_map else None,
        talker_summary=talker_map.describe(settings.mic_spacing_m) if talker_map else "",
        talker_map=talker_map,
    )


def _mic_blocks(source, mics: tuple[int, ...]):
    """The take's blocks, holding only the array's microphones in their chosen order."""
    blocks = audio_io.read_blocks(source, BLOCK_FRAMES)
    if mics == tuple(range(source.channels)):
        return blocks
    return (block[list(mics)] for block in blocks)


def _track_peaks(blocks: Iterator[np.ndarray], peaks: np.ndarray) -> Iterator[np.ndarray]:
    for block in blocks:
        np.maximum(peaks, np.abs(block).max(axis=1, initial=0.0), out=peaks)
        yield block


def _geometry(fs: int, settings: Settings) -> tuple[int, int]:
    from liftmag.stft import stft_config

    cfg = stft_config(fs, settings.frame_s)
    return cfg.frame_length, cfg.hop


@dataclass(frozen=True)
class TakeTracks:
    """The tracks of a take and the part each plays.

    Attributes
    ----------
    tracks : tuple of Track
        Every channel of the source, named from its iXML.
    mics : tuple of int
        0-based source channels forming the array, in the engine's channel order.
    reference : int
        Position in ``mics`` of the reference (``Settings.reference_channel``).
    mode : str
        Output mode: the engine's, or ``same-tracks``.
    """

    tracks: tuple[tracks.Track, ...]
    mics: tuple[int, ...]
    reference: int
    mode: str


def take_tracks(
    source: audio_io.AudioInfo | audio_io.AudioGroup,
    mics: Sequence[str],
    settings: Settings,
    same_tracks: bool = False,
) -> TakeTracks:
    """Resolve ``--mics`` against a source; without it every channel is a microphone.

    Raises ``AudioInputError`` with one line for a request that does not fit the take
    (see :func:`liftmag.tracks.choose_mics`), or a reference outside the chosen mics.
    """
    found, chosen = _resolve_mics(source, mics)
    if settings.reference_channel >= len(chosen):
        raise audio_io.AudioInputError(
            f"reference channel {settings.reference_channel} does not exist: "
            + (f"--mics names {len(chosen)} microphones and the reference channel counts "
               f"positions in that list from 0 (0 to {len(chosen) - 1})" if mics else
               f"the take has {len(chosen)} channels (0 to {len(chosen) - 1})")
        )
    if same_tracks and settings.output_mode != "cleaned":
        raise audio_io.AudioInputError(
            f"{tracks.SAME_TRACKS} writes the cleaned reference among the other tracks; it "
            f"cannot be combined with output mode {settings.output_mode}"
        )
    mode = tracks.SAME_TRACKS if same_tracks else settings.output_mode
    return TakeTracks(found, chosen, settings.reference_channel, mode)


def mic_channels(
    source: audio_io.AudioInfo | audio_io.AudioGroup, mics: Sequence[str]
) -> tuple[int, ...] | None:
    """The 0-based channels ``mics`` names in ``source`` (None without ``mics``: all).

    For room tone recorded on the same poly file layout as the takes. Raises
    ``AudioInputError`` with one line for a request that does not fit.
    """
    return _resolve_mics(source, mics)[1] if mics else None


def _resolve_mics(
    source: audio_io.AudioInfo | audio_io.AudioGroup, mics: Sequence[str]
) -> tuple[tuple[tracks.Track, ...], tuple[int, ...]]:
    where = source.path.name if isinstance(source, audio_io.AudioInfo) else "the take"
    try:
        found = tracks.source_tracks(source)
        chosen = (
            tracks.choose_mics(found, mics, where) if mics else tuple(range(len(found)))
        )
    except ValueError as exc:
        raise audio_io.AudioInputError(str(exc)) from exc
    return found, chosen


def _output_chunks(
    take: TakeTracks,
    out_tracks: Sequence[riffchunks.IxmlTrack],
    fs: int,
    subtype: str,
    settings: Settings,
) -> tuple[tuple[str, bytes], ...]:
    """The reference file's bext/iXML, rewritten to describe the output (none invented)."""
    reference_file = take.tracks[take.mics[take.reference]].file
    found = audio_io.carried_chunks(reference_file)
    line = riffchunks.coding_history_line(
        fs, tracks.word_length_bits(subtype), len(out_tracks),
        tracks.describe_run(
            take.tracks, take.mics, take.reference, take.mode, settings.estimator, __version__
        ),
    )
    rewritten = []
    for chunk_id, payload in found:
        try:
            if chunk_id == "iXML":
                payload = riffchunks.rewrite_ixml_tracks(payload, out_tracks)
            elif chunk_id == "bext":
                payload = riffchunks.append_coding_history(payload, line)
        except ValueError as exc:
            raise audio_io.AudioInputError(f"{reference_file}: {exc}") from exc
        rewritten.append((chunk_id, payload))
    return tuple(rewritten)


class _TrackMerger:
    """Puts the cleaned reference back among the input's other tracks (``same-tracks``).

    The engine's output is aligned with its input (``run_processor`` removes the latency),
    so the n-th cleaned frame belongs with the n-th input frame: the input blocks wait in
    a queue until their cleaned frames arrive. The queue holds at most one block plus
    the engine's latency.
    """

    def __init__(self, reference_channel: int, write: Callable[[np.ndarray], None]) -> None:
        self._reference = reference_channel
        self._write = write
        self._queue: deque[np.ndarray] = deque()

    def feed(self, blocks: Iterable[np.ndarray], mics: Sequence[int]) -> Iterator[np.ndarray]:
        """Pass the array's channels on to the engine, keeping the whole blocks."""
        for block in blocks:
            self._queue.append(block)
            yield block[list(mics)]

    def write(self, cleaned: np.ndarray) -> None:
        wanted = cleaned.shape[1]
        parts = []
        while wanted and self._queue:
            head = self._queue[0]
            take = min(wanted, head.shape[1])
            parts.append(head[:, :take])
            if take == head.shape[1]:
                self._queue.popleft()
            else:
                self._queue[0] = head[:, take:]
            wanted -= take
        if not parts:
            return  # the engine's zero flush past the end of the take
        whole = np.concatenate(parts, axis=1) if len(parts) > 1 else parts[0].copy()
        whole[self._reference] = cleaned[0, : whole.shape[1]]
        self._write(whole)
