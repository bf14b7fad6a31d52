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
import errno
import hashlib
import math
import os
import secrets
import shutil
import signal
import stat
import struct
import threading
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType

import numpy as np
import soundfile as sf

from liftmag import riffchunks
from liftmag.errors import LiftmagError

__all__ = [
    "MAX_CHANNELS",
    "AtomicAudioWriter",
    "AudioGroup",
    "AudioInfo",
    "AudioInputError",
    "AudioOutputError",
    "OutputExistsError",
    "StagedOutputs",
    "WriteReport",
    "carried_chunks",
    "open_group",
    "output_container",
    "probe",
    "read_blocks",
    "refuse_destination",
    "remove_stale_temp",
    "require_at_most_max_mics",
    "require_multichannel",
    "sha256_file",
    "temp_prefix",
    "write_atomically",
]

PathLike = str | os.PathLike[str]

# libsndfile formats stored as RIFF/RF64 WAVE, the only ones that carry bext/iXML.
_WAVE_FORMATS = frozenset({"WAV", "WAVEX", "RF64"})
# Subtypes that store floating point: no full scale to clip at.
_FLOAT_SUBTYPES = frozenset({"FLOAT", "DOUBLE"})
# The most microphones liftmag takes. The lifted statistics grow as M**4 per bin (M**2 x M**2
# real matrices): 16 channels at 16 kHz already hold about 0.5 GiB, 32 would need 8 GiB.
MAX_CHANNELS = 16
# Bytes per sample of the fixed-size PCM/float subtypes, to turn a declared size into frames.
_SAMPLE_BYTES = {
    "PCM_S8": 1, "PCM_U8": 1, "PCM_16": 2, "PCM_24": 3, "PCM_32": 4, "FLOAT": 4, "DOUBLE": 8,
    "ULAW": 1, "ALAW": 1,
}
# Streaming writers leave these in a size field they could not go back and fill in.
_UNKNOWN_SIZES = (0, 0xFFFFFFFF)
# Output file name extension -> libsndfile container. ".wav" family keeps a WAVE input's own
# container (WAV, WAVEX or RF64); the rest name one container each.
_CONTAINERS = {
    ".wav": "WAV", ".wave": "WAV", ".bwf": "WAV", ".rf64": "RF64", ".w64": "W64",
    ".flac": "FLAC", ".aif": "AIFF", ".aiff": "AIFF", ".aifc": "AIFF", ".caf": "CAF",
    ".ogg": "OGG", ".oga": "OGG", ".opus": "OGG", ".mp3": "MP3", ".au": "AU", ".snd": "AU",
}
HASH_CHUNK_BYTES = 1 << 20  # sha256_file reads this much at a time
# Longest file name most file systems take (ext4, XFS, btrfs, APFS: 255 bytes).
_NAME_MAX_BYTES = 255


class AudioInputError(LiftmagError, ValueError):
    """An input audio file is missing, unreadable, unsuitable or holds bad samples."""


class AudioOutputError(LiftmagError, ValueError):
    """The output cannot be written where or how it was asked."""


class OutputExistsError(AudioOutputError):
    """The output is an existing regular file (not an input) and replacing was not allowed."""


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
    if not p.is_file():
        # A FIFO or a device would block, or be read once and be gone the second time.
        raise AudioInputError(f"{p}: not a regular file (a pipe or a device?); give an audio file")
    try:
        info = sf.info(str(p))
    except (sf.LibsndfileError, RuntimeError) as exc:
        said = getattr(exc, "error_string", None) or str(exc)
        raise AudioInputError(
            f"{p}: cannot read this as audio (libsndfile says: {said})"
        ) from exc
    except OSError as exc:
        raise AudioInputError(f"{p}: cannot read it ({exc.strerror or exc})") from exc
    _refuse_truncated(p, str(info.format), str(info.subtype), int(info.channels), info.frames)
    return AudioInfo(
        path=p,
        sample_rate_hz=int(info.samplerate),
        channels=int(info.channels),
        frames=int(info.frames),
        subtype=str(info.subtype),
        format=str(info.format),
        duration_s=info.frames / info.samplerate,
    )


def _refuse_truncated(path: Path, fmt: str, subtype: str, channels: int, frames: int) -> None:
    """Refuse a file whose header promises more audio than the file holds.

    libsndfile quietly shortens a cut WAV, AIFF or W64 to what is on disk, so a take cut
    by a failed copy would come out short with no word said. The header's own size field
    is the witness: RIFF 1.0 / EBU Tech 3306 ``data`` (and ``ds64``), AIFF ``COMM``
    numSampleFrames (Apple AIFF 1.3, 1989), W64 ``data`` (64-bit size, 24-byte header),
    and for Ogg the end-of-stream flag of the last page (RFC 3533, header_type 0x04).
    """
    try:
        declared = _declared_frames(path, fmt, subtype, channels)
        if fmt == "OGG" and _ogg_is_cut(path):
            raise AudioInputError(
                f"{path}: truncated: its last Ogg page does not end the stream (an "
                "interrupted copy or a damaged file?)"
            )
    except (OSError, struct.error):
        declared = None
    if declared is not None and declared > frames:
        raise AudioInputError(
            f"{path}: truncated: its header declares {declared} frames but only {frames} "
            "are in the file (an interrupted copy or a damaged file?)"
        )


def _declared_frames(path: Path, fmt: str, subtype: str, channels: int) -> int | None:
    sample_bytes = _SAMPLE_BYTES.get(subtype)
    with open(path, "rb") as fh:
        size = os.fstat(fh.fileno()).st_size
        head = fh.read(12)
        if fmt in _WAVE_FORMATS and head[:4] in (b"RIFF", b"RF64", b"BW64"):
            return _wave_declared_frames(fh, size, head[:4] != b"RIFF", sample_bytes, channels)
        if fmt == "AIFF" and head[:4] == b"FORM":
            return _aiff_declared_frames(fh, size)
        if fmt == "W64" and sample_bytes:
            return _w64_declared_frames(fh, size, sample_bytes * channels)
    return None


def _ogg_is_cut(path: Path) -> bool:
    with open(path, "rb") as fh:
        size = os.fstat(fh.fileno()).st_size
        fh.seek(max(0, size - 65_536))
        tail = fh.read()
    last_page = tail.rfind(b"OggS")
    return last_page >= 0 and last_page + 5 < len(tail) and not tail[last_page + 5] & 0x04


def _wave_declared_frames(fh, size: int, is_rf64: bool, sample_bytes, channels: int):
    offset, ds64_data, block_align = 12, None, None
    while offset + 8 <= size:
        fh.seek(offset)
        chunk_id, chunk_size = struct.unpack("<4sI", fh.read(8))
        if chunk_id == b"ds64" and is_rf64 and chunk_size >= 24:
            ds64_data = struct.unpack("<QQ", fh.read(16))[1]
        elif chunk_id == b"fmt " and chunk_size >= 16:
            block_align = struct.unpack("<HHIIH", fh.read(14))[4]
        elif chunk_id == b"data":
            if is_rf64 and chunk_size == 0xFFFFFFFF:
                chunk_size = ds64_data or 0
            elif chunk_size in _UNKNOWN_SIZES:
                return None
            align = block_align or ((sample_bytes or 0) * channels)
            return chunk_size // align if align else None
        offset += 8 + chunk_size + (chunk_size & 1)
    return None


def _aiff_declared_frames(fh, size: int) -> int | None:
    offset = 12
    while offset + 8 <= size:
        fh.seek(offset)
        chunk_id, chunk_size = struct.unpack(">4sI", fh.read(8))
        if chunk_id == b"COMM" and chunk_size >= 6:
            return struct.unpack(">hI", fh.read(6))[1]
        offset += 8 + chunk_size + (chunk_size & 1)
    return None


def _w64_declared_frames(fh, size: int, frame_bytes: int) -> int | None:
    # Sony Wave64: 16-byte GUID ids (the first four bytes spell the RIFF id), 64-bit sizes
    # that count the 24-byte header, chunks aligned to 8 bytes.
    offset = 40
    while offset + 24 <= size:
        fh.seek(offset)
        guid, chunk_size = struct.unpack("<16sQ", fh.read(24))
        if guid[:4] == b"data":
            return (chunk_size - 24) // frame_bytes if chunk_size >= 24 else None
        if chunk_size < 24:
            return None
        offset += (chunk_size + 7) & ~7
    return None


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
                stack.enter_context(_open_for_reading(m.path)) for m in self.members
            ]
            while True:
                # Never past the length probed: a file that grows while read (a recorder
                # still writing) gives the length every other step was planned for.
                wanted = min(block_frames, self.frames - start_frame)
                parts = [_read(f, m.path, wanted) for f, m in zip(files, self.members, strict=True)]
                lengths = {len(part) for part in parts}
                if len(lengths) > 1:
                    short = self.members[int(np.argmin([len(part) for part in parts]))]
                    raise AudioInputError(
                        f"{short.path}: ended early, at {start_frame + min(lengths)} frames "
                        "while the other files in the group go on (damaged file?)"
                    )
                frames = lengths.pop()
                if frames == 0 and start_frame < self.frames:
                    raise AudioInputError(
                        f"{self.members[0].path}: ended at {start_frame} frames of the "
                        f"{self.frames} it had when opened (cut or overwritten while "
                        "being read?)"
                    )
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


def _open_for_reading(path: Path) -> sf.SoundFile:
    try:
        return sf.SoundFile(str(path))
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        said = getattr(exc, "error_string", None) or getattr(exc, "strerror", None) or exc
        raise AudioInputError(f"{path}: cannot read it any more ({said})") from exc


def _read(f: sf.SoundFile, path: Path, frames: int) -> np.ndarray:
    try:
        return f.read(frames, dtype="float64", always_2d=True)
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        said = getattr(exc, "error_string", None) or getattr(exc, "strerror", None) or exc
        raise AudioInputError(
            f"{path}: damaged, cannot be read to its end (libsndfile says: {said})"
        ) from exc


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


def require_at_most_max_mics(n_mics: int) -> None:
    """Refuse more than :data:`MAX_CHANNELS` microphones, before any statistics are allocated.

    Raises
    ------
    AudioInputError
        Naming the limit and why it exists.
    """
    if n_mics > MAX_CHANNELS:
        raise AudioInputError(
            f"{n_mics} microphones: liftmag takes at most {MAX_CHANNELS} (its statistics grow "
            "as the fourth power of the count); choose the microphones nearest the talker "
            "(--mics)"
        )


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
        self._extra: tuple[Path, int | None] | None = None  # the chunked copy being made
        self._lock_fd: int | None = None
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
        try:
            # A signal held back here arrives at the end of the with, inside this try.
            with _signals_deferred():
                self._temp, self._lock_fd = _create_temp(self.path)
            self._file = sf.SoundFile(
                str(self._temp), "w", self.sample_rate_hz, self.channels,
                self.subtype, format=self.format,
            )
        except (sf.LibsndfileError, RuntimeError, OSError) as exc:
            self._discard()
            raise _output_error(self.path, exc) from exc
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
        try:
            self._file.write(block.T)
        except (sf.LibsndfileError, RuntimeError, OSError) as exc:
            raise _output_error(self.path, exc) from exc
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
        except (sf.LibsndfileError, RuntimeError, OSError) as exc:
            self._discard()
            raise _output_error(self.path, exc) from exc
        except BaseException:
            self._discard()
            raise

    def _commit(self) -> None:
        assert self._file is not None and self._temp is not None
        self._file.close()
        self._file = None
        if self._chunks:
            with _signals_deferred():
                self._extra = _create_temp(self.path)  # _discard removes it from here on
            chunked, chunked_fd = self._extra
            try:
                riffchunks.copy_with_chunks(self._temp, chunked, self._chunks)
            finally:
                with _signals_deferred():
                    self._temp.unlink()
                    _release(self._lock_fd)
                    self._temp, self._lock_fd = chunked, chunked_fd
                    self._extra = None
        _fsync(self._temp)
        if not self.force and os.path.lexists(self.path):
            raise AudioOutputError(f"{self.path} appeared while writing; not replacing it")
        _refuse_special(self.path)
        os.replace(self._temp, self.path)
        self._temp = None
        _release(self._lock_fd)
        self._lock_fd = None
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
        if self._extra is not None:
            with contextlib.suppress(FileNotFoundError):
                self._extra[0].unlink()
            _release(self._extra[1])
            self._extra = None
        _release(self._lock_fd)
        self._lock_fd = None

    def _refuse_destination(self, members: Sequence[AudioInfo]) -> None:
        refuse_destination(self.path, [m.path for m in members], self.force)


def refuse_destination(path: Path, inputs: Sequence[PathLike], force: bool) -> None:
    """Refuse to write ``path`` where that could lose something.

    Never an input (whatever ``force`` says), never a folder, device, FIFO or socket
    (``force`` replaces regular files only), never an existing file without ``force``, and
    never into a missing folder or under a name the file system cannot hold.

    Raises
    ------
    AudioOutputError
        One line naming what is in the way.
    """
    folder = path.parent
    if not folder.is_dir():
        raise AudioOutputError(f"{path}: folder {folder} does not exist")
    if len(os.fsencode(path.name)) > _NAME_MAX_BYTES:
        raise AudioOutputError(
            f"{path.name[:40]}...: file name of {len(os.fsencode(path.name))} bytes; file "
            f"systems take at most {_NAME_MAX_BYTES}"
        )
    if not os.path.lexists(path):
        return
    for m in inputs:
        if os.path.exists(m) and path.exists() and os.path.samefile(m, path):
            raise AudioOutputError(f"{path} is an input file; write the result to a new file")
    if path.is_dir():
        raise AudioOutputError(f"{path} is a folder; give a file name for the output")
    _refuse_special(path)
    if not force:
        raise OutputExistsError(
            f"{path} already exists; choose another name or allow overwriting"
        )


def _refuse_special(path: Path) -> None:
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        return  # a new name, or a link to nothing (replacing the link loses nothing)
    if not stat.S_ISREG(mode):
        raise AudioOutputError(
            f"{path} is not a regular file (a device, pipe or socket); liftmag writes "
            "regular files only"
        )


def output_container(
    path: PathLike, like: AudioInfo | AudioGroup | None
) -> tuple[str, str | None, str]:
    """Container and subtype for an output file, chosen by its name's extension.

    Returns ``(format, subtype, note)``: the libsndfile container the extension names (a
    ``.wav``-family name keeps a WAVE input's WAV, WAVEX or RF64), the input's subtype if
    that container can hold it (else the nearest it can: 24-bit for float or wider PCM,
    the container's default otherwise; ``None`` means "as the input"), and a one-line note
    when the container or subtype differs from the input's ("" when nothing changed).

    Raises
    ------
    AudioOutputError
        For an extension that names no container liftmag writes.
    """
    p = Path(path)
    members = _members(like)
    ext = p.suffix.lower()
    if ext not in _CONTAINERS or _CONTAINERS[ext] not in sf.available_formats():
        known = " ".join(sorted(e for e, f in _CONTAINERS.items() if f in sf.available_formats()))
        raise AudioOutputError(
            f"{p}: cannot tell the audio format from the extension {ext or '(none)'!r}; "
            f"use one of {known}"
        )
    container = _CONTAINERS[ext]
    if not members:
        return container, None, ""
    first = members[0]
    if container == "WAV" and first.format in _WAVE_FORMATS:
        container = first.format
    if container == first.format:
        return container, None, ""
    subtype = first.subtype
    if ext == ".opus":
        subtype = "OPUS"
    elif not sf.check_format(container, subtype):
        wide = subtype in _FLOAT_SUBTYPES or subtype in ("PCM_24", "PCM_32")
        subtype = "PCM_24" if wide and sf.check_format(container, "PCM_24") else (
            sf.default_subtype(container)
        )
    note = f"{first.format} {first.subtype} in, {container} {subtype} out (from the name {p.name})"
    return container, subtype, note


def _output_error(path: Path, exc: BaseException) -> AudioOutputError:
    code = getattr(exc, "errno", None)
    said = getattr(exc, "strerror", None) or getattr(exc, "error_string", None) or str(exc)
    if code == errno.ENOSPC or "No space" in str(said):
        said = "the disk is full"
    return AudioOutputError(f"cannot write {path}: {said}; nothing was written")


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
    return carried_chunks(path)


def carried_chunks(
    path: PathLike, chunk_ids: Sequence[str] = riffchunks.CARRIED_CHUNK_IDS
) -> tuple[tuple[str, bytes], ...]:
    """``(id, payload)`` of these chunks in a WAVE input (see ``riffchunks.chunks_to_carry``),
    also when its RIFF size field is one a streaming writer leaves (0 or 0xFFFFFFFF).

    Raises
    ------
    AudioInputError
        For a chunk list that is damaged (the audio itself was checked when probed).
    """
    try:
        return riffchunks.chunks_to_carry(path, chunk_ids)
    except ValueError as exc:
        found = _chunks_ignoring_riff_size(Path(path), chunk_ids)
        if found is not None:
            return found
        raise AudioInputError(
            f"{path}: the audio reads in full, but the chunk list around it is damaged "
            f"({exc}), so its bext/iXML metadata cannot be carried; re-export the file"
        ) from exc


def _chunks_ignoring_riff_size(
    path: Path, chunk_ids: Sequence[str]
) -> tuple[tuple[str, bytes], ...] | None:
    """Carried chunks of a RIFF WAVE whose RIFF size field is unusual, or None if damaged.

    Streaming writers leave the RIFF size (and sometimes the data size) at 0 or 0xFFFFFFFF
    because they cannot go back and fill it in; libsndfile then reads to the end of the file.
    The chunks are walked to the end of the file instead (RIFF 1.0 layout); a data chunk of
    unknown size runs to the end, so only chunks before it can be found.
    """
    found: dict[str, bytes] = {}
    with open(path, "rb") as fh:
        size = os.fstat(fh.fileno()).st_size
        if fh.read(12)[:4] != b"RIFF":
            return None
        offset = 12
        while offset + 8 <= size:
            fh.seek(offset)
            chunk_id, chunk_size = struct.unpack("<4sI", fh.read(8))
            if chunk_id == b"data" and chunk_size in _UNKNOWN_SIZES:
                break
            if offset + 8 + chunk_size > size:
                return None
            name = chunk_id.decode("latin-1")
            if name in chunk_ids and name not in found:
                found[name] = fh.read(chunk_size)
            offset += 8 + chunk_size + (chunk_size & 1)
    return tuple((cid, found[cid]) for cid in chunk_ids if cid in found)


def temp_prefix(destination: PathLike) -> str:
    """Name prefix of the hidden temporary files of ``destination`` (``.NAME.partial-``).

    Long names are cut so that the temporary name stays within what file systems take.
    """
    name = Path(destination).name
    while len(os.fsencode(f".{name}.partial-00000000")) > _NAME_MAX_BYTES:
        name = name[:-1]
    return f".{name}.partial-"


_DEFERRED_SIGNALS = tuple(
    getattr(signal, name) for name in ("SIGINT", "SIGTERM", "SIGHUP") if hasattr(signal, name)
)


@contextlib.contextmanager
def _signals_deferred() -> Iterator[None]:
    """Hold SIGINT, SIGTERM and SIGHUP back while the block hands a temporary path over.

    A signal turned into an exception between a temporary file's creation and the moment its
    owner records it (a tuple assignment, a swap of two names) would leave the file behind
    with nobody to remove it (found by the SIGTERM loop: 1 in about 40 rounds). Inside the
    block the handlers only note a signal; the noted signal goes to the handler that was
    there as soon as the block ends, when the owner can clean up. (Blocking with
    ``pthread_sigmask`` is not enough: the kernel may hand the signal to another thread,
    e.g. a BLAS worker, and Python then runs the handler in the main thread at once.)
    Python runs signal handlers in the main thread only, so other threads need nothing.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    noted: list[int] = []
    previous = {}
    for signum in _DEFERRED_SIGNALS:
        handler = signal.getsignal(signum)
        if handler not in (signal.SIG_IGN, None):
            previous[signum] = signal.signal(signum, lambda n, _frame: noted.append(n))
    try:
        yield
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)
        for signum in dict.fromkeys(noted):
            handler = previous[signum]
            if callable(handler):
                handler(signum, None)
            else:  # SIG_DFL: let the default action happen, as it would have
                os.kill(os.getpid(), signum)


def _create_temp(destination: Path) -> tuple[Path, int | None]:
    """A new, empty temporary file beside ``destination``, and a descriptor holding a lock.

    The lock (``flock``, released by the kernel even when the process is killed) tells a
    clean-up of stale temporary files (:func:`remove_stale_temp`) that this one is in use.
    """
    # O_EXCL: never reuse someone else's file; mode 0o666 lets the umask decide.
    while True:
        temp = destination.with_name(temp_prefix(destination) + secrets.token_hex(4))
        try:
            fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        except FileExistsError:
            continue
        except OSError as exc:
            raise _output_error(destination, exc) from exc
        try:
            if _lock_if_still_there(fd, temp):
                return temp, fd
        except BaseException:
            # A signal (SIGTERM as KeyboardInterrupt) between creating and handing over the
            # file: nobody else knows it yet, so remove it here.
            with contextlib.suppress(OSError):
                temp.unlink()
            os.close(fd)
            raise
        os.close(fd)  # a clean-up took it between creation and lock: make another


def _lock_if_still_there(fd: int, path: Path) -> bool:
    try:
        import fcntl
    except ImportError:  # no POSIX advisory locks (Windows): no clean-up runs either
        return True
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        return False
    try:
        return os.stat(path).st_ino == os.fstat(fd).st_ino
    except FileNotFoundError:
        return False


def _release(fd: int | None) -> None:
    if fd is not None:
        with contextlib.suppress(OSError):
            os.close(fd)


def remove_stale_temp(path: PathLike) -> bool:
    """Remove a temporary file left by a killed writer; leave one still being written.

    Returns True if the file was removed. A writer holds a lock on its temporary file for
    as long as it lives (see :func:`_create_temp`), so a file that cannot be locked belongs
    to a live process, perhaps another liftmag writing into the same folder.
    """
    try:  # O_NONBLOCK: a FIFO that happens to carry such a name must not hang the sweep
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK)
    except OSError:
        return False
    try:
        if not _lock_if_still_there(fd, Path(path)):
            return False
        if stat.S_ISDIR(os.fstat(fd).st_mode):
            # A directory staged by StagedOutputs.stage_dir (a plugin bundle, say).
            shutil.rmtree(path)
        else:
            os.unlink(path)
        return True
    except FileNotFoundError:
        return False
    finally:
        os.close(fd)


def _fsync(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_atomically(path: Path, data: bytes) -> None:
    """Write to a hidden temporary file beside ``path`` and rename it over ``path``.

    Raises :class:`AudioOutputError` (one line) if the file system refuses.
    """
    temp: Path | None = None
    lock_fd: int | None = None
    try:
        # A signal held back here arrives at the end of the with, inside this try.
        with _signals_deferred():
            temp, lock_fd = _create_temp(path)
        with open(temp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        _refuse_special(path)
        os.replace(temp, path)
    except BaseException as exc:
        if temp is not None:
            with contextlib.suppress(FileNotFoundError):
                temp.unlink()
        if isinstance(exc, OSError) and not isinstance(exc, AudioOutputError):
            raise _output_error(path, exc) from exc
        raise
    finally:
        _release(lock_fd)


def sha256_file(path: PathLike) -> str:
    """Hex SHA-256 of a file's bytes, read in chunks so memory does not grow with the file."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        while chunk := fh.read(HASH_CHUNK_BYTES):
            digest.update(chunk)
    return digest.hexdigest()


def _create_temp_dir(destination: Path) -> tuple[Path, int | None]:
    """A new, empty temporary directory beside ``destination``, and a descriptor holding a lock.

    Same name scheme and lock as :func:`_create_temp`, so :func:`remove_stale_temp` knows it.
    """
    while True:
        temp = destination.with_name(temp_prefix(destination) + secrets.token_hex(4))
        try:
            temp.mkdir()
        except FileExistsError:
            continue
        except OSError as exc:
            raise _output_error(destination, exc) from exc
        try:
            fd = os.open(temp, os.O_RDONLY | os.O_DIRECTORY)
            if _lock_if_still_there(fd, temp):
                return temp, fd
        except BaseException:
            shutil.rmtree(temp, ignore_errors=True)
            raise
        os.close(fd)  # a clean-up took it between creation and lock: make another


def _remove_path(path: Path) -> None:
    with contextlib.suppress(FileNotFoundError):
        if path.is_dir() and not path.is_symlink():
            shutil.rmtree(path)
        else:
            path.unlink()


class StagedOutputs:
    """Several outputs written under temporary names and put in place together, or none.

    Each staged file or directory is created beside its final path under the hidden name
    ``temp_prefix(final) + 8 hex digits`` and locked while this transaction lives, so a sweep of
    stale temporary files (:func:`remove_stale_temp`) leaves it alone until a crash frees it.
    :meth:`commit` renames every staged path into place; :meth:`rollback` removes them and the
    folders this transaction made. As a context manager it commits when the ``with`` block
    ends normally and rolls back when it ends by an exception (Ctrl-C included).

    A staged directory (:meth:`stage_dir`) replaces an existing directory of the same name
    whole, and only on commit: until then the old one stays untouched.

    >>> with StagedOutputs() as stage:                      # doctest: +SKIP
    ...     stage.write_text(out / "report.md", text)
    ...     sf.write(stage.file(out / "a.wav"), x, fs)
    ...     build_into(stage.stage_dir(dest / "liftmag.lv2"))
    """

    def __init__(self) -> None:
        self._made_dirs: list[Path] = []
        self._staged: list[tuple[Path, Path]] = []  # (temporary, final), in staging order
        self._locks: list[int | None] = []

    def __enter__(self) -> StagedOutputs:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        if exc_type is None:
            self.commit()
        else:
            self.rollback()

    def ensure_dir(self, path: PathLike) -> Path:
        """Create ``path`` and its missing parents; those made here go again on rollback."""
        path = Path(path)
        missing = []
        p = path
        while not p.exists():
            missing.append(p)
            p = p.parent
        for d in reversed(missing):
            try:
                d.mkdir()
            except OSError as exc:
                raise _output_error(d, exc) from exc
            self._made_dirs.append(d)
        return path

    def file(self, final: PathLike) -> Path:
        """A new, empty temporary file that becomes ``final`` on commit; write into it."""
        final = Path(final)
        self.ensure_dir(final.parent)
        with _signals_deferred():  # recorded before a signal can interrupt
            temp, fd = _create_temp(final)
            self._staged.append((temp, final))
            self._locks.append(fd)
        return temp

    def write_bytes(self, final: PathLike, data: bytes) -> Path:
        """Stage ``data`` as the content of ``final``; returns the temporary path."""
        temp = self.file(final)
        try:
            temp.write_bytes(data)
        except OSError as exc:
            raise _output_error(Path(final), exc) from exc
        return temp

    def write_text(self, final: PathLike, text: str) -> Path:
        """Stage ``text`` (UTF-8) as the content of ``final``; returns the temporary path."""
        return self.write_bytes(final, text.encode("utf-8"))

    def stage_dir(self, final: PathLike) -> Path:
        """A new, empty temporary directory that becomes ``final`` on commit; fill it.

        An existing directory at ``final`` is replaced whole on commit (never merged).
        """
        final = Path(final)
        self.ensure_dir(final.parent)
        with _signals_deferred():
            temp, fd = _create_temp_dir(final)
            self._staged.append((temp, final))
            self._locks.append(fd)
        return temp

    def commit(self) -> None:
        """Rename every staged path into place, in the order staged; then release the locks.

        Renames within one file system do not fail for want of space, so once the checks pass
        every path goes in; a refused destination (a device, a file where a directory is
        staged) stops the commit before anything moves, and everything staged is removed.
        """
        try:
            # Every refusal before the first rename, so a refused commit puts nothing in place.
            for temp, final in self._staged:
                if not temp.is_dir():
                    _refuse_special(final)
                elif (final.exists() or final.is_symlink()) and not (
                    final.is_dir() and not final.is_symlink()
                ):
                    raise AudioOutputError(
                        f"{final} exists and is not a directory; nothing was written"
                    )
            for temp, final in self._staged:
                if temp.is_dir() and final.is_dir():
                    self._swap_dir(temp, final)
                else:
                    os.replace(temp, final)
        except OSError as exc:
            self.rollback()
            raise _output_error(final, exc) from exc
        except BaseException:
            self.rollback()
            raise
        self._staged.clear()
        self._made_dirs.clear()
        self._release_locks()

    def rollback(self) -> None:
        """Remove what is still staged and the folders made here; nothing is put in place."""
        for temp, _ in self._staged:
            with contextlib.suppress(OSError):
                _remove_path(temp)
        for d in reversed(self._made_dirs):
            with contextlib.suppress(OSError):
                d.rmdir()  # only if empty: something committed or someone else's file stays
        self._staged.clear()
        self._made_dirs.clear()
        self._release_locks()

    def _swap_dir(self, temp: Path, final: Path) -> None:
        # rename(2) cannot replace a non-empty directory: move the old one aside under a
        # locked temporary name (swept if we die here), put the new one in, then delete.
        with _signals_deferred():
            aside, fd = _create_temp_dir(final)
        try:
            os.replace(final, aside / final.name)
            try:
                os.replace(temp, final)
            except BaseException:
                os.replace(aside / final.name, final)
                raise
        finally:
            shutil.rmtree(aside, ignore_errors=True)
            _release(fd)

    def _release_locks(self) -> None:
        for fd in self._locks:
            _release(fd)
        self._locks.clear()
