"""Tests for liftmag.riffchunks against the RIFF, BWF and RF64 specifications.

Sources:
* RIFF: Microsoft/IBM, "Multimedia Programming Interface and Data Specifications 1.0"
  (1991): chunk = id, 32-bit LE size, payload, pad byte after an odd payload; the RIFF
  chunk's size counts everything after its own 8-byte header (file size - 8).
* BWF: EBU Tech 3285 v2 (2011), the BROADCAST_EXT struct: Description 256, Originator 32,
  OriginatorReference 32, OriginationDate 10, OriginationTime 8, TimeReferenceLow/High
  uint32, Version uint16, UMID 64, five loudness words, Reserved 180, CodingHistory.
* RF64: EBU Tech 3306 (2009): 'RF64' header with size 0xFFFFFFFF, first chunk 'ds64'
  holding riffSize, dataSize, sampleCount as uint64.
"""

from __future__ import annotations

import struct
import wave
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from liftmag import riffchunks as rc

RATE_HZ = 48_000
# 2 * 2**32 + 12345 samples: exercises the High word of TimeReference.
TIME_REFERENCE_SAMPLES = 2 * 2**32 + 12_345


# The bext chunk of the test file; 2 * 2**32 + 12345 samples exercise the High word.
BEXT = dict(
    description=b"Scene 12 take 3", originator=b"liftmag-test", reference=b"REF0001",
    date=b"2024-05-17", time=b"14:03:59", time_reference_samples=TIME_REFERENCE_SAMPLES,
    umid=bytes(range(64)),
    # Loudness words are value x 100 (EBU Tech 3285 v2 section 2.4): -23.00 LUFS etc.
    loudness=(-2300, 450, -150, -1800, -2000),
    coding_history=b"A=PCM,F=48000,W=24,M=stereo,T=test\r\n",  # an EBU R 98 row
)


IXML = b'<?xml version="1.0" encoding="UTF-8"?>\n<BWFXML><PROJECT>p</PROJECT></BWFXML>\n'


def signal(frames: int = 1001, channels: int = 2) -> np.ndarray:
    t = np.arange(frames) / RATE_HZ
    return np.stack([0.5 * np.sin(2 * np.pi * 440.0 * (c + 1) * t) for c in range(channels)], 1)


@pytest.fixture
def plain_wav(tmp_path: Path) -> Path:
    path = tmp_path / "plain.wav"
    sf.write(path, signal(), RATE_HZ, subtype="PCM_24")
    return path


@pytest.fixture
def bwf(tmp_path: Path, plain_wav: Path, pack_bext) -> Path:
    path = tmp_path / "take.wav"
    rc.copy_with_chunks(plain_wav, path, [("bext", pack_bext(**BEXT)), ("iXML", IXML)])
    return path


def test_inserted_chunks_sit_before_data_and_read_back_byte_for_byte(bwf: Path, pack_bext) -> None:
    ids = [c.chunk_id for c in rc.list_chunks(bwf)]
    assert ids == ["fmt ", "bext", "iXML", "data"]
    assert rc.read_bext(bwf) == pack_bext(**BEXT)
    assert rc.read_ixml(bwf) == IXML
    assert rc.chunks_to_carry(bwf) == (("bext", pack_bext(**BEXT)), ("iXML", IXML))


def test_riff_size_is_file_size_minus_8(bwf: Path) -> None:
    # RIFF 1.0 (Microsoft/IBM 1991): the RIFF ckSize covers everything after its header.
    raw = bwf.read_bytes()
    assert raw[:4] == b"RIFF"
    assert struct.unpack("<I", raw[4:8])[0] == len(raw) - 8


def test_odd_payload_gets_a_pad_byte(bwf: Path) -> None:
    # RIFF 1.0: an odd-sized payload is followed by one pad byte, not counted in ckSize.
    assert len(IXML) % 2 == 1
    chunks = {c.chunk_id: c for c in rc.list_chunks(bwf)}
    ixml, data = chunks["iXML"], chunks["data"]
    assert data.offset == ixml.offset + 8 + len(IXML) + 1
    assert bwf.read_bytes()[ixml.offset + 8 + len(IXML)] == 0


def test_time_reference_at_the_spec_offset(bwf: Path) -> None:
    # EBU Tech 3285: TimeReferenceLow follows 256+32+32+10+8 = 338 bytes of text fields.
    payload = rc.read_bext(bwf)
    assert payload is not None
    low, high = struct.unpack_from("<II", payload, 338)
    assert (high << 32) | low == TIME_REFERENCE_SAMPLES
    assert rc.parse_bext(payload).time_reference_samples == TIME_REFERENCE_SAMPLES


def test_parse_bext_fields(pack_bext) -> None:
    info = rc.parse_bext(pack_bext(**BEXT))
    assert info.description == "Scene 12 take 3"
    assert info.originator == "liftmag-test"
    assert info.originator_reference == "REF0001"
    assert info.origination_date == "2024-05-17"
    assert info.origination_time == "14:03:59"
    assert info.version == 2
    assert info.umid == bytes(range(64))
    assert info.loudness_value_lufs == -23.0
    assert info.loudness_range_lu == 4.5
    assert info.max_true_peak_level_dbtp == -1.5
    assert info.coding_history == "A=PCM,F=48000,W=24,M=stereo,T=test\r\n"


def test_version_1_bext_has_no_loudness(pack_bext) -> None:
    payload = bytearray(pack_bext(**BEXT))
    struct.pack_into("<H", payload, 346, 1)  # Version sits after the two uint32 words
    assert rc.parse_bext(bytes(payload)).loudness_value_lufs is None


def test_short_bext_is_refused() -> None:
    with pytest.raises(ValueError, match="602"):
        rc.parse_bext(b"\0" * 601)


def test_copy_keeps_audio_for_independent_readers(plain_wav: Path, bwf: Path) -> None:
    # libsndfile and Python's own wave module (independent RIFF reader) both see the audio.
    original, _ = sf.read(plain_wav)
    copied, rate_hz = sf.read(bwf)
    assert rate_hz == RATE_HZ
    np.testing.assert_array_equal(copied, original)
    with wave.open(str(plain_wav)) as a, wave.open(str(bwf)) as b:
        assert b.getnframes() == a.getnframes() == 1001
        assert b.readframes(1001) == a.readframes(1001)


def test_inserting_again_replaces_rather_than_duplicates(
    tmp_path: Path, bwf: Path, pack_bext
) -> None:
    out = tmp_path / "again.wav"
    new_bext = pack_bext(**{**BEXT, "time_reference_samples": 96_000})
    rc.copy_with_chunks(bwf, out, [("bext", new_bext)])
    ids = [c.chunk_id for c in rc.list_chunks(out)]
    assert ids.count("bext") == 1
    assert rc.parse_bext(rc.read_bext(out) or b"").time_reference_samples == 96_000
    assert rc.read_ixml(out) == IXML


def test_data_is_streamed_in_blocks(
    tmp_path: Path, plain_wav: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(rc, "_COPY_BLOCK_BYTES", 7)  # many small, odd-sized blocks
    out = tmp_path / "blocks.wav"
    rc.copy_with_chunks(plain_wav, out, [("iXML", IXML)])
    data_in = next(c for c in rc.list_chunks(plain_wav) if c.chunk_id == "data")
    data_out = next(c for c in rc.list_chunks(out) if c.chunk_id == "data")
    raw_in, raw_out = plain_wav.read_bytes(), out.read_bytes()
    assert (
        raw_out[data_out.payload_offset : data_out.payload_offset + data_out.size]
        == raw_in[data_in.payload_offset : data_in.payload_offset + data_in.size]
    )


def test_rf64_ds64_size_is_fixed(tmp_path: Path, pack_bext) -> None:
    src, out = tmp_path / "big.wav", tmp_path / "big_bwf.wav"
    sf.write(src, signal(), RATE_HZ, format="RF64", subtype="PCM_24")
    rc.copy_with_chunks(src, out, [("bext", pack_bext(**BEXT)), ("iXML", IXML)])
    raw = out.read_bytes()
    # EBU Tech 3306: RF64 header size is 0xFFFFFFFF; ds64 riffSize (uint64 at byte 20)
    # holds the real file size - 8.
    assert raw[:4] == b"RF64" and raw[12:16] == b"ds64"
    assert struct.unpack_from("<I", raw, 4)[0] == 0xFFFFFFFF
    assert struct.unpack_from("<Q", raw, 20)[0] == len(raw) - 8
    assert rc.read_bext(out) == pack_bext(**BEXT)
    assert rc.read_ixml(out) == IXML
    np.testing.assert_array_equal(sf.read(out)[0], sf.read(src)[0])


@pytest.mark.parametrize(
    ("fmt", "ext"), [("FLAC", "flac"), ("AIFF", "aiff"), ("W64", "w64"), ("CAF", "caf")]
)
def test_non_wave_files_have_nothing_to_carry(tmp_path: Path, fmt: str, ext: str) -> None:
    path = tmp_path / f"x.{ext}"
    sf.write(path, signal(), RATE_HZ, format=fmt, subtype="PCM_24")
    assert not rc.is_wave_file(path)
    assert rc.chunks_to_carry(path) == ()
    with pytest.raises(ValueError, match="not a RIFF/RF64 WAVE"):
        rc.list_chunks(path)


def test_truncated_file_is_refused(tmp_path: Path, bwf: Path) -> None:
    cut = tmp_path / "cut.wav"
    cut.write_bytes(bwf.read_bytes()[:-100])
    with pytest.raises(ValueError, match="truncated"):
        rc.list_chunks(cut)


def test_chunk_size_past_end_is_refused(tmp_path: Path, bwf: Path) -> None:
    raw = bytearray(bwf.read_bytes())
    ixml = next(c for c in rc.list_chunks(bwf) if c.chunk_id == "iXML")
    struct.pack_into("<I", raw, ixml.offset + 4, 0x7FFFFFF0)
    bad = tmp_path / "bad.wav"
    bad.write_bytes(bytes(raw))
    with pytest.raises(ValueError, match=r"'iXML' at byte \d+ claims"):
        rc.list_chunks(bad)


def test_tiny_and_foreign_files_are_refused(tmp_path: Path) -> None:
    tiny = tmp_path / "tiny.wav"
    tiny.write_bytes(b"RIFF\x04\x00")
    with pytest.raises(ValueError, match="too short"):
        rc.list_chunks(tiny)
    avi = tmp_path / "movie.avi"
    avi.write_bytes(b"RIFF\x04\x00\x00\x00AVI ")
    with pytest.raises(ValueError, match="not a RIFF/RF64 WAVE"):
        rc.list_chunks(avi)


def test_bad_chunk_ids_are_refused(tmp_path: Path, plain_wav: Path) -> None:
    for chunk_id in ("bex", "data", "bëxt"):
        with pytest.raises(ValueError, match="chunk"):
            rc.copy_with_chunks(plain_wav, tmp_path / "o.wav", [(chunk_id, b"")])


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(cut=st.integers(0, 4000), byte=st.integers(0, 255), at=st.integers(0, 4000))
def test_damaged_files_give_value_error_or_parse(
    tmp_path: Path, bwf: Path, cut: int, byte: int, at: int
) -> None:
    # Any truncation or single-byte corruption must end in a result or a ValueError,
    # never another exception or an endless loop.
    raw = bytearray(bwf.read_bytes())
    raw[at % len(raw)] = byte
    damaged = tmp_path / "damaged.wav"
    kept = bytes(raw[: len(raw) - cut % len(raw)])
    damaged.write_bytes(kept)
    try:
        chunks = rc.list_chunks(damaged)
    except ValueError:
        return
    assert all(c.offset + 8 + c.size <= len(kept) for c in chunks)


# ------------------------------------------------------------- iXML TRACK_LIST
# iXML specification (v2.x, recalled from memory): TRACK_LIST = TRACK_COUNT + one TRACK
# per track; TRACK = CHANNEL_INDEX (recorder's track number), INTERLEAVE_INDEX (1-based
# position in this file's interleave), NAME, optional FUNCTION and others.

POLY_IXML = (
    b'<?xml version="1.0" encoding="UTF-8"?>\r\n<BWFXML>\r\n  <SCENE>4A</SCENE>\r\n'
    b"  <TRACK_LIST>\r\n    <TRACK_COUNT>3</TRACK_COUNT>\r\n"
    b"    <TRACK><CHANNEL_INDEX>2</CHANNEL_INDEX><INTERLEAVE_INDEX>1</INTERLEAVE_INDEX>"
    b"<NAME>BOOM</NAME><FUNCTION>MIC</FUNCTION></TRACK>\r\n"
    b"    <TRACK><CHANNEL_INDEX>5</CHANNEL_INDEX><INTERLEAVE_INDEX>2</INTERLEAVE_INDEX>"
    b"<NAME>R&amp;D LAV</NAME></TRACK>\r\n"
    b"    <TRACK><CHANNEL_INDEX>7</CHANNEL_INDEX><INTERLEAVE_INDEX>3</INTERLEAVE_INDEX>"
    b"<NAME>MIX</NAME></TRACK>\r\n"
    b"  </TRACK_LIST>\r\n  <TAKE>2</TAKE>\r\n</BWFXML>\r\n\x00\x00"
)


def test_ixml_tracks_are_read_in_order() -> None:
    tracks = rc.ixml_tracks(POLY_IXML)
    assert tracks is not None
    assert [(t.channel_index, t.interleave_index, t.name) for t in tracks] == [
        (2, 1, "BOOM"), (5, 2, "R&D LAV"), (7, 3, "MIX")
    ]
    assert rc.ixml_tracks(IXML) is None  # no TRACK_LIST: nothing describes the tracks


def test_rewritten_track_list_follows_the_specification() -> None:
    import xml.etree.ElementTree as ET

    tracks = rc.ixml_tracks(POLY_IXML)
    assert tracks is not None
    out = rc.rewrite_ixml_tracks(POLY_IXML, [tracks[1], tracks[0]])
    root = ET.fromstring(out.rstrip(b"\x00"))
    assert root.findtext("TRACK_LIST/TRACK_COUNT") == "2"
    got = [
        (t.findtext("CHANNEL_INDEX"), t.findtext("INTERLEAVE_INDEX"), t.findtext("NAME"),
         t.findtext("FUNCTION"))
        for t in root.findall("TRACK_LIST/TRACK")
    ]
    assert got == [("5", "1", "R&D LAV", None), ("2", "2", "BOOM", "MIC")]
    # Every byte outside TRACK_LIST is kept, the recorder's CR LF and NUL padding included.
    start = POLY_IXML.index(b"<TRACK_LIST>")
    end = POLY_IXML.index(b"</TRACK_LIST>") + len(b"</TRACK_LIST>")
    assert out.startswith(POLY_IXML[:start])
    assert out.endswith(POLY_IXML[end:])


def test_new_track_elements_and_names_that_need_escaping() -> None:
    import xml.etree.ElementTree as ET

    new = rc.IxmlTrack(channel_index=9, interleave_index=None, name="A<B & C")
    out = rc.rewrite_ixml_tracks(POLY_IXML, [new])
    track = ET.fromstring(out.rstrip(b"\x00")).find("TRACK_LIST/TRACK")
    assert track is not None
    assert track.findtext("NAME") == "A<B & C"
    assert track.findtext("CHANNEL_INDEX") == "9" and track.findtext("INTERLEAVE_INDEX") == "1"
    assert rc.rewrite_ixml_tracks(IXML, [new]) == IXML  # nothing invented


# --------------------------------------------------------------- coding history
# EBU R 98 (1999): a CodingHistory row is A=,F=,W=,M=,T= separated by commas, free text
# without commas, ending in CR LF (recalled from memory; Tech 3285 v2 gives examples).


def test_coding_history_line_layout() -> None:
    line = rc.coding_history_line(48_000, 24, 1, "liftmag 1.0; cleaned, mics 1,2; ré")
    # Commas and non-ASCII characters of the free text become spaces.
    assert line == "A=PCM,F=48000,W=24,M=mono,T=liftmag 1.0; cleaned mics 1 2; r\r\n"
    assert line.endswith("\r\n") and line.count(",") == 4 and line.isascii()
    assert ",M=" not in rc.coding_history_line(48_000, 24, 4, "x")  # R 98 has no 4-ch mode
    assert ",M=dual-mono," in rc.coding_history_line(48_000, 24, 2, "x", mode="dual-mono")
    with pytest.raises(ValueError, match="no mode"):
        rc.coding_history_line(48_000, 24, 6, "x", mode="5.1")


def test_append_coding_history_keeps_fixed_fields_and_earlier_rows(pack_bext) -> None:
    bext = pack_bext(**BEXT)
    line = rc.coding_history_line(48_000, 24, 1, "liftmag")
    out = rc.append_coding_history(bext, line)
    # EBU Tech 3285: the 602 bytes before CodingHistory are the fixed fields.
    assert out[:602] == bext[:602]
    assert out == bext + line.encode()
    info = rc.parse_bext(out)
    assert info.time_reference_samples == TIME_REFERENCE_SAMPLES
    assert info.coding_history.split("\r\n") == [
        "A=PCM,F=48000,W=24,M=stereo,T=test", line[:-2], ""
    ]
    # A recorder's NUL-padded history without its last CR LF: the new row still starts
    # on a line of its own, and the padding goes.
    padded = bext[:602] + b"A=PCM,F=48000,W=24,M=mono" + b"\0" * 64
    out = rc.append_coding_history(padded, line)
    assert out == bext[:602] + b"A=PCM,F=48000,W=24,M=mono\r\n" + line.encode()
    assert rc.append_coding_history(bext[:602], line) == bext[:602] + line.encode()


def test_append_coding_history_refuses_bad_input(pack_bext) -> None:
    with pytest.raises(ValueError, match="602"):
        rc.append_coding_history(b"\0" * 100, "A=PCM\r\n")
    for bad in ("A=PCM", "A=PCM\r\nA=PCM\r\n", "A=PCM,T=é\r\n"):
        with pytest.raises(ValueError, match="one line of ASCII"):
            rc.append_coding_history(pack_bext(**BEXT), bad)
