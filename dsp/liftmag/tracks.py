"""Tracks of a take: their names, choosing the array's microphones, the output's track list.

Location recordings often hold more tracks than microphones of one array: a boom, two
lavaliers and the recorder's own mix tracks in one polyphonic broadcast WAV, named in its
``iXML`` ``TRACK_LIST``. This module names the tracks of a source (one file, or a group of
mono stems), turns a ``--mics`` request (1-based numbers or track names) into channel
indices, and says which tracks each output channel carries, so the output's metadata can
describe the output rather than the input.

Apart from :func:`source_tracks` (which reads the chunks of the input files) these are
pure functions.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from liftmag import audio_io, riffchunks
from liftmag.errors import LiftmagError
from liftmag.riffchunks import IxmlTrack

if TYPE_CHECKING:
    from liftmag.audio_io import AudioGroup, AudioInfo

__all__ = [
    "FILE_OUTPUT_MODES",
    "FILE_OUTPUT_MODE_HELP",
    "SAME_TRACKS",
    "Track",
    "TrackChoiceError",
    "choose_mics",
    "dbfs_text",
    "describe_run",
    "output_tracks",
    "parse_mics",
    "source_tracks",
    "track_levels_db",
    "word_length_bits",
]

# Output modes that exist only for files (the engine sees the array; the file layer writes
# the rest of the take around it). Not engine settings, so not LV2 controls either.
SAME_TRACKS = "same-tracks"
FILE_OUTPUT_MODES: tuple[str, ...] = (SAME_TRACKS,)
FILE_OUTPUT_MODE_HELP: dict[str, str] = {
    SAME_TRACKS: "every track of the input, the reference track replaced by the cleaned "
                 "one and all others sample-identical (stands in for the original in a conform)",
}
TAKEN_OUT_SUFFIX = " taken out"


class TrackChoiceError(LiftmagError, ValueError):
    """A ``--mics`` request that does not fit the take: one line that says why."""


@dataclass(frozen=True)
class Track:
    """One channel of a source.

    Attributes
    ----------
    index : int
        1-based position among the source's channels (what ``--mics 3`` means).
    name : str
        Track name from the ``iXML`` ``TRACK_LIST`` ('' when the file names none).
    file : Path
        The file holding the track.
    file_channel : int
        0-based channel within that file.
    ixml : IxmlTrack or None
        The ``TRACK`` element describing it, if the file has one.
    """

    index: int
    name: str
    file: Path
    file_channel: int
    ixml: IxmlTrack | None = None

    @property
    def label(self) -> str:
        return f"{self.index} ({self.name})" if self.name else str(self.index)


def source_tracks(source: AudioInfo | AudioGroup) -> tuple[Track, ...]:
    """The tracks of an ``AudioInfo`` or ``AudioGroup``, named from each file's ``iXML``.

    Raises ``ValueError`` for a WAVE file whose chunks are malformed.
    """
    members = getattr(source, "members", (source,))
    tracks: list[Track] = []
    for member in members:
        described = _file_tracks(member.path, member.channels)
        for channel in range(member.channels):
            ixml = described.get(channel)
            tracks.append(Track(
                index=len(tracks) + 1, name=ixml.name if ixml else "", file=Path(member.path),
                file_channel=channel, ixml=ixml,
            ))
    return tuple(tracks)


def _file_tracks(path: Path, channels: int) -> dict[int, IxmlTrack]:
    """0-based file channel -> its iXML TRACK, by INTERLEAVE_INDEX (or order, if absent)."""
    chunks = dict(audio_io.carried_chunks(path, ("iXML",)))
    listed = riffchunks.ixml_tracks(chunks["iXML"]) if "iXML" in chunks else None
    if not listed:
        return {}
    by_interleave = {
        t.interleave_index - 1: t for t in listed
        if t.interleave_index is not None and 1 <= t.interleave_index <= channels
    }
    if by_interleave:
        return by_interleave
    # No interleave indices: trust document order only if it covers the channels exactly.
    return dict(enumerate(listed)) if len(listed) == channels else {}


def parse_mics(text: str) -> tuple[str, ...]:
    """``"BOOM,LAV1"`` or ``"1,3"`` -> the items, spaces around them removed."""
    items = tuple(part.strip() for part in text.split(","))
    if not text.strip() or any(not item for item in items):
        raise TrackChoiceError(
            f"mics {text!r}: give track numbers or names separated by commas, e.g. 1,2 or "
            "BOOM,LAV1"
        )
    return items


def choose_mics(tracks: Sequence[Track], wanted: Sequence[str], where: str) -> tuple[int, ...]:
    """The 0-based source channels that form the array, in the order asked.

    Items made of digits are 1-based track numbers; others are track names (exact, or
    else the one name equal but for letter case). ``where`` names the take in messages.

    Raises
    ------
    TrackChoiceError
        For an unknown name (listing the take's names), a number out of range, a track
        asked twice, or fewer than two microphones.
    """
    chosen: list[int] = []
    for item in wanted:
        position = _resolve(tracks, item, where)
        if position in chosen:
            raise TrackChoiceError(
                f"mics: track {tracks[position].label} of {where} is listed twice; each "
                "microphone counts once"
            )
        chosen.append(position)
    if len(chosen) < 2:
        raise TrackChoiceError(
            f"mics: {len(chosen)} track given; liftmag needs two or more microphones of the "
            "array, because its estimators compare the channels"
        )
    return tuple(chosen)


def _resolve(tracks: Sequence[Track], item: str, where: str) -> int:
    if item.isdigit():
        number = int(item)
        if not 1 <= number <= len(tracks):
            raise TrackChoiceError(
                f"mics: track {number} does not exist; {where} has {len(tracks)} tracks "
                f"(1 to {len(tracks)})"
            )
        return number - 1
    exact = [i for i, t in enumerate(tracks) if t.name == item]
    loose = [i for i, t in enumerate(tracks) if t.name.casefold() == item.casefold()]
    found = exact or loose
    if len(found) == 1:
        return found[0]
    if len(found) > 1:
        raise TrackChoiceError(
            f"mics: {len(found)} tracks of {where} are named {item!r} (tracks "
            f"{', '.join(str(i + 1) for i in found)}); choose them by number"
        )
    named = [t for t in tracks if t.name]
    if not named:
        raise TrackChoiceError(
            f"mics: no track named {item!r}: {where} names none of its tracks (no iXML "
            f"TRACK_LIST); choose them by number, 1 to {len(tracks)}"
        )
    raise TrackChoiceError(
        f"mics: no track named {item!r} in {where}; its tracks are "
        + ", ".join(t.label for t in tracks)
    )


def output_tracks(
    tracks: Sequence[Track], mics: Sequence[int], reference: int, mode: str
) -> tuple[IxmlTrack, ...]:
    """What each output channel carries, as iXML tracks, for an output mode.

    ``mics`` are the array's 0-based source channels and ``reference`` a position in
    ``mics``. ``same-tracks`` keeps every track as it was; ``keep-image`` writes the
    microphones in the order given; ``cleaned`` and ``taken-out`` write the reference
    alone (what ``taken-out`` holds is what was removed, and its name says so).
    """
    if mode == SAME_TRACKS:
        chosen = list(range(len(tracks)))
    elif mode == "keep-image":
        chosen = list(mics)
    else:
        chosen = [mics[reference]]
    described = [_as_ixml(tracks[i]) for i in chosen]
    if mode == "taken-out":
        described = [dataclasses.replace(t, name=t.name + TAKEN_OUT_SUFFIX) for t in described]
    return tuple(described)


def _as_ixml(track: Track) -> IxmlTrack:
    if track.ixml is not None:
        return track.ixml
    # A track the file's TRACK_LIST does not describe: its position is the best number.
    return IxmlTrack(channel_index=track.index, interleave_index=None, name=track.name)


def track_levels_db(blocks: Iterable[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Peak and RMS level of each channel, in dB relative to full scale (1.0).

    ``blocks`` are arrays shaped ``(channels, frames)``. RMS is taken against a full-scale
    DC level, so a full-scale sine reads -3.01 dB (20 log10 of 1/sqrt 2). Silence gives
    ``-inf``. Streams: memory does not grow with the length of the take.
    """
    peak: np.ndarray | None = None
    energy: np.ndarray | None = None
    frames = 0
    for block in blocks:
        magnitude = np.abs(block)
        block_peak = magnitude.max(axis=1) if block.shape[1] else np.zeros(block.shape[0])
        block_energy = np.einsum("cf,cf->c", block, block)
        peak = block_peak if peak is None else np.maximum(peak, block_peak)
        energy = block_energy if energy is None else energy + block_energy
        frames += block.shape[1]
    if peak is None or energy is None or frames == 0:
        raise ValueError("no audio to measure")
    with np.errstate(divide="ignore"):
        return 20.0 * np.log10(peak), 10.0 * np.log10(energy / frames)


def describe_run(
    tracks: Sequence[Track], mics: Sequence[int], reference: int, mode: str, estimator: str,
    version: str,
) -> str:
    """The free text of liftmag's CodingHistory row: what was done, to which tracks."""
    names = [tracks[i].name or f"track {i + 1}" for i in mics]
    return (
        f"liftmag {version}; {mode}; estimator {estimator}; mics {'+'.join(names)}; "
        f"reference {names[reference]}"
    )


def word_length_bits(subtype: str) -> int:
    """Bits per sample of a libsndfile subtype (``PCM_24`` -> 24, ``FLOAT`` -> 32)."""
    named = {"FLOAT": 32, "DOUBLE": 64, "PCM_U8": 8, "PCM_S8": 8, "ULAW": 8, "ALAW": 8}
    if subtype in named:
        return named[subtype]
    digits = "".join(ch for ch in subtype if ch.isdigit())
    return int(digits) if digits else 0


def dbfs_text(level_db: float) -> str:
    """A level for people: one decimal, or 'silent'."""
    return "silent" if not math.isfinite(level_db) else f"{level_db:.1f}"
