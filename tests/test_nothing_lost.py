"""Nothing lost, whatever the path: inputs never written over, damaged inputs refused, one-line
errors instead of tracebacks, signals that leave no partial files.

External references used as oracles:
* RIFF 1.0 (Microsoft/IBM 1991): the ``data`` chunk's size field gives the bytes of audio;
  Apple AIFF 1.3 (1989): ``COMM`` numSampleFrames; RFC 3533 (Ogg): the last page of a stream
  carries the end-of-stream flag (header_type 0x04); the FLAC format's STREAMINFO total
  samples. A file cut short holds less than its header declares.
* POSIX.1-2017 <sys/stat.h>: S_ISREG / S_ISFIFO tell a regular file from a FIFO or device;
  <signal.h>: SIGTERM and SIGHUP end a process unless it catches them; a process ended by a
  signal N is reported by shells as status 128 + N (common practice).
* POSIX setrlimit(RLIMIT_FSIZE): writing beyond the limit fails with EFBIG once SIGXFSZ is
  ignored; used here as a full disk that needs no privileges.
* Linux/POSIX NAME_MAX: ext4, XFS and tmpfs take file names up to 255 bytes.
"""

from __future__ import annotations

import errno
import os
import resource
import signal
import stat
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from liftmag import audio_io
from liftmag.scenes import demo_scene

FS = 16000
# The console script's entry point, as `liftmag` runs it (`-m liftmag.cli` would load the
# module twice, as __main__ and as liftmag.cli).
LIFTMAG = [sys.executable, "-c", "import sys; from liftmag.cli import main; sys.exit(main())"]


@pytest.fixture(scope="module")
def scene():
    return demo_scene(seed=5, room_tone_s=6.0)


@pytest.fixture()
def take(tmp_path: Path, scene) -> Path:
    path = tmp_path / "take.wav"
    sf.write(path, scene.mixture[:, : 4 * FS].T, FS, subtype="PCM_16")
    return path


def one_line_error(err: str) -> bool:
    lines = err.strip().splitlines()
    return len(lines) == 1 and "error:" in lines[0] and "Traceback" not in err


# ------------------------------------------------------------ damaged or changing inputs


@pytest.mark.parametrize(
    ("fmt", "ext", "subtype"),
    [("WAV", "wav", "PCM_16"), ("AIFF", "aiff", "PCM_16"), ("W64", "w64", "PCM_16"),
     ("OGG", "ogg", "VORBIS"), ("FLAC", "flac", "PCM_16")],
)
def test_truncated_inputs_are_refused_by_process_and_learn(
    tmp_path, scene, fmt, ext, subtype, run_cli, partials
):
    path = tmp_path / f"cut.{ext}"
    sf.write(path, scene.mixture[:, : 4 * FS].T, FS, format=fmt, subtype=subtype)
    raw = path.read_bytes()
    path.write_bytes(raw[: len(raw) * 2 // 3])  # as an interrupted copy leaves it
    for verb, out in (("process", "out." + ext), ("learn", "model.npz")):
        rc, _, err = run_cli(verb, path, "-o", tmp_path / out)
        assert rc == 2 and one_line_error(err), (verb, err)
        assert "truncated" in err or "damaged" in err
        assert not (tmp_path / out).exists() and partials(tmp_path) == []


def test_an_input_cut_while_being_read_is_refused(tmp_path, take):
    source = audio_io.probe(take)
    blocks = audio_io.read_blocks(source, 4096)
    next(blocks)
    os.truncate(take, os.path.getsize(take) // 2)  # another program cuts the file
    with pytest.raises(audio_io.AudioInputError, match=r"ended at \d+ frames of the 64000"):
        for _ in blocks:
            pass


def test_more_microphones_than_the_stated_limit_are_refused_before_any_work(
    tmp_path, scene, run_cli
):
    # 17 channels: one more than the limit the README states.
    path = tmp_path / "many.wav"
    many = np.tile(scene.mixture[:, : 2 * FS], (9, 1))[: audio_io.MAX_CHANNELS + 1]
    sf.write(path, many.T, FS, subtype="PCM_16")
    for verb, out in (("process", "o.wav"), ("learn", "m.npz")):
        rc, _, err = run_cli(verb, path, "-o", tmp_path / out)
        assert rc == 2 and one_line_error(err) and "at most 16" in err, err
    # A poly file with more tracks than that is fine when the array uses fewer of them.
    rc, _, err = run_cli("process", path, "-o", tmp_path / "o.wav", "--mics", "1,2")
    assert rc == 0, err


# ------------------------------------------------------------ nothing read is written over


def test_force_never_replaces_a_fifo(tmp_path, take, run_cli):
    fifo = tmp_path / "pipe.wav"
    os.mkfifo(fifo)
    rc, _, err = run_cli("process", take, "-o", fifo, "--force")
    assert rc == 2 and one_line_error(err) and "not a regular file" in err
    assert stat.S_ISFIFO(os.lstat(fifo).st_mode)  # POSIX S_ISFIFO: still the FIFO
    assert "--force" not in err
    rc, _, err = run_cli("learn", take, "-o", fifo, "--force")
    assert rc == 2 and one_line_error(err) and stat.S_ISFIFO(os.lstat(fifo).st_mode)


@pytest.mark.skipif(os.geteuid() != 0, reason="replacing a device node needs root")
def test_force_never_replaces_a_device(tmp_path, take, run_cli):
    device = tmp_path / "null"
    os.mknod(device, 0o666 | stat.S_IFCHR, os.makedev(1, 3))  # Linux: /dev/null is 1, 3
    rc, _, err = run_cli("process", take, "-o", device, "--force")
    assert rc == 2 and one_line_error(err)
    assert stat.S_ISCHR(os.lstat(device).st_mode)


def test_learn_never_writes_over_its_room_tone(tmp_path, take, run_cli):
    before = take.read_bytes()
    rc, _, err = run_cli("learn", take, "-o", take, "--force")
    assert rc == 2 and one_line_error(err) and "input" in err
    assert take.read_bytes() == before


def test_existing_input_or_folder_gets_no_force_advice(tmp_path, take, run_cli):
    rc, _, err = run_cli("process", take, "-o", take)
    assert rc == 2 and "is an input" in err and "--force" not in err
    rc, _, err = run_cli("process", take, "-o", tmp_path)
    assert rc == 2 and "folder" in err and "--force" not in err
    rc, _, err = run_cli("learn", take, "-o", tmp_path)
    assert rc == 2 and "folder" in err and "--force" not in err


# ------------------------------------------------------------ output container from the name


def test_output_container_follows_the_extension_and_keeps_what_it_can(tmp_path, take, run_cli):
    rc, _, err = run_cli("process", take, "-o", tmp_path / "out.flac")
    assert rc == 0, err
    info = sf.info(str(tmp_path / "out.flac"))
    assert (info.format, info.subtype) == ("FLAC", "PCM_16")  # the input's subtype, kept
    assert "WAV PCM_16 in, FLAC PCM_16 out" in err
    float_take = tmp_path / "float.wav"
    sf.write(float_take, sf.read(take)[0], FS, subtype="FLOAT")
    rc, _, err = run_cli("process", float_take, "-o", tmp_path / "f.flac")
    # FLAC holds integers only (FLAC format: 4 to 32 bits per sample in libsndfile's 8-24).
    assert rc == 0 and sf.info(str(tmp_path / "f.flac")).subtype == "PCM_24"
    assert "WAV FLOAT in, FLAC PCM_24 out" in err
    rc, _, err = run_cli("process", take, "-o", tmp_path / "same.wav")
    assert rc == 0 and "out (from the name" not in err
    assert sf.info(str(tmp_path / "same.wav")).subtype == "PCM_16"


def test_unknown_output_extension_is_refused_in_one_line(tmp_path, take, run_cli, partials):
    rc, _, err = run_cli("process", take, "-o", tmp_path / "out.xyz")
    assert rc == 2 and one_line_error(err) and ".xyz" in err
    assert not (tmp_path / "out.xyz").exists() and partials(tmp_path) == []


# ------------------------------------------------------------ one line, not a traceback


def test_long_legal_output_name_is_written(tmp_path, take, run_cli, partials):
    name = "n" * (255 - len(".wav")) + ".wav"  # NAME_MAX: the longest name ext4 takes
    rc, _, err = run_cli("process", take, "-o", tmp_path / name)
    assert rc == 0, err
    assert (tmp_path / name).is_file() and partials(tmp_path) == []
    rc, _, err = run_cli("process", take, "-o", tmp_path / ("m" * 300 + ".wav"))
    assert rc == 2 and one_line_error(err)


def test_read_only_folder_is_one_line(tmp_path, take, monkeypatch, run_cli):
    folder = tmp_path / "ro"
    folder.mkdir()
    real_open = os.open

    def refusing_open(path, flags, *args, **kwargs):
        # What a read-only folder answers (EACCES), also when the tests run as root.
        if str(path).startswith(str(folder)) and flags & os.O_CREAT:
            raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), str(path))
        return real_open(path, flags, *args, **kwargs)

    monkeypatch.setattr(os, "open", refusing_open)
    for verb, out in (("process", "out.wav"), ("learn", "m.npz")):
        rc, _, err = run_cli(verb, take, "-o", folder / out)
        assert rc == 2 and one_line_error(err) and "Permission denied" in err, err
    assert list(folder.iterdir()) == []


def _limit_file_size(limit_bytes: int):
    def apply() -> None:
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # then write() fails with EFBIG
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit_bytes, limit_bytes))
    return apply


@pytest.mark.parametrize("verb", ["process", "learn"])
def test_full_disk_is_one_line_and_leaves_nothing(tmp_path, take, verb, partials):
    out = tmp_path / ("out.wav" if verb == "process" else "m.npz")
    done = subprocess.run(
        [*LIFTMAG, verb, str(take), "-o", str(out)],
        capture_output=True, text=True, preexec_fn=_limit_file_size(20_000), check=False,
    )
    assert done.returncode == 2 and one_line_error(done.stderr), done.stderr
    assert "nothing was written" in done.stderr
    assert not out.exists() and partials(tmp_path) == []


# ------------------------------------------------------------ signals leave nothing partial


def _stop_while_writing(
    proc: subprocess.Popen, folder: Path, partials: Callable, timeout_s: float = 120.0
) -> bool:
    """Poll for a temporary file, then SIGSTOP the process; True if it is stopped mid-write.

    Stopped (SIGSTOP cannot be caught, POSIX), the process cannot finish; with its temporary
    file still present it was caught while writing. False if it ended first.
    """
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline and proc.poll() is None:
        if partials(folder):
            os.kill(proc.pid, signal.SIGSTOP)
            _wait_stopped(proc.pid)
            if partials(folder) and proc.poll() is None:
                return True
            os.kill(proc.pid, signal.SIGCONT)
        time.sleep(0.005)
    return False


def _wait_stopped(pid: int) -> None:
    # Linux proc(5): field 3 of /proc/PID/stat is the state, "T" when stopped by a signal.
    for _ in range(2000):
        with open(f"/proc/{pid}/stat") as fh:
            if fh.read().rsplit(")", 1)[1].split()[0] in "TZ":
                return
        time.sleep(0.001)


@pytest.mark.skipif(not Path("/proc/self/stat").is_file(), reason="needs Linux /proc")
@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGHUP])
def test_sigterm_and_sighup_to_process_leave_no_partial(tmp_path, scene, signum, partials):
    long_take = tmp_path / "long.wav"
    sf.write(long_take, np.tile(scene.mixture, 6).T, FS, subtype="PCM_16")
    out = tmp_path / "out"
    out.mkdir()
    for _attempt in range(5):  # a run that ends before it is caught proves nothing: again
        proc = subprocess.Popen(
            [*LIFTMAG, "process", str(long_take), "-o",
             str(out / "clean.wav"), "--force"],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        )
        caught = _stop_while_writing(proc, out, partials)
        if caught:
            os.kill(proc.pid, signum)
            os.kill(proc.pid, signal.SIGCONT)
        _, err = proc.communicate(timeout=120)
        if caught:
            break
        (out / "clean.wav").unlink(missing_ok=True)
    assert caught, "the process always finished before it could be stopped"
    assert proc.returncode == 128 + signum, err
    assert partials(tmp_path) == [] and not (out / "clean.wav").exists()
    assert "no partial output" in err


# ------------------------------------------------------------ degenerate noise data


def _model_file(path: Path, model, **meta_changes) -> Path:
    """Save ``model`` with some metadata fields replaced (None removes the field)."""
    import io
    import json

    with np.load(io.BytesIO(model.to_bytes())) as archive:
        arrays = {k: archive[k] for k in archive.files}
    meta = json.loads(arrays["metadata"].tobytes().decode())
    for key, value in meta_changes.items():
        if value is None:
            meta.pop(key, None)
        else:
            meta[key] = value
    arrays["metadata"] = np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8)
    np.savez(path, **arrays)
    return path


@pytest.fixture(scope="module")
def learned(scene):
    from liftmag.fileproc import learn_noise
    from liftmag.settings import Settings

    return learn_noise(_source_of(scene), Settings(), ())


def _source_of(scene):
    import tempfile

    folder = Path(tempfile.mkdtemp(prefix="liftmag-tone-"))
    sf.write(folder / "tone.wav", scene.room_tone.T, FS, subtype="PCM_24")
    return audio_io.probe(folder / "tone.wav")


@pytest.mark.parametrize(
    ("changes", "words"),
    [({"hop": None}, "hop"), ({"frames": "many"}, "frames"), ({"frames": 0}, "frames"),
     ({"sample_rate_hz": -16000}, "sample_rate_hz"), ({"n_channels": 3}, "channel"),
     ({"frame_length": 0}, "frame")],
)
def test_model_with_the_right_tag_but_bad_metadata_is_one_line(
    tmp_path, take, learned, changes, words, run_cli
):
    model = _model_file(tmp_path / "m.npz", learned, **changes)
    rc, _, err = run_cli("process", take, "-o", tmp_path / "o.wav", "--noise-model",
                         model)
    assert rc == 2 and one_line_error(err) and words in err, err
    assert not (tmp_path / "o.wav").exists()


def test_all_zero_model_and_silent_room_tone_are_refused(tmp_path, take, learned, run_cli):
    import dataclasses

    silent = dataclasses.replace(
        learned, covariance=np.zeros_like(learned.covariance),
        lift_second_moment=np.zeros_like(learned.lift_second_moment),
    )
    (tmp_path / "zero.npz").write_bytes(silent.to_bytes())
    rc, _, err = run_cli("process", take, "-o", tmp_path / "o.wav", "--noise-model",
                         tmp_path / "zero.npz")
    assert rc == 2 and one_line_error(err) and "silent" in err, err
    tone = tmp_path / "zeros.wav"
    sf.write(tone, np.zeros((5 * FS, 2)), FS, subtype="PCM_16")  # digital silence
    rc, _, err = run_cli("learn", tone, "-o", tmp_path / "m.npz")
    assert rc == 2 and one_line_error(err) and "silent" in err
    assert not (tmp_path / "m.npz").exists()


def test_a_region_given_three_times_counts_once(scene):
    from liftmag.fileproc import learn_noise
    from liftmag.settings import Settings

    source = _source_of(scene)
    once = learn_noise(source, Settings(), [(0.5, 3.0)])
    thrice = learn_noise(source, Settings(), [(0.5, 3.0)] * 3)
    overlapping = learn_noise(source, Settings(), [(0.5, 2.0), (1.0, 3.0)])
    assert thrice.frames == once.frames == overlapping.frames
    np.testing.assert_allclose(thrice.covariance, once.covariance)


def test_a_dead_microphone_is_warned_about(tmp_path, scene, run_cli):
    take = tmp_path / "dead.wav"
    data = scene.mixture[:, : 4 * FS].T.copy()
    data[:, 1] = 0.0  # capsule 2 unplugged: digital silence
    sf.write(take, data, FS, subtype="PCM_16")
    rc, _, err = run_cli("process", take, "-o", tmp_path / "o.wav")
    assert rc == 0
    assert "channel 2" in err and "silent" in err


# ------------------------------------------------------------ other verbs, one line each


def test_demo_refuses_nan_snr_and_force_never_deletes_foreign_files(tmp_path, run_cli):
    rc, _, err = run_cli("demo", "--out", tmp_path / "d", "--snr-db", "nan")
    assert rc == 2 and one_line_error(err) and not (tmp_path / "d").exists()
    folder = tmp_path / "mine"
    folder.mkdir()
    (folder / "thesis.txt").write_text("years of work")
    rc, _, err = run_cli("demo", "--out", folder, "--force")
    assert rc == 2 and one_line_error(err) and "thesis.txt" in err
    assert (folder / "thesis.txt").read_text() == "years of work"


@pytest.mark.parametrize(("out", "words"), [("missing/p.png", "does not exist"),
                                            ("p.wav", "extension")])
def test_pattern_out_missing_folder_or_non_image_is_one_line(tmp_path, out, words, run_cli):
    rc, _, err = run_cli("pattern", "--out", tmp_path / out)
    assert rc == 2 and one_line_error(err) and words in err, err
    assert list(tmp_path.iterdir()) == []


# ------------------------------------------------------------ unusual RIFF size fields


def _bwf_with_riff_size(path: Path, scene, riff_size: int, data_size: int | None = None):
    """A BWF (EBU Tech 3285 bext before data) whose RIFF size field reads ``riff_size``."""
    import struct

    sf.write(path, scene.mixture[:, : 3 * FS].T, FS, subtype="PCM_16")
    raw = path.read_bytes()
    data_at = raw.index(b"data", 12)
    bext = b"Scene 4 take 2".ljust(602, b"\0") + b"A=PCM,F=16000,W=16\r\n"
    bext_chunk = b"bext" + struct.pack("<I", len(bext)) + bext
    out = bytearray(raw[:data_at] + bext_chunk + raw[data_at:])
    struct.pack_into("<I", out, 4, riff_size)
    if data_size is not None:
        struct.pack_into("<I", out, data_at + len(bext_chunk) + 4, data_size)
    path.write_bytes(bytes(out))
    return bext


@pytest.mark.parametrize(("riff_size", "data_size"),
                         [(0xFFFFFFFF, None), (0, None), (0xFFFFFFFF, 0xFFFFFFFF)])
def test_streaming_writers_size_fields_are_read_in_full_and_chunks_carried(
    tmp_path, scene, riff_size, data_size, run_cli
):
    take = tmp_path / "streamed.wav"
    bext = _bwf_with_riff_size(take, scene, riff_size, data_size)
    assert sf.info(str(take)).frames == 3 * FS  # libsndfile reads the audio in full
    rc, _, err = run_cli("process", take, "-o", tmp_path / "o.wav")
    assert rc == 0, err
    from liftmag import riffchunks

    # Carried: the input's bext whole, then one EBU R 98 coding-history row for this run.
    carried = riffchunks.read_bext(tmp_path / "o.wav")
    assert carried.startswith(bext) and carried[len(bext):].endswith(b"\r\n")
    assert sf.info(str(tmp_path / "o.wav")).frames == 3 * FS
