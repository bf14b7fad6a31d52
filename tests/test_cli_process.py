"""`liftmag process` and `liftmag learn` as a user runs them: files in, files out, clear errors."""

from __future__ import annotations

import json
import struct
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from liftmag.cli import main
from liftmag.scenes import demo_scene

FS = 16000


@pytest.fixture(scope="module")
def scene():
    return demo_scene(seed=3, room_tone_s=6.0)


@pytest.fixture()
def take(tmp_path: Path, scene) -> Path:
    path = tmp_path / "take.wav"
    sf.write(path, scene.mixture[:, : 5 * FS].T, FS, subtype="PCM_24")
    return path


def _listing(folder: Path) -> set[str]:
    return {p.name for p in folder.iterdir()}


def _chunk(path: Path, cid: bytes) -> bytes:
    raw = path.read_bytes()
    offset = 12
    while offset + 8 <= len(raw):
        size = struct.unpack_from("<I", raw, offset + 4)[0]
        if raw[offset : offset + 4] == cid:
            return raw[offset + 8 : offset + 8 + size]
        offset += 8 + size + (size % 2)
    raise AssertionError(f"no {cid!r} chunk")


def test_process_keeps_length_rate_subtype_and_broadcast_chunks(
    tmp_path, take, pack_bext, splice_before_data
):
    ixml = b"<?xml version='1.0'?><BWFXML><SCENE>12</SCENE><TAKE>3</TAKE></BWFXML>"
    bext = pack_bext(
        description=b"Scene 12 take 3, boom and plant", originator=b"liftmag tests",
        reference=b"REF0001", date=b"2026-12-02", time=b"10:11:12",
        time_reference_samples=3_600 * FS, coding_history=b"A=PCM,F=16000,W=24,M=stereo\r\n",
    )
    take.write_bytes(splice_before_data(take.read_bytes(), [(b"bext", bext), (b"iXML", ixml)]))
    out = tmp_path / "clean.wav"
    assert main(["process", str(take), "-o", str(out)]) == 0
    info_in, info_out = sf.info(take), sf.info(out)
    assert info_out.frames == info_in.frames
    assert info_out.samplerate == FS and info_out.subtype == "PCM_24"
    # EBU Tech 3285: the 602 bytes of fixed fields are kept byte for byte; the coding
    # history gains one row (its layout is checked in test_tracks.py).
    assert _chunk(out, b"bext")[:602] == bext[:602]
    assert _chunk(out, b"bext").startswith(bext)
    assert _chunk(out, b"iXML") == ixml
    # TimeReference sits at byte 338 of the bext payload (EBU Tech 3285).
    assert struct.unpack_from("<Q", _chunk(out, b"bext"), 338)[0] == 3_600 * FS


def test_learn_then_process_with_the_model_and_json_summary(tmp_path, scene, capsys):
    tone = tmp_path / "roomtone.wav"
    sf.write(tone, scene.room_tone.T, FS, subtype="FLOAT")
    model = tmp_path / "location.npz"
    assert main(["learn", str(tone), "-o", str(model)]) == 0
    take = tmp_path / "take.flac"
    sf.write(take, scene.mixture.T, FS, subtype="PCM_16")
    out = tmp_path / "clean.flac"
    capsys.readouterr()
    assert main(["process", str(take), "-o", str(out), "--noise-model", str(model), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["channels_out"] == 1 and summary["frames"] == sf.info(take).frames
    assert "noise model" in summary["noise_source"]
    assert sf.info(out).format == "FLAC"


def test_keep_image_writes_every_channel(tmp_path, take):
    out = tmp_path / "image.wav"
    assert main(["process", str(take), "-o", str(out), "--output-mode", "keep-image"]) == 0
    assert sf.info(out).channels == 2


def _refused(capsys, argv, words, folder: Path) -> None:
    before = _listing(folder)
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and words in err[0], err
    assert _listing(folder) == before  # nothing written, no partial file


def test_bad_inputs_get_one_line_errors_and_write_nothing(tmp_path, take, capsys, scene):
    out = str(tmp_path / "out.wav")
    mono = tmp_path / "mono.wav"
    sf.write(mono, scene.mixture[0, :FS], FS)
    _refused(capsys, ["process", str(mono), "-o", out], "two or more microphones", tmp_path)

    nan = tmp_path / "nan.wav"
    data = scene.mixture[:, :FS].T.copy()
    data[8000, 1] = np.nan
    sf.write(nan, data, FS, subtype="FLOAT")
    _refused(capsys, ["process", str(nan), "-o", out], "0.500000 s", tmp_path)

    short = tmp_path / "short.wav"
    sf.write(short, scene.mixture[:, :1000].T, FS)
    _refused(capsys, ["process", str(short), "-o", out], "needs at least", tmp_path)

    junk = tmp_path / "junk.wav"
    junk.write_bytes(b"RIFF\x10\x00\x00\x00WAVEjunkjunk")
    _refused(capsys, ["process", str(junk), "-o", out], "junk.wav", tmp_path)
    _refused(capsys, ["process", str(tmp_path / "missing.wav"), "-o", out], "missing.wav",
             tmp_path)

    _refused(capsys, ["process", str(take), "-o", out, "--noise-region", "4:9"],
             "ends after the file", tmp_path)
    _refused(capsys, ["process", str(take), "-o", out, "--noise-region", "0:0.1"],
             "too little room tone", tmp_path)
    _refused(capsys, ["process", str(take), "-o", out, "--reduction-limit-db", "99"],
             "reduction_limit_db", tmp_path)
    _refused(capsys, ["process", str(take), "-o", str(take)], "is an input file",
             tmp_path)


def test_mismatched_noise_model_is_refused_with_what_differs(tmp_path, scene, capsys):
    tone48 = tmp_path / "tone48.wav"
    sf.write(tone48, np.zeros((48000 * 3, 2)) + 1e-3 * np.random.default_rng(0).standard_normal(
        (48000 * 3, 2)), 48000)
    model = tmp_path / "m.npz"
    assert main(["learn", str(tone48), "-o", str(model)]) == 0
    take = tmp_path / "take.wav"
    sf.write(take, scene.mixture[:, : 3 * FS].T, FS)
    _refused(capsys, ["process", str(take), "-o", str(tmp_path / "o.wav"), "--noise-model",
                      str(model)], "sample rate 48000 Hz vs 16000 Hz", tmp_path)


def test_existing_output_needs_force(tmp_path, take, capsys):
    out = tmp_path / "out.wav"
    out.write_bytes(b"keep me")
    assert main(["process", str(take), "-o", str(out)]) == 2
    assert out.read_bytes() == b"keep me"
    assert main(["process", str(take), "-o", str(out), "--force"]) == 0
    assert sf.info(out).frames == sf.info(take).frames


def test_grouped_mono_stems_equal_the_multichannel_file(tmp_path, take):
    data, _ = sf.read(take, always_2d=True)
    stems = []
    for ch in range(2):
        stems.append(tmp_path / f"take_{ch + 1}.wav")
        sf.write(stems[-1], data[:, ch], FS, subtype="PCM_24")
    a, b = tmp_path / "a.wav", tmp_path / "b.wav"
    assert main(["process", str(take), "-o", str(a)]) == 0
    assert main(["process", *map(str, stems), "-o", str(b)]) == 0
    np.testing.assert_array_equal(sf.read(a)[0], sf.read(b)[0])
