"""Audio files in and out: probing, block reading, stem groups, atomic writing.

This is edge code used by the ``process``, ``learn``, ``batch`` and
``compare`` verbs; it reads and writes through libsndfile (python-soundfile)
and never imports the DSP core. Audio moves as float64 arrays shaped
``(channels, frames)``.

Errors about input files are :class:`AudioInputError` (a ``ValueError``);
errors about the destination are :class:`AudioOutputError`.
"""

from __future__ import annotations

import contextlib
import math
import os
import secrets
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType

import numpy as np
import soundfile as sf

from liftmag import riffchunks

__all__ = [
    "AtomicAudioWriter",
    "AudioGroup",
    "AudioInfo",
    "AudioInputError",
    "AudioOutputError",
    "WriteReport",
    "open_group",
    "probe",
    "read_blocks",
    "require_multichannel",
]

PathLike = str | os.PathLike[str]

# libsndfile formats stored as RIFF/RF64 WAVE, the only ones that carry bext/iXML.
_WAVE_FORMATS = frozenset({"WAV", "WAVEX", "RF64"})
# Subtypes that store floating point: no full scale to clip at.
_FLOAT_SUBTYPES = frozenset({"FLOAT", "DOUBLE"})


class AudioInputError(ValueError):
    """An input audio file is missing, unreadable, unsuitable or holds bad samples."""


class AudioOutputError(ValueError):
    """The output cannot be written where or how it was asked."""


@dataclass(frozen=True)
class AudioInfo:
    """What libsndfile reports about one audio file."""

    path: Path
    sample_rate_hz: int
    channels: int
    frames: int
    subtype: str
    format: str
    duration_s: float


def probe(path: PathLike) -> AudioInfo:
    """Describe an audio file without reading its samples.

    Parameters
    ----------
    path : str or path-like
        Any file libsndfile can read (WAV, BWF, RF64, FLAC, AIFF, CAF, W64, ...).

    Returns
    -------
    AudioInfo

    Raises
    ------
    AudioInputError
        If the file is missing, is a folder, or libsndfile cannot read it
        (the message includes what libsndfile said).
    """
    p = Path(path)
    if not p.exists():
        raise AudioInputError(f"{p}: no such file")
    if p.is_dir():
        raise AudioInputError(f"{p}: is a folder, not an audio file")
    try:
        info = sf.info(str(p))
    except (sf.LibsndfileError, RuntimeError) as exc:
        said = getattr(exc, "error_string", None) or str(exc)
        raise AudioInputError(
            f"{p}: cannot read this as audio (libsndfile says: {said})"
        ) from exc
    return AudioInfo(
        path=p,
        sample_rate_hz=int(info.samplerate),
        channels=int(info.channels),
        frames=int(info.frames),
        subtype=str(info.subtype),
        format=str(info.format),
        duration_s=info.frames / info.samplerate,
    )


@dataclass(frozen=True)
class AudioGroup:
    """Several files read side by side as one multichannel source.

    Channel order is member order, and within a member its own channel order.
    Build one with :func:`open_group`, which checks that members match.
    """

    members: tuple[AudioInfo, ...]

    @property
    def paths(self) -> tuple[Path, ...]:
        return tuple(m.path for m in self.members)

    @property
    def sample_rate_hz(self) -> int:
        return self.members[0].sample_rate_hz

    @property
    def channels(self) -> int:
        return sum(m.channels for m in self.members)

    @property
    def frames(self) -> int:
        return self.members[0].frames

    @property
    def duration_s(self) -> float:
        return self.members[0].duration_s

    def locate_channel(self, channel: int) -> tuple[Path, int]:
        """Map a 0-based group channel to (file, 0-based channel within that file)."""
        for member in self.members:
            if channel < member.channels:
                return member.path, channel
            channel -= member.channels
        raise IndexError(f"channel {channel} is beyond the group's {self.channels} channels")

    def read_blocks(
        self, block_frames: int, *, check_finite: bool = True
    ) -> Iterator[np.ndarray]:
        """Yield float64 blocks shaped ``(channels, frames)``; see :func:`read_blocks`."""
        if block_frames < 1:
            raise ValueError(f"block_frames must be at least 1, got {block_frames}")
        return self._iter_blocks(block_frames, check_finite)

    def _iter_blocks(self, block_frames: int, check_finite: bool) -> Iterator[np.ndarray]:
        start_frame = 0
        with contextlib.ExitStack() as stack:
            files = [
                stack.enter_context(sf.SoundFile(str(m.path))) for m in self.members
            ]
            while True:
                parts = [
                    f.read(block_frames, dtype="float64", always_2d=True) for f in files
                ]
                lengths = {len(part) for part in parts}
                if len(lengths) > 1:
                    short = self.members[int(np.argmin([len(part) for part in parts]))]
                    raise AudioInputError(
                        f"{short.path}: ended early, at {start_frame + min(lengths)} frames "
                        "while the other files in the group go on (damaged file?)"
                    )
                frames = lengths.pop()
                if frames == 0:
                    return
                block = np.ascontiguousarray(np.concatenate(parts, axis=1).T)
                if check_finite:
                    self._check_finite(block, start_frame)
                yield block
                start_frame += frames

    def _check_finite(self, block: np.ndarray, start_frame: int) -> None:
        finite = np.isfinite(block)
        if finite.all():
            return
        bad = ~finite
        frame = int(bad.any(axis=0).argmax())
        channel = int(bad[:, frame].argmax())
        path, file_channel = self.locate_channel(channel)
        value = block[channel, frame]
        time_s = (start_frame + frame) / self.sample_rate_hz
        raise AudioInputError(
            f"{path}: {value} sample at {time_s:.6f} s (frame {start_frame + frame}), "
            f"channel {file_channel + 1}; audio must hold finite numbers only"
        )


def open_group(paths: Sequence[PathLike]) -> AudioGroup:
    """Present several files (e.g. one mono stem per microphone) as one source.

    Parameters
    ----------
    paths : sequence of path-like
        The files, in the channel order wanted. Members may be mono or
        multichannel; one path is allowed and gives a one-member group.

    Returns
    -------
    AudioGroup

    Raises
    ------
    AudioInputError
        If a file cannot be read, the same file is given twice, or the files
        differ in sample rate or length (the message names them).
    """
    if not paths:
        raise AudioInputError("no audio files given")
    members = tuple(probe(p) for p in paths)
    _refuse_repeats(members)
    first = members[0]
    for m in members[1:]:
        if m.sample_rate_hz != first.sample_rate_hz:
            raise AudioInputError(
                f"cannot group files with different sample rates: {first.path} is "
                f"{first.sample_rate_hz} Hz but {m.path} is {m.sample_rate_hz} Hz"
            )
        if m.frames != first.frames:
            raise AudioInputError(
                f"cannot group files of different lengths: {first.path} has {first.frames} "
                f"frames ({first.duration_s:.3f} s) but {m.path} has {m.frames} "
                f"({m.duration_s:.3f} s); the stems must start and end together"
            )
    return AudioGroup(members)


def _refuse_repeats(members: Sequence[AudioInfo]) -> None:
    seen: dict[tuple[int, int], Path] = {}
    for m in members:
        st = m.path.stat()
        key = (st.st_dev, st.st_ino)
        if key in seen:
            raise AudioInputError(
                f"{m.path} is given twice (same file as {seen[key]}); each microphone "
                "must come from its own file"
            )
        seen[key] = m.path


def read_blocks(
    source: PathLike | AudioInfo | AudioGroup,
    block_frames: int,
    *,
    check_finite: bool = True,
) -> Iterator[np.ndarray]:
    """Read audio as float64 blocks shaped ``(channels, frames)``.

    Parameters
    ----------
    source : path-like, AudioInfo or AudioGroup
        One file, or a group from :func:`open_group`.
    block_frames : int
        Frames per block; the last block may be shorter.
    check_finite : bool, optional
        If True (default), raise :class:`AudioInputError` at the first NaN or
        infinite sample, giving its time in seconds and its channel (1-based).

    Yields
    ------
    numpy.ndarray
        C-contiguous float64 array, samples scaled to [-1, 1) for integer files.
    """
    if isinstance(source, AudioGroup):
        group = source
    elif isinstance(source, AudioInfo):
        group = AudioGroup((source,))
    else:
        group = AudioGroup((probe(source),))
    return group.read_blocks(block_frames, check_finite=check_finite)


def require_multichannel(source: AudioInfo | AudioGroup) -> None:
    """Refuse a source with fewer than two channels.

    Raises
    ------
    AudioInputError
        Explaining that two or more microphones are needed.
    """
    if source.channels >= 2:
        return
    name = source.path if isinstance(source, AudioInfo) else source.paths[0]
    raise AudioInputError(
        f"{name} has only one channel. liftmag needs two or more microphones (one "
        "multichannel file, or several mono files grouped together) because its "
        "estimators compare the channels to tell the talker from the noise."
    )


@dataclass(frozen=True)
class WriteReport:
    """What happened while writing.

    Attributes
    ----------
    frames_written : int
    clipped_samples : int
        Samples beyond full scale that were clipped (integer subtypes only).
    peak_dbfs : float
        Peak of what the caller asked to write, before clipping, in dB
        relative to full scale (``-inf`` for silence). Above 0 means clipping
        for integer subtypes.
    carried_chunks : tuple of str
        Chunk ids copied from the input (e.g. ``("bext", "iXML")``).
    dropped_chunks : tuple of str
        Chunk ids the input had but the output format cannot hold.
    """

    frames_written: int
    clipped_samples: int
    peak_dbfs: float
    carried_chunks: tuple[str, ...]
    dropped_chunks: tuple[str, ...]


class AtomicAudioWriter:
    """Write an audio file so it appears complete or not at all.

    Samples go to a hidden temporary file in the destination folder
    (``.name.partial-XXXX``), which is renamed over the destination when the
    ``with`` block ends normally and removed if it ends by an exception
    (``KeyboardInterrupt`` included).

    Parameters
    ----------
    path : path-like
        Destination file.
    like : AudioInfo or AudioGroup, optional
        The input. Its sample rate is kept, and by default its format and
        subtype (for a group, those of the first file). If it is a WAV/BWF
        with ``bext`` or ``iXML`` chunks, they are copied into the output byte
        for byte (from the first file of a group). Writing over any of its
        files is refused.
    channels : int, optional
        Output channels; default: as many as ``like``.
    sample_rate_hz : int, optional
        Only when there is no ``like``.
    format, subtype : str, optional
        libsndfile names (``"WAV"``, ``"FLAC"``; ``"PCM_24"``, ``"FLOAT"``) to
        override the input's. Without ``like`` they default to WAV, FLOAT.
    force : bool, optional
        Allow replacing an existing destination file (never an input).
    carry_chunks : bool, optional
        Copy ``bext``/``iXML`` from the input (default True).

    Examples
    --------
    >>> with AtomicAudioWriter("out.wav", like=info) as out:   # doctest: +SKIP
    ...     for block in read_blocks(info, 4096):
    ...         out.write(block)
    >>> out.report.clipped_samples                             # doctest: +SKIP
    """

    def __init__(
        self,
        path: PathLike,
        like: AudioInfo | AudioGroup | None = None,
        *,
        channels: int | None = None,
        sample_rate_hz: int | None = None,
        format: str | None = None,
        subtype: str | None = None,
        force: bool = False,
        carry_chunks: bool = True,
    ) -> None:
        self.path = Path(path)
        members = _members(like)
        self.sample_rate_hz = _output_rate_hz(like, sample_rate_hz)
        self.channels = channels if channels is not None else (like.channels if like else 0)
        if self.channels < 1:
            raise ValueError("give the number of output channels (or an input to copy it from)")
        self.format, self.subtype = _output_format(members, format, subtype)
        self.force = force
        self._refuse_destination(members)
        found = _chunks_from(members[0].path) if members and carry_chunks else ()
        if self.format in _WAVE_FORMATS:
            self._chunks, dropped = found, ()
        else:
            self._chunks, dropped = (), tuple(chunk_id for chunk_id, _ in found)
        self._dropped = dropped
        self._clips = self.subtype not in _FLOAT_SUBTYPES
        self._file: sf.SoundFile | None = None
        self._temp: Path | None = None
        self._frames = 0
        self._clipped = 0
        self._peak = 0.0
        self.report: WriteReport | None = None

    def use_chunks(self, chunks: Sequence[tuple[str, bytes]]) -> None:
        """Write these ``(id, payload)`` chunks instead of the ones carried from the input.

        For callers that rewrite the input's metadata to describe the output. Formats
        other than WAVE cannot hold them: they are then reported as dropped.
        """
        found = tuple(chunks)
        if self.format in _WAVE_FORMATS:
            self._chunks, self._dropped = found, ()
        else:
            self._chunks, self._dropped = (), tuple(chunk_id for chunk_id, _ in found)

    def __enter__(self) -> AtomicAudioWriter:
        self._temp = _create_temp(self.path)
        try:
            self._file = sf.SoundFile(
                str(self._temp), "w", self.sample_rate_hz, self.channels,
                self.subtype, format=self.format,
            )
        except BaseException:
            self._discard()
            raise
        return self

    def write(self, block: np.ndarray) -> None:
        """Append a block shaped ``(channels, frames)`` of float samples (full scale 1.0).

        Raises
        ------
        ValueError
            If the shape is wrong or a sample is NaN or infinite.
        """
        if self._file is None:
            raise RuntimeError("write() outside the writer's 'with' block")
        block = np.asarray(block, dtype=np.float64)
        if block.ndim != 2 or block.shape[0] != self.channels:
            raise ValueError(
                f"expected a block shaped ({self.channels}, frames), got {block.shape}"
            )
        if block.size == 0:
            return
        if not np.isfinite(block).all():
            raise ValueError(
                f"refusing to write NaN or infinite samples near frame {self._frames}"
            )
        magnitude = np.abs(block)
        self._peak = max(self._peak, float(magnitude.max()))
        if self._clips:
            over = magnitude > 1.0
            if over.any():
                self._clipped += int(over.sum())
                # Clip here: whether libsndfile clips or wraps depends on its version/settings.
                block = np.clip(block, -1.0, 1.0)
        self._file.write(block.T)
        self._frames += block.shape[1]

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        if exc_type is not None:
            self._discard()
            return
        try:
            self._commit()
        except BaseException:
            self._discard()
            raise

    def _commit(self) -> None:
        assert self._file is not None and self._temp is not None
        self._file.close()
        self._file = None
        if self._chunks:
            chunked = _create_temp(self.path)
            try:
                riffchunks.copy_with_chunks(self._temp, chunked, self._chunks)
            finally:
                self._temp.unlink()
                self._temp = chunked
        _fsync(self._temp)
        if not self.force and self.path.exists():
            raise AudioOutputError(f"{self.path} appeared while writing; not replacing it")
        os.replace(self._temp, self.path)
        self._temp = None
        self.report = WriteReport(
            frames_written=self._frames,
            clipped_samples=self._clipped,
            peak_dbfs=20.0 * math.log10(self._peak) if self._peak > 0 else -math.inf,
            carried_chunks=tuple(chunk_id for chunk_id, _ in self._chunks),
            dropped_chunks=self._dropped,
        )

    def _discard(self) -> None:
        if self._file is not None:
            with contextlib.suppress(Exception):
                self._file.close()
            self._file = None
        if self._temp is not None:
            with contextlib.suppress(FileNotFoundError):
                self._temp.unlink()
            self._temp = None

    def _refuse_destination(self, members: Sequence[AudioInfo]) -> None:
        folder = self.path.parent
        if not folder.is_dir():
            raise AudioOutputError(f"{self.path}: folder {folder} does not exist")
        if not self.path.exists():
            return
        for m in members:
            if m.path.exists() and os.path.samefile(m.path, self.path):
                raise AudioOutputError(
                    f"{self.path} is an input file; write the result to a new file"
                )
        if self.path.is_dir():
            raise AudioOutputError(f"{self.path} is a folder")
        if not self.force:
            raise AudioOutputError(
                f"{self.path} already exists; choose another name or allow overwriting"
            )


def _members(like: AudioInfo | AudioGroup | None) -> tuple[AudioInfo, ...]:
    if like is None:
        return ()
    return like.members if isinstance(like, AudioGroup) else (like,)


def _output_rate_hz(like: AudioInfo | AudioGroup | None, sample_rate_hz: int | None) -> int:
    if like is None:
        if sample_rate_hz is None:
            raise ValueError("give sample_rate_hz (or an input to copy it from)")
        return int(sample_rate_hz)
    if sample_rate_hz is not None and sample_rate_hz != like.sample_rate_hz:
        raise ValueError(
            f"output keeps the input's {like.sample_rate_hz} Hz; "
            f"{sample_rate_hz} Hz was asked (liftmag does not resample)"
        )
    return like.sample_rate_hz


def _output_format(
    members: Sequence[AudioInfo], format: str | None, subtype: str | None
) -> tuple[str, str]:
    out_format = (format or (members[0].format if members else "WAV")).upper()
    if subtype is None:
        subtype = members[0].subtype if members else "FLOAT"
        if not sf.check_format(out_format, subtype):
            subtype = sf.default_subtype(out_format)
    subtype = subtype.upper()
    if out_format not in sf.available_formats():
        raise ValueError(f"unknown audio format {out_format!r}")
    if not sf.check_format(out_format, subtype):
        allowed = ", ".join(sf.available_subtypes(out_format))
        raise ValueError(f"{out_format} cannot hold {subtype} samples; choose one of {allowed}")
    return out_format, subtype


def _chunks_from(path: Path) -> tuple[tuple[str, bytes], ...]:
    try:
        return riffchunks.chunks_to_carry(path)
    except ValueError as exc:
        raise AudioInputError(
            f"cannot carry the bext/iXML chunks of {path}: {exc} "
            "(write without carrying chunks to go on)"
        ) from exc


def _create_temp(destination: Path) -> Path:
    # O_EXCL: never reuse someone else's file; mode 0o666 lets the umask decide.
    while True:
        temp = destination.with_name(f".{destination.name}.partial-{secrets.token_hex(4)}")
        try:
            fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        except FileExistsError:
            continue
        os.close(fd)
        return temp


def _fsync(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_atomically(path: Path, data: bytes) -> None:
    """Write to a hidden temporary file beside ``path`` and rename it over ``path``."""
    temp = path.with_name(f".{path.name}.partial-{secrets.token_hex(4)}")
    try:
        with open(temp, "xb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(temp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            temp.unlink()
        raise
