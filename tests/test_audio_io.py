"""Tests for liftmag.audio_io: probing, block reading, stem groups, atomic writing.

External references:
* RIFF: Microsoft/IBM, "Multimedia Programming Interface and Data Specifications 1.0"
  (1991): chunk = id, 32-bit LE size, payload, pad byte; RIFF size = file size - 8.
* BWF: EBU Tech 3285 v2 (2011), BROADCAST_EXT field sizes (Description 256, Originator 32,
  OriginatorReference 32, OriginationDate 10, OriginationTime 8, TimeReferenceLow/High
  uint32 LE, Version uint16, UMID 64, loudness 5 x 2, Reserved 180, CodingHistory).
* libsndfile reads integer PCM as float by dividing by 2**(bits-1) (python-soundfile
  docs, "dtype" of read(); recalled from memory, and checked here against read(dtype='int16')).
"""

from __future__ import annotations

import math
import os
import struct
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from liftmag.audio_io import (
    AtomicAudioWriter,
    AudioGroup,
    AudioInputError,
    AudioOutputError,
    open_group,
    probe,
    read_blocks,
    require_multichannel,
)

RATE_HZ = 48_000
TIME_REFERENCE_SAMPLES = 10 * 3600 * RATE_HZ + 7  # 10:00:00 plus 7 samples since midnight


def tone(frames: int, channels: int, rate_hz: int = RATE_HZ) -> np.ndarray:
    """(frames, channels) test signal, a different sine per channel."""
    t = np.arange(frames) / rate_hz
    return np.stack([0.4 * np.sin(2 * np.pi * 300.0 * (c + 1) * t) for c in range(channels)], 1)


# The bext chunk of the test take (EBU Tech 3285 version 1: loudness words unused).
BEXT = dict(
    description=b"boom and lav", originator=b"field recorder", reference=b"ORIG-42",
    date=b"2023-11-02", time=b"10:00:00", time_reference_samples=TIME_REFERENCE_SAMPLES,
    version=1, coding_history=b"A=PCM,F=48000,W=24,M=stereo\r\n",
)


IXML = b"<?xml version='1.0'?><BWFXML><SCENE>12</SCENE><TAKE>3</TAKE></BWFXML>"  # odd length


def raw_chunk(raw: bytes, chunk_id: bytes) -> bytes:
    """Walk the RIFF chunks by hand and return one payload."""
    offset = 12
    while offset + 8 <= len(raw):
        cid, size = struct.unpack_from("<4sI", raw, offset)
        if cid == chunk_id:
            return raw[offset + 8 : offset + 8 + size]
        offset += 8 + size + (size & 1)
    raise AssertionError(f"no {chunk_id!r} chunk")


@pytest.fixture
def bwf(tmp_path: Path, pack_bext, splice_before_data) -> Path:
    plain = tmp_path / "plain.wav"
    sf.write(plain, tone(4801, 2), RATE_HZ, subtype="PCM_24")
    path = tmp_path / "take.wav"
    chunks = [(b"bext", pack_bext(**BEXT)), (b"iXML", IXML)]
    path.write_bytes(splice_before_data(plain.read_bytes(), chunks))
    return path


def write(path: Path, data: np.ndarray, rate_hz: int = RATE_HZ, **kw: str) -> Path:
    sf.write(path, data, rate_hz, **kw)
    return path


# ---------------------------------------------------------------- probe


def test_probe_reports_what_was_written(tmp_path: Path) -> None:
    path = write(tmp_path / "a.wav", tone(4800, 3), subtype="PCM_24")
    info = probe(path)
    assert (info.sample_rate_hz, info.channels, info.frames) == (RATE_HZ, 3, 4800)
    assert (info.format, info.subtype) == ("WAV", "PCM_24")
    assert info.duration_s == pytest.approx(0.1)
    assert info.path == path


def test_probe_missing_folder_and_garbage(tmp_path: Path) -> None:
    with pytest.raises(AudioInputError, match="no such file"):
        probe(tmp_path / "nope.wav")
    with pytest.raises(AudioInputError, match="folder"):
        probe(tmp_path)
    junk = tmp_path / "junk.wav"
    junk.write_bytes(b"this is not audio at all" * 10)
    with pytest.raises(AudioInputError, match="libsndfile says"):
        probe(junk)


def test_mono_is_refused_with_the_reason(tmp_path: Path) -> None:
    mono = probe(write(tmp_path / "mono.wav", tone(480, 1)))
    with pytest.raises(AudioInputError, match="two or more microphones") as err:
        require_multichannel(mono)
    assert "compare the channels to tell the talker from the noise" in str(err.value)
    require_multichannel(probe(write(tmp_path / "st.wav", tone(480, 2))))
    require_multichannel(open_group([mono.path, write(tmp_path / "m2.wav", tone(480, 1))]))


# ---------------------------------------------------------------- reading


def test_blocks_are_channels_by_frames_and_cover_the_file(tmp_path: Path) -> None:
    data = tone(1000, 3)
    path = write(tmp_path / "a.wav", data, subtype="DOUBLE")
    blocks = list(read_blocks(path, 256))
    assert [b.shape for b in blocks] == [(3, 256)] * 3 + [(3, 232)]
    assert all(b.dtype == np.float64 and b.flags.c_contiguous for b in blocks)
    np.testing.assert_array_equal(np.concatenate(blocks, axis=1), data.T)
    with pytest.raises(ValueError, match="block_frames"):
        read_blocks(path, 0)


@pytest.mark.parametrize(
    ("fmt", "ext"),
    [("WAV", "wav"), ("FLAC", "flac"), ("AIFF", "aiff"), ("W64", "w64"), ("CAF", "caf")],
)
def test_other_containers_read_through_the_same_api(tmp_path: Path, fmt: str, ext: str) -> None:
    ints = (tone(700, 2) * 32767).astype(np.int16)
    path = write(tmp_path / f"a.{ext}", ints, format=fmt, subtype="PCM_16")
    info = probe(path)
    assert (info.format, info.channels, info.frames) == (fmt, 2, 700)
    got = np.concatenate(list(read_blocks(info, 300)), axis=1)
    # 16-bit PCM read as float is the integer / 2**15 (see module docstring).
    np.testing.assert_array_equal(got, ints.T / 32768.0)
    np.testing.assert_array_equal(got, sf.read(path, dtype="int16")[0].T / 32768.0)


@pytest.mark.parametrize(("bad", "word"), [(np.nan, "nan"), (np.inf, "inf"), (-np.inf, "-inf")])
def test_non_finite_sample_is_located(tmp_path: Path, bad: float, word: str) -> None:
    data = tone(RATE_HZ, 3)
    data[RATE_HZ // 2 + 3, 1] = bad  # 0.5 s + 3 samples, second channel
    path = write(tmp_path / "f.wav", data, subtype="FLOAT")
    with pytest.raises(AudioInputError) as err:
        for _ in read_blocks(path, 1000):
            pass
    message = str(err.value)
    assert f"{word} sample at {(RATE_HZ // 2 + 3) / RATE_HZ:.6f} s" in message
    assert "channel 2" in message and "f.wav" in message
    assert sum(b.shape[1] for b in read_blocks(path, 1000, check_finite=False)) == RATE_HZ


# ---------------------------------------------------------------- groups


def test_group_of_mono_stems_reads_as_one_source(tmp_path: Path) -> None:
    data = tone(900, 3)
    paths = [write(tmp_path / f"mic{c}.wav", data[:, c], subtype="DOUBLE") for c in range(3)]
    stereo = write(tmp_path / "pair.wav", data[:, :2], subtype="DOUBLE")
    group = open_group([paths[2], stereo])
    assert isinstance(group, AudioGroup)
    assert (group.channels, group.frames, group.sample_rate_hz) == (3, 900, RATE_HZ)
    got = np.concatenate(list(read_blocks(group, 128)), axis=1)
    np.testing.assert_array_equal(got, np.stack([data[:, 2], data[:, 0], data[:, 1]]))
    assert group.locate_channel(2) == (stereo, 1)


def test_group_names_the_odd_file_out(tmp_path: Path) -> None:
    a = write(tmp_path / "a.wav", tone(480, 1))
    b = write(tmp_path / "b.wav", tone(441, 1, 44_100), 44_100)
    c = write(tmp_path / "c.wav", tone(481, 1))
    with pytest.raises(AudioInputError, match="sample rates") as err:
        open_group([a, b])
    assert "a.wav" in str(err.value) and "b.wav" in str(err.value)
    with pytest.raises(AudioInputError, match="different lengths") as err:
        open_group([a, c])
    assert "a.wav" in str(err.value) and "c.wav" in str(err.value)
    with pytest.raises(AudioInputError, match="given twice"):
        open_group([a, a])
    with pytest.raises(AudioInputError, match="no audio files"):
        open_group([])


def test_non_finite_in_a_group_names_the_stem(tmp_path: Path) -> None:
    data = tone(2000, 2)
    data[1500, 1] = np.nan
    a = write(tmp_path / "boom.wav", data[:, 0], subtype="FLOAT")
    b = write(tmp_path / "lav.wav", data[:, 1], subtype="FLOAT")
    with pytest.raises(AudioInputError, match=r"lav\.wav: nan sample at 0\.031250 s .*channel 1"):
        list(read_blocks(open_group([a, b]), 512))


# ---------------------------------------------------------------- writing


def test_bwf_round_trip_carries_chunks_byte_for_byte(tmp_path: Path, bwf: Path, pack_bext) -> None:
    info = probe(bwf)
    out = tmp_path / "clean.wav"
    with AtomicAudioWriter(out, like=info) as writer:
        for block in read_blocks(info, 1000):
            writer.write(block)
    raw = out.read_bytes()
    assert raw_chunk(raw, b"bext") == pack_bext(**BEXT)
    assert raw_chunk(raw, b"iXML") == IXML
    # EBU Tech 3285: TimeReferenceLow/High start 338 bytes into bext.
    low, high = struct.unpack_from("<II", raw_chunk(raw, b"bext"), 338)
    assert (high << 32) | low == TIME_REFERENCE_SAMPLES
    # RIFF 1.0: the RIFF chunk size is the file size minus its 8-byte header.
    assert struct.unpack_from("<I", raw, 4)[0] == len(raw) - 8
    out_info = probe(out)
    assert (out_info.format, out_info.subtype, out_info.frames) == ("WAV", "PCM_24", 4801)
    # PCM_24 -> float64 -> PCM_24 is exact.
    np.testing.assert_array_equal(sf.read(out, dtype="int32")[0], sf.read(bwf, dtype="int32")[0])
    assert writer.report is not None
    assert writer.report.carried_chunks == ("bext", "iXML")
    assert writer.report.frames_written == 4801


def test_chunks_are_reported_dropped_for_flac(tmp_path: Path, bwf: Path) -> None:
    info = probe(bwf)
    out = tmp_path / "clean.flac"
    with AtomicAudioWriter(out, like=info, format="FLAC") as writer:
        writer.write(np.zeros((2, 10)))
    assert (probe(out).format, probe(out).subtype) == ("FLAC", "PCM_24")
    assert writer.report is not None
    assert writer.report.dropped_chunks == ("bext", "iXML") and writer.report.carried_chunks == ()


def test_mono_output_from_a_group_keeps_rate_and_format(tmp_path: Path) -> None:
    a = write(tmp_path / "a.flac", tone(300, 1, 44_100), 44_100, subtype="PCM_16")
    b = write(tmp_path / "b.flac", tone(300, 1, 44_100), 44_100, subtype="PCM_16")
    out = tmp_path / "one.flac"
    with AtomicAudioWriter(out, like=open_group([a, b]), channels=1) as writer:
        writer.write(np.zeros((1, 300)))
    info = probe(out)
    assert (info.sample_rate_hz, info.channels, info.format, info.subtype) == (
        44_100, 1, "FLAC", "PCM_16",
    )


def test_subtype_override(tmp_path: Path, bwf: Path) -> None:
    out = tmp_path / "f.wav"
    with AtomicAudioWriter(out, like=probe(bwf), subtype="FLOAT") as writer:
        writer.write(np.full((2, 4), 1.5))
    assert probe(out).subtype == "FLOAT"
    np.testing.assert_array_equal(sf.read(out)[0], np.full((4, 2), 1.5))  # float: no clipping
    assert writer.report is not None and writer.report.clipped_samples == 0
    with pytest.raises(ValueError, match="FLAC cannot hold FLOAT"):
        AtomicAudioWriter(tmp_path / "g.flac", like=probe(bwf), format="FLAC", subtype="FLOAT")


def test_integer_output_counts_and_clips_overs(tmp_path: Path) -> None:
    out = tmp_path / "loud.wav"
    block = np.array([[0.5, 1.5, -2.0, 1.0], [0.0, -0.25, 0.999, -1.0]])
    with AtomicAudioWriter(out, sample_rate_hz=RATE_HZ, channels=2, subtype="PCM_16") as w:
        w.write(block)
    assert w.report is not None
    assert w.report.clipped_samples == 2  # 1.5 and -2.0; exactly 1.0 is full scale, not over
    assert w.report.peak_dbfs == pytest.approx(20 * math.log10(2.0))  # 6.02 dB over
    got = sf.read(out, dtype="int16")[0]
    # Clipped, not wrapped: the overs keep their sign at the 16-bit limits.
    assert got[1, 0] == 32767 and got[2, 0] == -32768


def test_exception_inside_with_leaves_nothing(tmp_path: Path) -> None:
    out = tmp_path / "out.wav"
    for error in (RuntimeError("boom"), KeyboardInterrupt()):
        with pytest.raises(type(error)):
            with AtomicAudioWriter(out, sample_rate_hz=RATE_HZ, channels=2) as writer:
                writer.write(np.zeros((2, 100)))
                partial = [p.name for p in tmp_path.iterdir()]
                assert len(partial) == 1 and partial[0].startswith(".out.wav.partial-")
                raise error
        assert list(tmp_path.iterdir()) == []


def test_refuses_to_overwrite_unless_forced(tmp_path: Path) -> None:
    out = write(tmp_path / "exists.wav", tone(10, 2))
    before = out.read_bytes()
    with pytest.raises(AudioOutputError, match="already exists"):
        AtomicAudioWriter(out, sample_rate_hz=RATE_HZ, channels=2)
    assert out.read_bytes() == before
    with AtomicAudioWriter(out, sample_rate_hz=RATE_HZ, channels=2, force=True) as writer:
        writer.write(np.zeros((2, 5)))
    assert probe(out).frames == 5


def test_refuses_to_write_over_an_input(tmp_path: Path, bwf: Path) -> None:
    with pytest.raises(AudioOutputError, match="is an input file"):
        AtomicAudioWriter(bwf, like=probe(bwf), force=True)
    other = write(tmp_path / "other.wav", tone(4801, 1))
    group = open_group([other, tmp_path / "plain.wav"])
    with pytest.raises(AudioOutputError, match="is an input file"):
        AtomicAudioWriter(tmp_path / "plain.wav", like=group, force=True)


def test_write_checks_shape_and_values(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match=r"shaped \(2, frames\)"):
        with AtomicAudioWriter(tmp_path / "a.wav", sample_rate_hz=RATE_HZ, channels=2) as w:
            w.write(np.zeros((3, 10)))
    with pytest.raises(ValueError, match="NaN or infinite"):
        with AtomicAudioWriter(tmp_path / "b.wav", sample_rate_hz=RATE_HZ, channels=1) as w:
            w.write(np.array([[0.0, np.nan]]))
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(ValueError, match="does not resample"):
        AtomicAudioWriter(tmp_path / "c.wav", like=probe(write(tmp_path / "in.wav", tone(9, 2))),
                          sample_rate_hz=44_100)


def test_truncated_inputs_give_clear_errors(tmp_path: Path, bwf: Path) -> None:
    raw = bwf.read_bytes()
    header_only = tmp_path / "header_only.wav"
    header_only.write_bytes(raw[:40])
    with pytest.raises(AudioInputError, match="libsndfile says"):
        probe(header_only)
    # libsndfile quietly reads what is left of a cut data chunk; the data chunk's own size
    # (RIFF 1.0) says how much there should be, so the file is refused when probed.
    cut = tmp_path / "cut.wav"
    cut.write_bytes(raw[: len(raw) - 1000])
    assert sf.info(str(cut)).frames < 4801
    with pytest.raises(AudioInputError, match="truncated: its header declares 4801 frames"):
        probe(cut)


def test_interrupt_while_the_temporary_file_is_being_made_leaves_nothing(
    tmp_path: Path, monkeypatch
) -> None:
    # A SIGTERM turned into KeyboardInterrupt can land between creating the temporary file
    # and handing it to the writer (found by the 50-round signal loop); nothing may remain.
    from liftmag import audio_io

    def interrupted(fd, path):
        raise KeyboardInterrupt

    monkeypatch.setattr(audio_io, "_lock_if_still_there", interrupted)
    with pytest.raises(KeyboardInterrupt):
        with AtomicAudioWriter(tmp_path / "out.wav", sample_rate_hz=RATE_HZ, channels=2):
            pass
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("where", ["writer", "atomic bytes", "staged file", "staged folder"])
def test_a_signal_as_the_temporary_path_is_handed_over_leaves_nothing(
    tmp_path: Path, monkeypatch, where: str
) -> None:
    # A SIGTERM arriving just after the temporary file exists but before its owner has
    # recorded it (found by the SIGTERM loop: 1 in about 40 rounds) must not leave the file
    # behind. The signal is sent from inside the creation, as the kernel could deliver it
    # there; POSIX pthread_sigmask holds it until the owner has the path.
    import signal

    from liftmag import audio_io

    class Stop(Exception):
        pass

    def raise_stop(signum, frame):
        raise Stop

    previous = signal.signal(signal.SIGTERM, raise_stop)
    real_file, real_dir = audio_io._create_temp, audio_io._create_temp_dir

    def signalled(real):
        def create(destination):
            made = real(destination)
            os.kill(os.getpid(), signal.SIGTERM)  # delivered at once unless held back
            return made

        return create

    monkeypatch.setattr(audio_io, "_create_temp", signalled(real_file))
    monkeypatch.setattr(audio_io, "_create_temp_dir", signalled(real_dir))
    try:
        with pytest.raises(Stop):
            if where == "writer":
                with AtomicAudioWriter(tmp_path / "out.wav", sample_rate_hz=RATE_HZ,
                                       channels=2):
                    pass
            elif where == "atomic bytes":
                audio_io.write_atomically(tmp_path / "out.bin", b"abc")
            else:
                with audio_io.StagedOutputs() as staging:
                    if where == "staged file":
                        staging.file(tmp_path / "a.txt")
                    else:
                        staging.stage_dir(tmp_path / "folder")
    finally:
        signal.signal(signal.SIGTERM, previous)
    assert list(tmp_path.iterdir()) == []
