"""Field-recorder takes: choosing microphones among a poly file's tracks, same-tracks output,
and metadata that describes the output.

Sources named beside the checks:
* EBU Tech 3285 v2 (2011), BROADCAST_EXT: 602 bytes of fixed fields (Description 256,
  Originator 32, OriginatorReference 32, OriginationDate 10, OriginationTime 8,
  TimeReferenceLow/High uint32 at byte 338, Version uint16, UMID 64, five loudness words,
  Reserved 180), then CodingHistory as ASCII text.
* EBU R 98 (1999), CodingHistory rows: ``A=<algorithm>,F=<rate Hz>,W=<bits>,M=<mode>,
  T=<free text without commas>``, each row ending in CR LF; modes mono, stereo, dual-mono,
  joint-stereo. (Row layout recalled from memory of R 98 and the examples in Tech 3285.)
* iXML specification (v2.x, recalled from memory): TRACK_LIST holds TRACK_COUNT (number of
  tracks in this file) and one TRACK per track with CHANNEL_INDEX (the recorder's track
  number), INTERLEAVE_INDEX (1-based position in this file's interleave) and NAME.
"""

from __future__ import annotations

import json
import re
import struct
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from liftmag import riffchunks as rc
from liftmag.cli import main
from liftmag.scenes import demo_scene
from liftmag.tracks import (
    Track,
    TrackChoiceError,
    choose_mics,
    parse_mics,
    track_levels_db,
)

FS = 16_000
SECONDS = 4
TIME_REFERENCE = 7 * 3600 * 48_000 + 5  # above 2**32 samples: the High word is used
NAMES = ("BOOM", "LAV1", "MIX L", "MIX R")
R98_ROW = re.compile(
    r"A=PCM,F=\d+,W=\d+(,M=(mono|stereo|dual-mono|joint-stereo))?,T=[ -+\--~]*\r\n"
)  # EBU R 98: the free text T= is printable ASCII without commas (',' is 0x2C)


# The recorder's bext chunk of the invented take.
BEXT = dict(
    description=b"sc12 tk3", originator=b"INVENTED RECORDER", reference=b"ref-0012-0003",
    date=b"2026-11-30", time=b"07:00:00", time_reference_samples=TIME_REFERENCE,
    umid=bytes(range(64)), loudness=(-2400, 500, -300, -2000, -2100),
    coding_history=b"A=PCM,F=16000,W=24,M=mono,T=recorder\r\n",
)


def ixml_payload(names=NAMES, channel_indices=None, interleave=True) -> bytes:
    channel_indices = channel_indices or range(1, len(names) + 1)
    tracks = "".join(
        "\n\t\t<TRACK>"
        f"\n\t\t\t<CHANNEL_INDEX>{ci}</CHANNEL_INDEX>"
        + (f"\n\t\t\t<INTERLEAVE_INDEX>{i}</INTERLEAVE_INDEX>" if interleave else "")
        + f"\n\t\t\t<NAME>{name}</NAME>"
        f"\n\t\t\t<FUNCTION>{'MIX' if name.startswith('MIX') else 'MIC'}</FUNCTION>"
        "\n\t\t</TRACK>"
        for i, (ci, name) in enumerate(zip(channel_indices, names, strict=True), start=1)
    )
    return (
        '<?xml version="1.0" encoding="UTF-8"?>\n<BWFXML>\n\t<IXML_VERSION>2.10</IXML_VERSION>'
        "\n\t<PROJECT>invented feature</PROJECT>\n\t<SCENE>12</SCENE>\n\t<TAKE>3</TAKE>"
        f"\n\t<TRACK_LIST>\n\t\t<TRACK_COUNT>{len(names)}</TRACK_COUNT>{tracks}"
        "\n\t</TRACK_LIST>\n\t<NOTE>wind from the north &amp; gulls</NOTE>\n</BWFXML>\n"
    ).encode()


def write_take(path: Path, audio: np.ndarray, chunks, *, fmt: str = "WAV") -> Path:
    """audio: (channels, frames); chunks inserted before data by riffchunks."""
    plain = path.with_name("plain-" + path.name)
    sf.write(plain, audio.T, FS, subtype="PCM_24", format=fmt)
    if chunks:
        rc.copy_with_chunks(plain, path, chunks)
        plain.unlink()
    else:
        plain.rename(path)
    return path


@pytest.fixture(scope="module")
def scene():
    return demo_scene(seed=5)


@pytest.fixture(scope="module")
def four_track(scene) -> np.ndarray:
    """Boom and lav = the scene's two capsules; two mix tracks from them (invented take)."""
    mics = scene.mixture[:, : SECONDS * FS]
    mix_l = 0.5 * mics[0] + 0.3 * mics[1]
    mix_r = 0.3 * mics[0] + 0.5 * mics[1]
    audio = np.vstack([mics, mix_l, mix_r])
    # Quantise to the 24-bit grid so what we wrote is exactly what is read back.
    return np.round(audio * 2**23) / 2**23


@pytest.fixture()
def poly(tmp_path: Path, four_track, pack_bext) -> Path:
    return write_take(
        tmp_path / "sc12_tk3.wav", four_track,
        [("bext", pack_bext(**BEXT)), ("iXML", ixml_payload())],
    )


def ixml_of(path: Path) -> ET.Element:
    payload = rc.read_ixml(path)
    assert payload is not None
    return ET.fromstring(payload)


def check_track_list(path: Path, expected_names, expected_channel_indices) -> None:
    """The iXML TRACK_LIST describes the file's channels (iXML specification, TRACK_LIST)."""
    root = ixml_of(path)
    channels = sf.info(path).channels
    assert int(root.findtext("TRACK_LIST/TRACK_COUNT")) == channels
    tracks = root.findall("TRACK_LIST/TRACK")
    assert len(tracks) == channels
    assert [int(t.findtext("INTERLEAVE_INDEX")) for t in tracks] == list(range(1, channels + 1))
    assert [t.findtext("NAME") for t in tracks] == list(expected_names)
    assert [int(t.findtext("CHANNEL_INDEX")) for t in tracks] == list(expected_channel_indices)


def check_kept_metadata(path: Path, original: Path) -> None:
    """SCENE, TAKE, other iXML and every bext fixed field survive; one R 98 row is added."""
    root, before = ixml_of(path), ixml_of(original)
    for tag in ("SCENE", "TAKE", "PROJECT", "NOTE", "IXML_VERSION"):
        assert root.findtext(tag) == before.findtext(tag)
    new, old = rc.read_bext(path), rc.read_bext(original)
    assert new is not None and old is not None
    # EBU Tech 3285: the 602 fixed bytes (time reference at 338 among them) are unchanged.
    assert new[:602] == old[:602]
    assert rc.parse_bext(new).time_reference_samples == TIME_REFERENCE
    history = new[602:].decode("ascii")
    old_history = old[602:].split(b"\0")[0].decode("ascii")
    assert history.startswith(old_history)
    added = history[len(old_history):]
    # EBU R 98: one row in its layout, ending in CR LF.
    assert added.count("\r\n") == 1 and R98_ROW.fullmatch(added), added
    info = sf.info(path)
    assert f",F={info.samplerate}," in added and ",W=24," in added
    assert "liftmag" in added


_LIBSNDFILE_CDEF = """
typedef struct SNDFILE_tag SNDFILE;
typedef struct { int64_t frames; int samplerate; int channels; int format; int sections;
                 int seekable; } SF_INFO;
typedef struct { char description[256]; char originator[32]; char originator_reference[32];
  char origination_date[10]; char origination_time[8]; uint32_t time_reference_low;
  uint32_t time_reference_high; short version; char umid[64]; int16_t loudness[5];
  char reserved[180]; uint32_t coding_history_size; char coding_history[4096]; } BEXT;
SNDFILE* sf_open(const char*, int, SF_INFO*);
int sf_command(SNDFILE*, int, void*, int);
int sf_close(SNDFILE*);
"""
SFM_READ, SFC_GET_BROADCAST_INFO = 0x10, 0x10F0  # libsndfile's sndfile.h


def libsndfile_bext(path: Path) -> dict:
    """The bext chunk as libsndfile's own parser reads it (an independent reader).

    SF_BROADCAST_INFO mirrors the EBU Tech 3285 v2 fields; here with room for a long
    coding history.
    """
    import ctypes.util
    import os

    import cffi

    ffi = cffi.FFI()
    ffi.cdef(_LIBSNDFILE_CDEF)
    name = ctypes.util.find_library("sndfile") or os.path.join(
        os.path.dirname(sf.__file__), "_soundfile_data", sf._packaged_libname
    )
    lib = ffi.dlopen(name)
    info = ffi.new("SF_INFO *")
    handle = lib.sf_open(str(path).encode(), SFM_READ, info)
    assert handle != ffi.NULL, f"libsndfile cannot open {path}"
    try:
        bext = ffi.new("BEXT *")
        assert lib.sf_command(handle, SFC_GET_BROADCAST_INFO, bext, ffi.sizeof("BEXT")) == 1
        return {
            "description": ffi.string(bext.description, 256).decode(),
            "time_reference": (bext.time_reference_high << 32) | bext.time_reference_low,
            "version": bext.version,
            "coding_history": ffi.string(
                bext.coding_history, bext.coding_history_size
            ).decode("ascii"),
        }
    finally:
        lib.sf_close(handle)


def test_libsndfile_reads_the_rewritten_bext(tmp_path: Path, poly: Path) -> None:
    out = tmp_path / "same.wav"
    assert main(["process", str(poly), "-o", str(out), "--mics", "BOOM,LAV1",
                 "--output-mode", "same-tracks"]) == 0
    seen, before = libsndfile_bext(out), libsndfile_bext(poly)
    assert seen["time_reference"] == before["time_reference"] == TIME_REFERENCE
    assert seen["description"] == "sc12 tk3" and seen["version"] == 2
    rows = seen["coding_history"].split("\r\n")
    assert rows[0] == "A=PCM,F=16000,W=24,M=mono,T=recorder"
    assert rows[1].startswith("A=PCM,F=16000,W=24,T=liftmag ") and rows[2:] == [""]
    assert "same-tracks" in rows[1] and "mics BOOM+LAV1" in rows[1]


# ------------------------------------------------------------------- choosing mics


def tracks_named(*names: str) -> tuple[Track, ...]:
    return tuple(Track(i + 1, n, Path("t.wav"), i) for i, n in enumerate(names))


def test_mics_by_number_and_name_in_the_order_given() -> None:
    tracks = tracks_named(*NAMES)
    assert choose_mics(tracks, parse_mics("2, 1"), "t.wav") == (1, 0)
    assert choose_mics(tracks, parse_mics("LAV1,BOOM,MIX R"), "t.wav") == (1, 0, 3)
    assert choose_mics(tracks, parse_mics("boom,lav1"), "t.wav") == (0, 1)  # letter case


@pytest.mark.parametrize(
    ("request_text", "message"),
    [
        ("BOOM,LAV9", r"no track named 'LAV9' in t.wav; its tracks are 1 \(BOOM\), 2 \(LAV1\)"),
        ("BOOM,1", r"track 1 \(BOOM\) of t.wav is listed twice"),
        ("LAV1", r"1 track given; liftmag needs two or more"),
        ("1,5", r"track 5 does not exist; t.wav has 4 tracks \(1 to 4\)"),
        ("1,0", r"track 0 does not exist"),
    ],
)
def test_bad_mics_are_one_clear_line(request_text: str, message: str) -> None:
    with pytest.raises(TrackChoiceError, match=message) as caught:
        choose_mics(tracks_named(*NAMES), parse_mics(request_text), "t.wav")
    assert "\n" not in str(caught.value)


def test_unnamed_tracks_are_chosen_by_number() -> None:
    with pytest.raises(TrackChoiceError, match=r"names none of its tracks.*1 to 3"):
        choose_mics(tracks_named("", "", ""), ("BOOM", "2"), "t.wav")
    with pytest.raises(TrackChoiceError, match="separated by commas"):
        parse_mics("1,,2")


def test_levels_of_a_full_scale_sine_and_silence() -> None:
    # Handbook value: a sine of peak amplitude A has RMS A / sqrt(2), i.e. -3.01 dB re A.
    t = np.arange(FS) / FS
    block = np.vstack([np.sin(2 * np.pi * 1000 * t), 0.1 * np.sin(2 * np.pi * 250 * t),
                       np.zeros(FS)])
    peak, rms = track_levels_db([block[:, :777], block[:, 777:]])
    np.testing.assert_allclose(peak[:2], [0.0, -20.0], atol=1e-3)
    np.testing.assert_allclose(rms[:2], [-3.0103, -23.0103], atol=1e-3)
    assert peak[2] == rms[2] == -np.inf


# ------------------------------------------------------------ the 4-track take


def test_mics_by_name_equals_a_two_channel_file_of_those_tracks(
    tmp_path: Path, poly: Path, four_track
) -> None:
    pair = write_take(tmp_path / "pair.wav", four_track[:2], [])
    by_name, by_pair = tmp_path / "by_name.wav", tmp_path / "by_pair.wav"
    assert main(["process", str(poly), "-o", str(by_name), "--mics", "BOOM,LAV1"]) == 0
    assert main(["process", str(pair), "-o", str(by_pair)]) == 0
    a, _ = sf.read(by_name, dtype="int32")
    b, _ = sf.read(by_pair, dtype="int32")
    np.testing.assert_array_equal(a, b)
    assert sf.info(by_name).channels == 1
    check_track_list(by_name, ["BOOM"], [1])
    check_kept_metadata(by_name, poly)


def test_without_mics_the_mix_tracks_would_enter_the_estimate(
    tmp_path: Path, poly: Path
) -> None:
    # The reason for --mics: all four tracks as an array give a different result.
    every, chosen = tmp_path / "every.wav", tmp_path / "chosen.wav"
    assert main(["process", str(poly), "-o", str(every)]) == 0
    assert main(["process", str(poly), "-o", str(chosen), "--mics", "1,2"]) == 0
    assert not np.array_equal(sf.read(every)[0], sf.read(chosen)[0])
    check_track_list(every, ["BOOM"], [1])


def test_same_tracks_replaces_only_the_reference(tmp_path: Path, poly: Path) -> None:
    out, cleaned = tmp_path / "same.wav", tmp_path / "cleaned.wav"
    assert main(["process", str(poly), "-o", str(out), "--mics", "BOOM,LAV1",
                 "--output-mode", "same-tracks"]) == 0
    assert main(["process", str(poly), "-o", str(cleaned), "--mics", "BOOM,LAV1"]) == 0
    before, _ = sf.read(poly, dtype="int32")
    after, _ = sf.read(out, dtype="int32")
    assert after.shape == before.shape
    np.testing.assert_array_equal(after[:, 1:], before[:, 1:])  # three tracks untouched
    np.testing.assert_array_equal(after[:, 0], sf.read(cleaned, dtype="int32")[0])
    assert not np.array_equal(after[:, 0], before[:, 0])
    check_track_list(out, NAMES, [1, 2, 3, 4])
    check_kept_metadata(out, poly)
    # Elements liftmag does not rewrite stay inside each TRACK.
    functions = [t.findtext("FUNCTION") for t in ixml_of(out).findall("TRACK_LIST/TRACK")]
    assert functions == ["MIC", "MIC", "MIX", "MIX"]


def test_same_tracks_with_a_later_reference(tmp_path: Path, poly: Path) -> None:
    out = tmp_path / "same_lav.wav"
    assert main(["process", str(poly), "-o", str(out), "--mics", "BOOM,LAV1",
                 "--reference-channel", "1", "--output-mode", "same-tracks"]) == 0
    before, _ = sf.read(poly, dtype="int32")
    after, _ = sf.read(out, dtype="int32")
    np.testing.assert_array_equal(after[:, [0, 2, 3]], before[:, [0, 2, 3]])
    assert not np.array_equal(after[:, 1], before[:, 1])


@pytest.mark.parametrize(
    ("mode", "names", "channel_indices"),
    [
        ("cleaned", ["LAV1"], [2]),
        ("taken-out", ["LAV1 taken out"], [2]),
        ("keep-image", ["LAV1", "BOOM"], [2, 1]),
        ("same-tracks", list(NAMES), [1, 2, 3, 4]),
    ],
)
def test_track_count_equals_output_channels_in_every_mode(
    tmp_path: Path, poly: Path, mode: str, names, channel_indices
) -> None:
    out = tmp_path / f"{mode}.wav"
    assert main(["process", str(poly), "-o", str(out), "--mics", "LAV1,BOOM",
                 "--output-mode", mode]) == 0
    check_track_list(out, names, channel_indices)
    check_kept_metadata(out, poly)


def test_reference_channel_counts_positions_in_mics(tmp_path: Path, poly: Path) -> None:
    first, second = tmp_path / "first.wav", tmp_path / "second.wav"
    assert main(["process", str(poly), "-o", str(first), "--mics", "LAV1,BOOM"]) == 0
    assert main(["process", str(poly), "-o", str(second), "--mics", "BOOM,LAV1",
                 "--reference-channel", "1"]) == 0
    check_track_list(second, ["LAV1"], [2])
    # Same array, same reference (LAV1): only the order of the array differs.
    a, b = sf.read(first)[0], sf.read(second)[0]
    np.testing.assert_allclose(a, b, atol=1e-4)


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--mics", "BOOM,LAV2"], "no track named 'LAV2' in sc12_tk3.wav; its tracks are "
                                  "1 (BOOM), 2 (LAV1), 3 (MIX L), 4 (MIX R)"),
        (["--mics", "BOOM,2,1"], "track 1 (BOOM) of sc12_tk3.wav is listed twice"),
        (["--mics", "LAV1"], "1 track given"),
        (["--mics", "1,7"], "track 7 does not exist"),
        (["--mics", "1,,2"], "separated by commas"),
        (["--mics", "1,2", "--reference-channel", "2"], "counts positions in that list"),
        (["--mics", "1,2", "--output-mode", "same-tracks", "--bypass"], None),
    ],
)
def test_bad_requests_write_nothing(
    tmp_path: Path, poly: Path, capsys, extra, message: str
) -> None:
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    if message is None:  # a control check: the same call, valid, does write
        assert main(["process", str(poly), "-o", str(out_dir / "x.wav"), *extra[:4]]) == 0
        assert [p.name for p in out_dir.iterdir()] == ["x.wav"]
        return
    assert main(["process", str(poly), "-o", str(out_dir / "x.wav"), *extra]) == 2
    err = capsys.readouterr().err
    assert message in err
    assert err.count("\n") == 1  # one line
    assert list(out_dir.iterdir()) == []


def test_tracks_verb_lists_number_name_and_level(poly: Path, capsys, four_track) -> None:
    assert main(["tracks", str(poly), "--json"]) == 0
    listed = json.loads(capsys.readouterr().out)[0]
    assert [t["name"] for t in listed["tracks"]] == list(NAMES)
    assert [t["number"] for t in listed["tracks"]] == [1, 2, 3, 4]
    peak = 20 * np.log10(np.abs(four_track).max(axis=1))
    np.testing.assert_allclose([t["peak_dbfs"] for t in listed["tracks"]], peak, atol=0.01)
    assert main(["tracks", str(poly)]) == 0
    text = capsys.readouterr().out
    assert "MIX L" in text and "4 tracks" in text


# ------------------------------------------------------- files without metadata


def test_no_ixml_is_invented(tmp_path: Path, four_track, pack_bext) -> None:
    bare = write_take(tmp_path / "bare.wav", four_track, [("bext", pack_bext(**BEXT))])
    out = tmp_path / "out.wav"
    assert main(["process", str(bare), "-o", str(out), "--mics", "1,2",
                 "--output-mode", "same-tracks"]) == 0
    assert rc.read_ixml(out) is None
    assert rc.read_bext(out)[:602] == pack_bext(**BEXT)[:602]
    plain = write_take(tmp_path / "plain.wav", four_track[:2], [])
    out2 = tmp_path / "out2.wav"
    assert main(["process", str(plain), "-o", str(out2)]) == 0
    assert [c.chunk_id for c in rc.list_chunks(out2)] == ["fmt ", "data"]


def test_ixml_without_track_list_is_kept_as_it_was(tmp_path: Path, four_track) -> None:
    ixml = b"<?xml version='1.0'?><BWFXML><SCENE>12</SCENE><TAKE>3</TAKE></BWFXML>"
    take = write_take(tmp_path / "t.wav", four_track[:2], [("iXML", ixml)])
    out = tmp_path / "o.wav"
    assert main(["process", str(take), "-o", str(out)]) == 0
    assert rc.read_ixml(out) == ixml


# --------------------------------------------------------------------- RF64


def test_forced_rf64_take_keeps_working(tmp_path: Path, four_track, pack_bext) -> None:
    take = write_take(
        tmp_path / "big.wav", four_track,
        [("bext", pack_bext(**BEXT)), ("iXML", ixml_payload())], fmt="RF64",
    )
    assert take.read_bytes()[:4] == b"RF64"
    out = tmp_path / "same.wav"
    assert main(["process", str(take), "-o", str(out), "--mics", "BOOM,LAV1",
                 "--output-mode", "same-tracks"]) == 0
    raw = out.read_bytes()
    # EBU Tech 3306: RF64 header size 0xFFFFFFFF; ds64 riffSize = file size - 8.
    assert raw[:4] == b"RF64" and struct.unpack_from("<I", raw, 4)[0] == 0xFFFFFFFF
    assert struct.unpack_from("<Q", raw, 20)[0] == len(raw) - 8
    before, _ = sf.read(take, dtype="int32")
    after, _ = sf.read(out, dtype="int32")
    np.testing.assert_array_equal(after[:, 1:], before[:, 1:])
    check_track_list(out, NAMES, [1, 2, 3, 4])
    check_kept_metadata(out, take)


def test_tracks_of_a_sparse_rf64_file_beyond_4_gib(tmp_path: Path, pack_bext) -> None:
    """A > 4 GiB RF64 take, mostly a hole in a sparse file: names come from its iXML."""
    from liftmag import audio_io
    from liftmag.tracks import source_tracks

    small = write_take(
        tmp_path / "small.wav", np.zeros((4, 10)),
        [("bext", pack_bext(**BEXT)), ("iXML", ixml_payload())], fmt="RF64",
    )
    raw = bytearray(small.read_bytes())
    data = next(c for c in rc.list_chunks(small) if c.chunk_id == "data")
    after = bytes(raw[data.end:])  # here the odd-sized iXML sits after data (riffchunks' rule)
    assert b"iXML" in after
    frames = (5 << 30) // 12  # 4 tracks x 3 bytes per frame: data above 4 GiB
    data_bytes = frames * 12
    total = data.payload_offset + data_bytes + len(after)
    struct.pack_into("<Q", raw, 20, total - 8)  # ds64 riffSize (EBU Tech 3306)
    struct.pack_into("<Q", raw, 28, data_bytes)  # ds64 dataSize
    struct.pack_into("<Q", raw, 36, frames)  # ds64 sampleCount
    big = tmp_path / "big.wav"
    with open(big, "wb") as fh:
        fh.write(bytes(raw[: data.payload_offset]))
        fh.seek(data.payload_offset + data_bytes)  # sparse: the hole takes no disk
        fh.write(after)  # bext and iXML at offsets beyond 4 GiB
    assert big.stat().st_size > 4 << 30
    layout = rc.read_layout(big)
    assert layout.find("data").size == data_bytes
    info = audio_io.probe(big)
    assert info.frames == frames and info.channels == 4
    assert [t.name for t in source_tracks(info)] == list(NAMES)
    assert rc.parse_bext(rc.read_bext(big)).time_reference_samples == TIME_REFERENCE


# ---------------------------------------------------------------------- batch


def stem_ixml(name: str, recorder_track: int) -> bytes:
    # A recorder writing one file per track: each stem's TRACK_LIST names its one track,
    # CHANNEL_INDEX the recorder's track number, INTERLEAVE_INDEX 1 (iXML specification).
    return ixml_payload(names=(name,), channel_indices=(recorder_track,))


@pytest.fixture()
def stems(tmp_path: Path, four_track, pack_bext) -> Path:
    folder = tmp_path / "card"
    folder.mkdir()
    for k, name in enumerate(NAMES[:3], start=1):
        write_take(
            folder / f"sc12_tk3_{k}.wav", four_track[k - 1 : k],
            [("bext", pack_bext(**BEXT)), ("iXML", stem_ixml(name, k))],
        )
    return folder


def test_batch_grouped_stems_keep_their_metadata_true(tmp_path: Path, stems: Path, poly: Path,
                                                      capsys) -> None:
    out = tmp_path / "out"
    assert main(["batch", str(stems), "--out", str(out), "--jobs", "1", "--group-by-suffix",
                 r"_(\d+)$", "--mics", "BOOM,LAV1"]) == 0
    result = out / "sc12_tk3.wav"
    check_track_list(result, ["BOOM"], [1])
    check_kept_metadata(result, stems / "sc12_tk3_1.wav")
    # Same microphones as the poly file's BOOM and LAV1: the same cleaned sound.
    single = tmp_path / "single.wav"
    assert main(["process", str(poly), "-o", str(single), "--mics", "BOOM,LAV1"]) == 0
    np.testing.assert_array_equal(sf.read(result, dtype="int32")[0],
                                  sf.read(single, dtype="int32")[0])
    # Asking for the same tracks re-runs the take (the choice is part of its key).
    capsys.readouterr()
    assert main(["batch", str(stems), "--out", str(out), "--jobs", "1", "--group-by-suffix",
                 r"_(\d+)$", "--mics", "BOOM,LAV1", "--output-mode", "same-tracks"]) == 0
    check_track_list(result, NAMES[:3], [1, 2, 3])
    check_kept_metadata(result, stems / "sc12_tk3_1.wav")
    before = np.stack([sf.read(stems / f"sc12_tk3_{k}.wav", dtype="int32")[0]
                       for k in (2, 3)], axis=1)
    np.testing.assert_array_equal(sf.read(result, dtype="int32")[0][:, 1:], before)


def test_batch_key_follows_the_mics(tmp_path: Path, poly: Path, capsys) -> None:
    out = tmp_path / "out"
    args = ["batch", str(poly), "--out", str(out), "--jobs", "1", "--json"]
    assert main([*args, "--mics", "1,2"]) == 0
    capsys.readouterr()
    assert main([*args, "--mics", "1,2"]) == 0
    assert json.loads(capsys.readouterr().out)["skipped"] == 1
    assert main([*args, "--mics", "2,1"]) == 0  # a new choice: done again, not skipped
    assert json.loads(capsys.readouterr().out)["done"] == 1
    check_track_list(out / "sc12_tk3.wav", ["LAV1"], [2])


def test_manifest_mics_column(tmp_path: Path, poly: Path, capsys) -> None:
    manifest = tmp_path / "takes.csv"
    manifest.write_text(
        "input,output,mics,output_mode\n"
        f'{poly.name},boom.wav,"BOOM,LAV1",\n'
        f'{poly.name},lav.wav,"LAV1,BOOM",same-tracks\n'
        f'{poly.name},bad.wav,"BOOM,LAV7",\n'
    )
    out = tmp_path / "out"
    assert main(["batch", "--manifest", str(manifest), "--out", str(out), "--jobs", "1",
                 "--json"]) == 1
    summary = json.loads(capsys.readouterr().out)
    assert summary["done"] == 2 and summary["failed"] == 1
    assert "no track named 'LAV7'" in summary["failures"][0]["reason"]
    assert not (out / "bad.wav").exists()
    check_track_list(out / "boom.wav", ["BOOM"], [1])
    check_track_list(out / "lav.wav", NAMES, [1, 2, 3, 4])
    before, _ = sf.read(poly, dtype="int32")
    after, _ = sf.read(out / "lav.wav", dtype="int32")
    np.testing.assert_array_equal(after[:, [0, 2, 3]], before[:, [0, 2, 3]])


# ---------------------------------------------------------- room tone on a poly file


@pytest.fixture()
def poly_tone(tmp_path: Path, four_track) -> Path:
    # The scene's first 1.4 s hold no speech (its 1.5 s noise-only lead-in).
    return write_take(tmp_path / "tone.wav", four_track[:, : int(1.4 * FS)],
                      [("iXML", ixml_payload())])


def test_learn_mics_matches_room_tone_of_those_tracks(
    tmp_path: Path, poly: Path, poly_tone: Path, four_track
) -> None:
    model, pair_model = tmp_path / "poly.npz", tmp_path / "pair.npz"
    pair_tone = write_take(tmp_path / "pair_tone.wav", four_track[:2, : int(1.4 * FS)], [])
    assert main(["learn", str(poly_tone), "-o", str(model), "--mics", "BOOM,LAV1"]) == 0
    assert main(["learn", str(pair_tone), "-o", str(pair_model)]) == 0
    pair = write_take(tmp_path / "pair.wav", four_track[:2], [])
    a, b = tmp_path / "a.wav", tmp_path / "b.wav"
    assert main(["process", str(poly), "-o", str(a), "--mics", "BOOM,LAV1",
                 "--noise-model", str(model)]) == 0
    assert main(["process", str(pair), "-o", str(b), "--noise-model", str(pair_model)]) == 0
    np.testing.assert_array_equal(sf.read(a, dtype="int32")[0], sf.read(b, dtype="int32")[0])
    # Without --mics the 4-track model does not fit a 2-microphone array: refused.
    whole = tmp_path / "whole.npz"
    assert main(["learn", str(poly_tone), "-o", str(whole)]) == 0
    assert main(["process", str(poly), "-o", str(tmp_path / "c.wav"), "--mics", "1,2",
                 "--noise-model", str(whole)]) == 2
    assert not (tmp_path / "c.wav").exists()


def test_batch_room_tone_follows_the_mics(
    tmp_path: Path, poly: Path, poly_tone: Path, capsys
) -> None:
    out = tmp_path / "out"
    assert main(["batch", str(poly), "--out", str(out), "--jobs", "1", "--json",
                 "--room-tone", str(poly_tone), "--mics", "BOOM,LAV1"]) == 0
    assert json.loads(capsys.readouterr().out)["done"] == 1
    single = tmp_path / "single.wav"
    assert main(["process", str(poly), "-o", str(single), "--mics", "BOOM,LAV1",
                 "--noise-region", "0:1.4"]) == 0
    np.testing.assert_array_equal(sf.read(out / "sc12_tk3.wav", dtype="int32")[0],
                                  sf.read(single, dtype="int32")[0])
