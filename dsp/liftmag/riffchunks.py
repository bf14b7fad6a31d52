"""Read and carry the chunks of RIFF/RF64 WAVE (WAV, BWF) files.

A WAVE file is a sequence of chunks (4-byte id, 32-bit little-endian size,
payload, one pad byte after an odd-sized payload). Broadcast WAV adds a
``bext`` chunk (EBU Tech 3285) and field recorders often add an ``iXML``
chunk. libsndfile does not give these back to Python, so this module copies
them byte for byte from an input into a freshly written output.

RF64 and BW64 (EBU Tech 3306, ITU-R BS.2088) files are understood: their
real sizes live in a ``ds64`` chunk and the 32-bit fields hold 0xFFFFFFFF.

Only WAVE containers have chunks to carry. FLAC, AIFF, CAF and W64 files
(and anything else that is not RIFF/RF64 WAVE) simply have none:
:func:`chunks_to_carry` returns an empty tuple for them, while
:func:`list_chunks` refuses them with a ``ValueError``.

Field-recorder metadata is rewritten, not only carried, where the output's audio
differs from the input's: :func:`rewrite_ixml_tracks` replaces the ``TRACK_LIST`` of
an ``iXML`` payload (every other byte kept), and :func:`append_coding_history` adds
one EBU R 98 line to a ``bext`` payload (every fixed field kept).

Malformed files (a chunk that runs past the end of the file, a bad header)
raise a ``ValueError`` that says where. Copies stream in blocks, so a
multi-gigabyte ``data`` chunk is never held in memory.
"""

from __future__ import annotations

import os
import re
import struct
from collections.abc import Sequence
from dataclasses import dataclass
from typing import BinaryIO

__all__ = [
    "CARRIED_CHUNK_IDS",
    "BextInfo",
    "ChunkInfo",
    "IxmlTrack",
    "RiffLayout",
    "append_coding_history",
    "chunks_to_carry",
    "coding_history_line",
    "copy_with_chunks",
    "is_wave_file",
    "ixml_tracks",
    "list_chunks",
    "parse_bext",
    "read_bext",
    "read_chunk",
    "read_ixml",
    "read_layout",
    "rewrite_ixml_tracks",
]

# Chunks liftmag carries from an input take into its output.
CARRIED_CHUNK_IDS: tuple[str, ...] = ("bext", "iXML")

_RIFF_FORMS = (b"RIFF", b"RF64", b"BW64")
_SIZE_DEFERRED = 0xFFFFFFFF  # RF64/BW64: "the real size is in ds64"
_COPY_BLOCK_BYTES = 1 << 20
_BEXT_FIXED_BYTES = 602  # EBU Tech 3285 v2: sum of the fixed fields before CodingHistory


@dataclass(frozen=True)
class ChunkInfo:
    """One chunk of a WAVE file.

    Attributes
    ----------
    chunk_id : str
        Four-character id, e.g. ``"fmt "``, ``"data"``, ``"bext"``.
    offset : int
        File offset of the chunk's 8-byte header.
    size : int
        Payload size in bytes (for RF64 ``data``, the size from ``ds64``).
    """

    chunk_id: str
    offset: int
    size: int

    @property
    def payload_offset(self) -> int:
        return self.offset + 8

    @property
    def end(self) -> int:
        """Offset just past the payload and its pad byte."""
        return self.payload_offset + self.size + (self.size & 1)


@dataclass(frozen=True)
class RiffLayout:
    """Top-level layout of a WAVE file: form (``RIFF``, ``RF64``, ``BW64``) and chunks."""

    form: str
    riff_size: int
    file_size: int
    chunks: tuple[ChunkInfo, ...]

    def find(self, chunk_id: str) -> ChunkInfo | None:
        return next((c for c in self.chunks if c.chunk_id == chunk_id), None)


@dataclass(frozen=True)
class BextInfo:
    """Fields of a ``bext`` chunk (EBU Tech 3285).

    Text fields are decoded as ASCII (other bytes replaced) with trailing NULs
    removed. Loudness fields exist from version 2 on and are ``None`` before.
    """

    description: str
    originator: str
    originator_reference: str
    origination_date: str
    origination_time: str
    time_reference_samples: int
    version: int
    umid: bytes
    loudness_value_lufs: float | None
    loudness_range_lu: float | None
    max_true_peak_level_dbtp: float | None
    max_momentary_loudness_lufs: float | None
    max_short_term_loudness_lufs: float | None
    coding_history: str


def is_wave_file(path: str | os.PathLike[str]) -> bool:
    """Return True if the file starts with a RIFF/RF64/BW64 header of form ``WAVE``."""
    with open(path, "rb") as f:
        head = f.read(12)
    return len(head) == 12 and head[:4] in _RIFF_FORMS and head[8:12] == b"WAVE"


def read_layout(path: str | os.PathLike[str]) -> RiffLayout:
    """Walk the chunks of a WAVE file.

    Raises
    ------
    ValueError
        If the file is not RIFF/RF64 WAVE, or a chunk is truncated or malformed.
    """
    with open(path, "rb") as f:
        return _read_layout(f, os.fstat(f.fileno()).st_size, os.fspath(path))


def list_chunks(path: str | os.PathLike[str]) -> tuple[ChunkInfo, ...]:
    """Return the chunks of a WAVE file in file order (see :func:`read_layout`)."""
    return read_layout(path).chunks


def read_chunk(path: str | os.PathLike[str], chunk_id: str) -> bytes | None:
    """Return the raw payload of the first chunk with this id, or None if absent."""
    layout = read_layout(path)
    chunk = layout.find(chunk_id)
    if chunk is None:
        return None
    with open(path, "rb") as f:
        f.seek(chunk.payload_offset)
        return f.read(chunk.size)


def read_bext(path: str | os.PathLike[str]) -> bytes | None:
    """Return the raw ``bext`` payload of a WAVE file, or None."""
    return read_chunk(path, "bext")


def read_ixml(path: str | os.PathLike[str]) -> bytes | None:
    """Return the raw ``iXML`` payload of a WAVE file, or None."""
    return read_chunk(path, "iXML")


def chunks_to_carry(
    path: str | os.PathLike[str], chunk_ids: Sequence[str] = CARRIED_CHUNK_IDS
) -> tuple[tuple[str, bytes], ...]:
    """Return ``(id, payload)`` for each carried chunk present in a WAVE file.

    Files that are not RIFF/RF64 WAVE (FLAC, AIFF, CAF, W64, ...) have no
    chunks to carry and give an empty tuple. A WAVE file that is malformed
    raises ``ValueError``.
    """
    if not is_wave_file(path):
        return ()
    layout = read_layout(path)
    found = []
    with open(path, "rb") as f:
        for chunk_id in chunk_ids:
            chunk = layout.find(chunk_id)
            if chunk is not None:
                f.seek(chunk.payload_offset)
                found.append((chunk_id, f.read(chunk.size)))
    return tuple(found)


def parse_bext(payload: bytes) -> BextInfo:
    """Parse a ``bext`` payload laid out per EBU Tech 3285.

    Parameters
    ----------
    payload : bytes
        The chunk payload (without the 8-byte chunk header).

    Raises
    ------
    ValueError
        If the payload is shorter than the 602 bytes of fixed fields.
    """
    if len(payload) < _BEXT_FIXED_BYTES:
        raise ValueError(
            f"bext chunk is {len(payload)} bytes; EBU Tech 3285 needs at least "
            f"{_BEXT_FIXED_BYTES} bytes before CodingHistory"
        )
    (
        description,
        originator,
        originator_reference,
        origination_date,
        origination_time,
        time_ref_low,
        time_ref_high,
        version,
        umid,
    ) = struct.unpack_from("<256s32s32s10s8sIIH64s", payload, 0)
    # Loudness words are values x 100 and may be negative: read them as signed.
    loudness = struct.unpack_from("<5h", payload, 412)
    has_loudness = version >= 2
    values = [v / 100.0 if has_loudness else None for v in loudness]
    return BextInfo(
        description=_text(description),
        originator=_text(originator),
        originator_reference=_text(originator_reference),
        origination_date=_text(origination_date),
        origination_time=_text(origination_time),
        time_reference_samples=(time_ref_high << 32) | time_ref_low,
        version=version,
        umid=umid,
        loudness_value_lufs=values[0],
        loudness_range_lu=values[1],
        max_true_peak_level_dbtp=values[2],
        max_momentary_loudness_lufs=values[3],
        max_short_term_loudness_lufs=values[4],
        coding_history=_text(payload[_BEXT_FIXED_BYTES:]),
    )


def copy_with_chunks(
    src: str | os.PathLike[str],
    dst: str | os.PathLike[str],
    chunks: Sequence[tuple[str, bytes]],
) -> None:
    """Copy a WAVE file, inserting chunks just before its ``data`` chunk.

    Chunks of ``src`` with the same ids as the inserted ones are dropped, so
    the inserted payloads replace them. The RIFF size (or, for RF64/BW64, the
    ``ds64`` RIFF size) is rewritten; odd payloads get their pad byte. The
    ``data`` chunk is streamed in blocks. Exception: in an RF64/BW64 file an
    odd-sized payload would stop libsndfile 1.2 from finding ``data``, so
    there the chunks go just after ``data`` instead (still valid RIFF).

    Parameters
    ----------
    src : path
        A WAVE file, typically freshly written by libsndfile.
    dst : path
        Destination; created or truncated.
    chunks : sequence of (str, bytes)
        Four-character ids and raw payloads, inserted in this order.

    Raises
    ------
    ValueError
        If ``src`` is malformed, has no ``data`` chunk, an id is not four
        ASCII characters, or a plain RIFF file would exceed 4 GiB.
    """
    for chunk_id, _ in chunks:
        _check_chunk_id(chunk_id)
    inserted_ids = {chunk_id for chunk_id, _ in chunks}
    with open(src, "rb") as fin:
        layout = _read_layout(fin, os.fstat(fin.fileno()).st_size, os.fspath(src))
        data_index = next(
            (i for i, c in enumerate(layout.chunks) if c.chunk_id == "data"), None
        )
        if data_index is None:
            raise ValueError(f"{os.fspath(src)}: no 'data' chunk to insert chunks before")
        kept = [c for c in layout.chunks if c.chunk_id not in inserted_ids]
        body_bytes = 4 + sum(8 + c.size + (c.size & 1) for c in kept)
        body_bytes += sum(8 + len(p) + (len(p) & 1) for _, p in chunks)
        if layout.form == "RIFF" and body_bytes > 0xFFFFFFFF:
            raise ValueError(
                f"{os.fspath(dst)}: a plain RIFF WAV cannot exceed 4 GiB; write RF64 instead"
            )
        data_chunk = layout.chunks[data_index]
        with open(dst, "wb") as fout:
            header_size = body_bytes if layout.form == "RIFF" else _SIZE_DEFERRED
            fout.write(layout.form.encode("ascii") + struct.pack("<I", header_size) + b"WAVE")
            # libsndfile 1.2's RF64 reader loses its place after an odd-sized chunk
            # before 'data' (found by testing), so odd payloads go after 'data' there.
            after_data = layout.form != "RIFF" and any(len(p) & 1 for _, p in chunks)
            for chunk in kept:
                if chunk is data_chunk and not after_data:
                    _write_chunks(fout, chunks)
                if chunk.chunk_id == "ds64":
                    _write_ds64(fin, fout, chunk, body_bytes)
                else:
                    _copy_chunk(fin, fout, chunk)
                if chunk is data_chunk and after_data:
                    _write_chunks(fout, chunks)


def _read_layout(f: BinaryIO, file_size: int, name: str) -> RiffLayout:
    head = f.read(12)
    if len(head) < 12:
        raise ValueError(f"{name}: too short to be a WAVE file ({len(head)} bytes)")
    form, riff_size, wave = head[:4], struct.unpack("<I", head[4:8])[0], head[8:12]
    if form not in _RIFF_FORMS or wave != b"WAVE":
        raise ValueError(
            f"{name}: not a RIFF/RF64 WAVE file (header {head[:4]!r}...{head[8:12]!r})"
        )
    ds64_data_size = None
    if form != b"RIFF":
        riff_size, ds64_data_size = _parse_ds64(f, name)
    # One missing pad byte at the very end is tolerated: some writers omit it.
    if riff_size + 8 > file_size + 1:
        raise ValueError(
            f"{name}: RIFF size says {riff_size + 8} bytes but the file has {file_size} "
            "(truncated file)"
        )
    end = min(riff_size + 8, file_size)
    chunks: list[ChunkInfo] = []
    offset = 12
    while offset < end:
        if offset + 8 > end:
            raise ValueError(f"{name}: truncated chunk header at byte {offset}")
        f.seek(offset)
        chunk_id_bytes, size = struct.unpack("<4sI", f.read(8))
        chunk_id = chunk_id_bytes.decode("latin-1")
        if chunk_id == "data" and ds64_data_size is not None and size == _SIZE_DEFERRED:
            size = ds64_data_size
        payload_end = offset + 8 + size
        if payload_end > end:
            raise ValueError(
                f"{name}: chunk {chunk_id!r} at byte {offset} claims {size} bytes but only "
                f"{end - offset - 8} remain (truncated or corrupt file)"
            )
        chunks.append(ChunkInfo(chunk_id, offset, size))
        offset = payload_end + (size & 1)  # each step moves >= 8 bytes: no endless loop
    if not any(c.chunk_id == "fmt " for c in chunks):
        raise ValueError(f"{name}: WAVE file without a 'fmt ' chunk")
    return RiffLayout(form.decode("ascii"), riff_size, file_size, tuple(chunks))


def _parse_ds64(f: BinaryIO, name: str) -> tuple[int, int]:
    # EBU Tech 3306 ds64, first chunk: riffSize (uint64), dataSize (uint64), sampleCount, table.
    raw = f.read(24)
    if len(raw) < 24 or raw[:4] != b"ds64":
        raise ValueError(f"{name}: RF64/BW64 file without a complete leading 'ds64' chunk")
    size, riff_size, data_size = struct.unpack("<IQQ", raw[4:24])
    if size < 24:
        raise ValueError(f"{name}: 'ds64' chunk is {size} bytes, needs at least 24")
    return riff_size, data_size


def _check_chunk_id(chunk_id: str) -> None:
    if len(chunk_id) != 4 or not chunk_id.isascii():
        raise ValueError(f"chunk id must be four ASCII characters, got {chunk_id!r}")
    if chunk_id in ("data", "fmt ", "ds64"):
        raise ValueError(f"refusing to insert a {chunk_id!r} chunk")


def _write_chunks(fout: BinaryIO, chunks: Sequence[tuple[str, bytes]]) -> None:
    for chunk_id, payload in chunks:
        fout.write(chunk_id.encode("ascii") + struct.pack("<I", len(payload)))
        fout.write(payload)
        if len(payload) & 1:
            fout.write(b"\x00")


def _copy_chunk(fin: BinaryIO, fout: BinaryIO, chunk: ChunkInfo) -> None:
    fin.seek(chunk.offset)
    fout.write(fin.read(8))  # header verbatim (keeps RF64's deferred data size)
    remaining = chunk.size
    while remaining:
        block = fin.read(min(remaining, _COPY_BLOCK_BYTES))
        if not block:
            raise ValueError(f"chunk {chunk.chunk_id!r} ended early while copying")
        fout.write(block)
        remaining -= len(block)
    if chunk.size & 1:
        fout.write(b"\x00")


def _write_ds64(fin: BinaryIO, fout: BinaryIO, chunk: ChunkInfo, body_bytes: int) -> None:
    fin.seek(chunk.offset)
    raw = bytearray(fin.read(8 + chunk.size))
    struct.pack_into("<Q", raw, 8, body_bytes)  # riffSize is the first ds64 field
    fout.write(raw)
    if chunk.size & 1:
        fout.write(b"\x00")


def _text(raw: bytes) -> str:
    return raw.split(b"\x00", 1)[0].decode("ascii", errors="replace")


# ------------------------------------------------------------------- iXML tracks
#
# iXML (the open iXML specification, v2.x): a <TRACK_LIST> holds <TRACK_COUNT> and one
# <TRACK> per track, each with <CHANNEL_INDEX> (the recorder's own track number),
# <INTERLEAVE_INDEX> (1-based position of the track among this file's channels) and
# <NAME>, plus optional elements such as <FUNCTION>. The payload is edited as text, not
# re-serialised, so every byte outside TRACK_LIST stays as the recorder wrote it.

_TRACK_LIST_RE = re.compile(r"<TRACK_LIST\b[^>]*>.*?</TRACK_LIST\s*>", re.DOTALL)
_TRACK_RE = re.compile(r"<TRACK\b[^>]*>.*?</TRACK\s*>", re.DOTALL)
_EMPTY_TRACK_LIST_RE = re.compile(r"<TRACK_LIST\s*/>")


@dataclass(frozen=True)
class IxmlTrack:
    """One ``<TRACK>`` of an iXML ``TRACK_LIST``.

    Attributes
    ----------
    channel_index : int or None
        ``CHANNEL_INDEX``: the recorder's track number (None if absent or not a number).
    interleave_index : int or None
        ``INTERLEAVE_INDEX``: 1-based channel of the file holding this track.
    name : str
        ``NAME`` (XML entities decoded; empty if absent).
    element : str
        The whole ``<TRACK>...</TRACK>`` text as found, so elements liftmag does not
        rewrite (``FUNCTION`` and others) survive a rewrite; empty for a new track.
    """

    channel_index: int | None
    interleave_index: int | None
    name: str
    element: str = ""


def _decode_ixml(payload: bytes) -> str:
    # surrogateescape: odd bytes in a recorder's payload survive the round trip unchanged.
    return payload.decode("utf-8", errors="surrogateescape")


def _element_text(xml: str, tag: str) -> str | None:
    match = re.search(rf"<{tag}\b[^>]*>(.*?)</{tag}\s*>", xml, re.DOTALL)
    return None if match is None else _unescape(match.group(1).strip())


def _element_int(xml: str, tag: str) -> int | None:
    text = _element_text(xml, tag)
    try:
        return int(text) if text is not None else None
    except ValueError:
        return None


def ixml_tracks(payload: bytes) -> tuple[IxmlTrack, ...] | None:
    """The tracks an iXML payload's ``TRACK_LIST`` names, in document order.

    Returns None when the payload has no ``TRACK_LIST`` (nothing describes the tracks).
    """
    xml = _decode_ixml(payload)
    block = _TRACK_LIST_RE.search(xml)
    if block is None:
        return () if _EMPTY_TRACK_LIST_RE.search(xml) else None
    return tuple(
        IxmlTrack(
            channel_index=_element_int(m.group(0), "CHANNEL_INDEX"),
            interleave_index=_element_int(m.group(0), "INTERLEAVE_INDEX"),
            name=_element_text(m.group(0), "NAME") or "",
            element=m.group(0),
        )
        for m in _TRACK_RE.finditer(block.group(0))
    )


def rewrite_ixml_tracks(payload: bytes, tracks: Sequence[IxmlTrack]) -> bytes:
    """Replace the ``TRACK_LIST`` so it describes ``tracks``, the output's channels in order.

    ``TRACK_COUNT`` becomes ``len(tracks)``; track ``k`` (0-based) gets
    ``INTERLEAVE_INDEX`` ``k + 1``, its own ``CHANNEL_INDEX`` (the recorder's track
    number it came from) and ``NAME``; other elements of its ``element`` are kept. The
    text before and after the ``TRACK_LIST`` is kept byte for byte. A payload without a
    ``TRACK_LIST`` is returned unchanged: liftmag does not invent track metadata.
    """
    xml = _decode_ixml(payload)
    block = _TRACK_LIST_RE.search(xml) or _EMPTY_TRACK_LIST_RE.search(xml)
    if block is None:
        return payload
    indent = _indent_before(xml, block.start())
    inner = indent + "\t"
    parts = [f"<TRACK_LIST>\n{inner}<TRACK_COUNT>{len(tracks)}</TRACK_COUNT>"]
    for position, track in enumerate(tracks, start=1):
        parts.append(inner + _track_element(track, position, inner))
    parts.append(f"{indent}</TRACK_LIST>")
    new_block = "\n".join(parts)
    return (xml[: block.start()] + new_block + xml[block.end():]).encode(
        "utf-8", errors="surrogateescape"
    )


def _indent_before(xml: str, offset: int) -> str:
    line_start = xml.rfind("\n", 0, offset) + 1
    prefix = xml[line_start:offset]
    return prefix if prefix.strip() == "" else ""


def _track_element(track: IxmlTrack, position: int, indent: str) -> str:
    values = {
        "CHANNEL_INDEX": "" if track.channel_index is None else str(track.channel_index),
        "INTERLEAVE_INDEX": str(position),
        "NAME": _escape(track.name),
    }
    if not track.element:
        body = "".join(
            f"\n{indent}\t<{tag}>{value}</{tag}>" for tag, value in values.items() if value
        )
        return f"<TRACK>{body}\n{indent}</TRACK>"
    element = track.element
    for tag, value in values.items():
        pattern = re.compile(rf"<{tag}\b[^>]*>.*?</{tag}\s*>|<{tag}\s*/>", re.DOTALL)
        replacement = f"<{tag}>{value}</{tag}>"
        if pattern.search(element):
            element = pattern.sub(lambda _m, r=replacement: r, element, count=1)
        elif value:
            # Absent before: add it first inside <TRACK>, where the specification lists it.
            head = re.match(r"<TRACK\b[^>]*>", element)
            assert head is not None  # _TRACK_RE only matches elements that start so
            element = element[: head.end()] + replacement + element[head.end():]
    return element


_XML_ESCAPES = (("&", "&amp;"), ("<", "&lt;"), (">", "&gt;"))


def _escape(text: str) -> str:
    for raw, entity in _XML_ESCAPES:
        text = text.replace(raw, entity)
    return text


def _unescape(text: str) -> str:
    text = text.replace("&quot;", '"').replace("&apos;", "'")
    for raw, entity in reversed(_XML_ESCAPES):
        text = text.replace(entity, raw)
    return text


# --------------------------------------------------------- bext coding history

# EBU R 98 modes for M= (mono, stereo, dual-mono, joint-stereo); it has none for more
# channels, so M= is left out there.
_R98_MODES = {1: "mono"}


def coding_history_line(
    sample_rate_hz: int, word_length_bits: int, channels: int, text: str, *, mode: str = ""
) -> str:
    """One CodingHistory row in the EBU R 98 format, ending in CR LF.

    ``A=PCM,F=<rate>,W=<bits>[,M=<mode>],T=<text>``. R 98 asks for plain ASCII and a
    free text without commas, so commas and other characters are replaced. ``mode`` is
    one of R 98's ``mono``, ``stereo``, ``dual-mono``, ``joint-stereo``; by default
    ``mono`` for one channel and left out otherwise.
    """
    mode = mode or _R98_MODES.get(channels, "")
    if mode and mode not in ("mono", "stereo", "dual-mono", "joint-stereo"):
        raise ValueError(f"EBU R 98 has no mode {mode!r}")
    clean = "".join(ch if 32 <= ord(ch) < 127 and ch != "," else " " for ch in text)
    fields = ["A=PCM", f"F={int(sample_rate_hz)}", f"W={int(word_length_bits)}"]
    if mode:
        fields.append(f"M={mode}")
    fields.append(f"T={' '.join(clean.split())}")
    return ",".join(fields) + "\r\n"


def append_coding_history(payload: bytes, line: str) -> bytes:
    """A ``bext`` payload with ``line`` added at the end of its CodingHistory.

    The 602 bytes of fixed fields (EBU Tech 3285: description, originator, time
    reference, version, UMID, loudness, reserved) are kept byte for byte. Earlier
    history rows are kept; NUL padding after them is dropped, and a last row without
    its CR LF gets one so the new row starts on its own line.

    Raises
    ------
    ValueError
        If the payload is shorter than the fixed fields, or ``line`` is not one ASCII
        row ending in CR LF.
    """
    if len(payload) < _BEXT_FIXED_BYTES:
        raise ValueError(
            f"bext chunk is {len(payload)} bytes; EBU Tech 3285 needs at least "
            f"{_BEXT_FIXED_BYTES} bytes before CodingHistory"
        )
    if not line.endswith("\r\n") or "\r" in line[:-2] or "\n" in line[:-2] or not line.isascii():
        raise ValueError("a CodingHistory row is one line of ASCII text ending in CR LF")
    history = payload[_BEXT_FIXED_BYTES:].split(b"\x00", 1)[0]
    if history and not history.endswith(b"\r\n"):
        history = history.rstrip(b"\r\n") + b"\r\n"
    return payload[:_BEXT_FIXED_BYTES] + history + line.encode("ascii")
