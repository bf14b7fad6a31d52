"""Tests of ``liftmag compare`` (liftmag.abcompare, liftmag.report, the CLI verb).

Scene: dsp/liftmag/data/talker_a.flac (synthetic speech made by this project, 16 kHz)
plus seeded white noise; every version is built from it here, so the true delays,
gains and noise levels are known.
"""

from __future__ import annotations

import base64
import io
import json
import math
import os
import random
import re
import shutil
import signal
import stat
import struct
from html.parser import HTMLParser
from pathlib import Path

import browser
import numpy as np
import pytest
import soundfile as sf

from liftmag import abcompare, metrics
from liftmag.cli import main

DATA = Path(__file__).resolve().parents[1] / "dsp" / "liftmag" / "data"
DELAY = 437
GAIN_DB = -6.2


@pytest.fixture(scope="module")
def speech() -> tuple[np.ndarray, int]:
    x, fs = sf.read(DATA / "talker_a.flac", dtype="float64")
    return x, fs


def _noise(n: int, rms: float, seed: int) -> np.ndarray:
    w = np.random.default_rng(seed).standard_normal(n)
    return w * rms / np.sqrt(np.mean(w**2))


def _delayed(x: np.ndarray, delay: int) -> np.ndarray:
    return np.concatenate([np.zeros(delay), x]) if delay >= 0 else x[-delay:]


# --------------------------------------------------------------------------- core


@pytest.mark.parametrize("delay", [DELAY, -250])
def test_delayed_scaled_copy_delay_exact_and_gain_within_0p1_db(speech, delay):
    # A version equal to the original delayed by 437 samples and scaled by -6.2 dB:
    # the delay must be found to the sample, and the BS.1770 loudness (pyloudnorm)
    # gain must undo the scaling within 0.1 dB.
    s, fs = speech
    original = s + _noise(s.size, 0.3 * np.sqrt(np.mean(s**2)), seed=1)
    copy = _delayed(original, delay) * 10 ** (GAIN_DB / 20)
    a = abcompare.estimate_delay(original, copy, fs)
    assert a.delay_samples == delay
    assert a.delay_ms == pytest.approx(1e3 * delay / fs)
    assert a.polarity == 1 and a.peak_correlation > 0.99
    aligned = abcompare.apply_alignment(copy, a, original.size)
    regions = abcompare.find_regions(original, fs)
    match = abcompare.match_loudness({"original": original, "copy": aligned}, regions.speech, fs)
    relative_gain_db = match.gain_db["copy"] - match.gain_db["original"]
    assert relative_gain_db == pytest.approx(-GAIN_DB, abs=0.1)


def test_inverted_polarity_is_found_and_undone(speech):
    s, fs = speech
    a = abcompare.estimate_delay(s, -_delayed(s, 12), fs)
    assert (a.delay_samples, a.polarity) == (12, -1)
    aligned = abcompare.apply_alignment(-_delayed(s, 12), a, s.size)
    np.testing.assert_allclose(aligned, s, atol=1e-12)


def test_loudness_match_lowers_everything_together_instead_of_clipping():
    # A quiet version with a transient: matching it to a loud original would push the
    # transient past full scale, so every gain drops by the same amount instead.
    fs = 16000
    t = np.arange(3 * fs) / fs
    original = 0.7 * np.sin(2 * np.pi * 220 * t) * (1 + 0.3 * np.sin(2 * np.pi * 3 * t))
    version = 0.1 * original
    version[fs] = 0.09  # a click that would reach 0.9 * 7.9 > 1 after matching
    speech = np.ones(t.size, dtype=bool)
    m = abcompare.match_loudness({"original": original, "v": version}, speech, fs)
    assert m.common_reduction_db < 0
    assert max(m.peak_dbfs_after.values()) == pytest.approx(abcompare.PEAK_CEILING_DBFS)
    for name, x in {"original": original, "v": version}.items():
        peak = np.max(np.abs(abcompare.apply_gain_db(x, m.gain_db[name])))
        assert 20 * math.log10(peak) <= abcompare.PEAK_CEILING_DBFS + 1e-9
    # Loudness still matched (BS.1770 via pyloudnorm on the gained signals).
    l_orig = metrics.integrated_loudness_lufs(
        abcompare.apply_gain_db(original, m.gain_db["original"]), fs
    )
    l_ver = metrics.integrated_loudness_lufs(abcompare.apply_gain_db(version, m.gain_db["v"]), fs)
    assert l_ver == pytest.approx(l_orig, abs=0.1)


def test_regions_noise_only_found_in_pauses(speech):
    s, fs = speech
    original = s + _noise(s.size, 0.1 * np.sqrt(np.mean(s**2)), seed=3)
    r = abcompare.find_regions(original, fs)
    assert r.noise_found_automatically and r.notes
    # talker_a's pauses are digital silence (dsp/liftmag/data/README.md), so the clean speech
    # must be (nearly) absent from the automatically found noise-only region.
    assert np.mean(s[r.noise] ** 2) < 1e-4 * np.mean(s**2)
    assert r.speech.sum() > 3 * fs and not np.any(r.noise & r.speech)
    given = abcompare.find_regions(original, fs, [(4.1, 4.4)])
    assert not given.noise_found_automatically
    assert given.noise.sum() == round(0.3 * fs)


def test_blind_labels_are_neutral_and_shuffled():
    names = ["original", "liftmag", "other"]
    seen = {tuple(abcompare.blind_labels(names).values()) for _ in range(30)}
    assert len(seen) > 1  # the default generator (SystemRandom) shuffles
    labels = abcompare.blind_labels(names, random.Random(1))
    assert sorted(labels) == ["take-1", "take-2", "take-3"]
    assert sorted(labels.values()) == sorted(names)


# --------------------------------------------------------------------------- CLI scene


@pytest.fixture(scope="module")
def scene(speech, tmp_path_factory):
    s, fs = speech
    d = tmp_path_factory.mktemp("scene")
    noise_rms = np.sqrt(np.mean(s**2)) / np.sqrt(10.0)  # 10 dB SNR
    n0 = _noise(s.size, noise_rms, seed=10)
    n1 = _noise(s.size, noise_rms, seed=11)
    # Two-microphone original; channel 0 is the reference.
    sf.write(d / "take.wav", np.stack([s + n0, s + n1], axis=1), fs, subtype="FLOAT")
    # liftmag's output: noise 14 dB lower, 437 samples late, 6.2 dB quieter.
    lift = _delayed(s + 0.2 * n0, DELAY) * 10 ** (GAIN_DB / 20)
    sf.write(d / "lift.wav", lift, fs, subtype="FLOAT")
    # Another version: 48 kHz, stereo, 0.3 s shorter, noise 6 dB lower.
    other = metrics.resample_to(s + 0.5 * n0, fs, 48000)[: -int(0.3 * 48000)]
    sf.write(d / "other.wav", np.stack([other, other], axis=1), 48000, subtype="PCM_24")
    sf.write(d / "clean.flac", s, fs)
    return d, fs


@pytest.fixture(scope="module")
def full_run(scene, tmp_path_factory):
    d, _ = scene
    out = tmp_path_factory.mktemp("run") / "cmp"
    argv = [
        "compare", str(d / "take.wav"), "--liftmag", str(d / "lift.wav"),
        "--other", f"other={d / 'other.wav'}", "--clean", str(d / "clean.flac"),
        "--out", str(out), "--json",
    ]  # fmt: skip
    import contextlib

    stdout, stderr = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(stdout), contextlib.redirect_stderr(stderr):
        rc = main(argv)
    assert rc == 0, stderr.getvalue()
    return out, json.loads(stdout.getvalue()), stderr.getvalue()


def _by_name(summary):
    return {v["name"]: v for v in summary["versions"]}


def test_cli_alignment_loudness_and_scores(full_run, scene):
    out, summary, stderr = full_run
    _, fs = scene
    v = _by_name(summary)
    assert list(v) == ["original", "liftmag", "other"]
    assert v["liftmag"]["delay_samples"] == DELAY
    assert v["liftmag"]["delay_ms"] == pytest.approx(1e3 * DELAY / fs, abs=1e-3)
    assert v["other"]["delay_samples"] == 0
    # Gains bring every version to the original's BS.1770 loudness.
    for name in ("liftmag", "other"):
        expected = v["original"]["loudness_lufs"] - v[name]["loudness_lufs"]
        relative = v[name]["gain_db"] - v["original"]["gain_db"]
        assert relative == pytest.approx(expected, abs=1e-3)
    # Noise floor: liftmag kept 0.2 of the noise and was scaled by -6.2 dB.
    nf = v["liftmag"]["scores"]["noise_floor_change_db"]
    assert nf == pytest.approx(20 * math.log10(0.2) + GAIN_DB, abs=0.3)
    # "other" kept 0.5 of the noise but ends 0.3 s early: its missing end is padded with
    # silence, so any part of the noise region past its end counts as silent.
    end_s = sf.info(v["other"]["file"]).duration
    intervals = summary["noise_region"]["intervals_s"]
    covered = sum(max(0.0, min(b, end_s) - a) for a, b in intervals)
    total = sum(b - a for a, b in intervals)
    assert v["other"]["scores"]["noise_floor_change_db"] == pytest.approx(
        10 * math.log10(0.5**2 * covered / total), abs=0.3
    )
    # Known-cleaner versions score better with the reference libraries.
    sc = {name: v[name]["scores"] for name in v}
    assert sc["liftmag"]["stoi"] > sc["other"]["stoi"] > sc["original"]["stoi"]
    assert sc["liftmag"]["pesq_wb"] > sc["original"]["pesq_wb"]
    assert sc["liftmag"]["si_sdr_db"] > sc["other"]["si_sdr_db"] > sc["original"]["si_sdr_db"]
    assert sc["liftmag"]["wada_snr_db"] > sc["original"]["wada_snr_db"]
    # Notes: channel choice, resampling, shorter file, automatic noise region.
    notes = " ".join(summary["notes"])
    for fragment in ("2 channels", "48000 Hz", "padded with silence", "no --noise-region"):
        assert fragment in notes
    assert "monitor" in stderr  # listening-level caution
    assert json.loads((out / "scores.json").read_text()) == summary


def _riff_chunks(data: bytes) -> list[tuple[bytes, int]]:
    assert data[:4] == b"RIFF" and data[8:12] == b"WAVE"
    chunks, pos = [], 12
    while pos + 8 <= len(data):
        cid, size = data[pos : pos + 4], struct.unpack("<I", data[pos + 4 : pos + 8])[0]
        chunks.append((cid, pos))
        pos += 8 + size + (size & 1)
    return chunks


def test_blind_files_do_not_reveal_the_key(full_run):
    out, _, _ = full_run
    blind = sorted((out / "blind").iterdir())
    assert [p.name for p in blind] == ["take-1.wav", "take-2.wav", "take-3.wav"]
    stats = [p.stat() for p in blind]
    assert len({st.st_size for st in stats}) == 1
    assert len({st.st_mtime_ns for st in stats}) == 1
    infos = [sf.info(str(p)) for p in blind]
    assert len({(i.frames, i.samplerate, i.channels, i.format, i.subtype) for i in infos}) == 1
    raw = [p.read_bytes() for p in blind]
    chunk_lists = [_riff_chunks(r) for r in raw]
    # Only the format and the audio: no tags, no peak or time-stamp chunks.
    assert all([cid for cid, _ in c] == [b"fmt ", b"data"] for c in chunk_lists)
    header_end = chunk_lists[0][-1][1] + 8
    assert len({r[:header_end] for r in raw}) == 1
    key = json.loads((out / "blind-key.json").read_text())
    for name in ("original", "liftmag", "other"):
        assert all(name not in p.name for p in blind)
    assert sorted(t["name"] for t in key["takes"].values()) == ["liftmag", "original", "other"]


def _identify(blind_path: Path, summary) -> str:
    """Which input a blind file holds, found from the audio alone (correlation)."""
    x, fs = sf.read(str(blind_path), dtype="float64")
    best, best_corr = None, -1.0
    for v in summary["versions"]:
        data, fs_v = sf.read(v["file"], dtype="float64", always_2d=True)
        y = metrics.resample_to(data[:, 0], fs_v, fs)
        y = abcompare.apply_alignment(
            y, abcompare.Alignment(v["delay_samples"], 0.0, v["polarity"], 1.0), x.size
        )
        corr = float(x @ y) / math.sqrt(float(x @ x) * float(y @ y))
        if corr > best_corr:
            best, best_corr = v["name"], corr
    return best


def test_reveal_round_trips(full_run, run_cli):
    out, summary, _ = full_run
    rc, text, _ = run_cli(*["compare", "--reveal", str(out / "blind-key.json")])
    assert rc == 0
    revealed = dict(re.findall(r"^(take-\d+\.wav)\s+is\s+(\S+)", text, flags=re.M))
    assert len(revealed) == 3
    for label, name in revealed.items():
        assert _identify(out / "blind" / label, summary) == name
    # Matched for listening: the blind files share the original's loudness.
    fs = summary["sample_rate_hz"]
    levels = [
        metrics.integrated_loudness_lufs(sf.read(str(p), dtype="float64")[0], fs)
        for p in sorted((out / "blind").iterdir())
    ]
    assert max(levels) - min(levels) < 1.0  # whole files; matching is on speech only


class _PageParser(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list[str] = []
        self.images: list[dict[str, str]] = []
        self.cells: list[str] = []
        self.headings: list[str] = []
        self.links: list[str] = []
        self._in: str | None = None
        self._text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        a = dict(attrs)
        if tag == "img":
            self.images.append(a)
        if "href" in a:
            self.links.append(a["href"])
        if tag in ("td", "h1", "h2"):
            self._in, self._text = tag, []

    def handle_data(self, data):
        if self._in:
            self._text.append(data)

    def handle_endtag(self, tag):
        if tag == self._in:
            text = "".join(self._text).strip()
            (self.cells if tag == "td" else self.headings).append(text)
            self._in = None


def test_html_report_is_self_contained_and_complete(full_run):
    from matplotlib.image import imread

    out, _, _ = full_run
    page = (out / "report.html").read_text(encoding="utf-8")
    assert page.startswith("<!DOCTYPE html>")
    p = _PageParser()
    p.feed(page)
    p.close()
    assert p.tags.count("html") == 1 and p.tags.count("table") == 2
    for name in ("original", "liftmag", "other"):
        assert p.cells.count(name) == 2  # scores table and alignment table
    assert "Scores" in p.headings and "Blind listening" in p.headings
    assert len(p.images) == 1 + 2  # level plot + one spectrogram row per version
    for img in p.images:
        src = img["src"]
        assert src.startswith("data:image/png;base64,")
        png = base64.b64decode(src.split(",", 1)[1], validate=True)
        assert png[:8] == b"\x89PNG\r\n\x1a\n"
        pixels = imread(io.BytesIO(png), format="png")
        assert pixels.ndim == 3 and pixels.shape[0] > 100 and pixels.shape[1] > 300
        assert img.get("alt")
    assert not p.links  # nothing outside the file
    assert "not the original" in page and "forensic" in page
    md = (out / "report.md").read_text(encoding="utf-8")
    for link in re.findall(r"!\[[^\]]*\]\(([^)]+)\)", md):
        assert (out / link).is_file()


@pytest.mark.skipif(browser.CHROMIUM is None, reason="Debian chromium not installed")
def test_html_report_renders_in_chromium(full_run, tmp_path):
    # Reference renderer: Debian's headless Chromium, as a reader would open the report.
    out, _, _ = full_run
    shot = browser.screenshot(out / "report.html", tmp_path / "shot.png", tmp_path / "profile",
                              width=1200, height=2000)
    from matplotlib.image import imread

    pixels = imread(str(shot))
    assert pixels.std() > 0.05  # not a blank page


# --------------------------------------------------------------------------- errors


def _assert_nothing_written(out: Path):
    assert not out.exists()


def test_missing_file_is_a_clear_error_and_writes_nothing(scene, tmp_path, run_cli):
    d, _ = scene
    out = tmp_path / "cmp"
    rc, _, err = run_cli(
        *["compare", str(d / "take.wav"), "--liftmag", str(d / "nope.wav"), "--out", str(out)],
    )
    assert rc == 2
    assert err.strip().count("\n") == 0
    assert "liftmag: " in err and "nope.wav" in err and "no such file" in err
    _assert_nothing_written(out)


def test_unreadable_file_is_a_clear_error(scene, tmp_path, run_cli):
    d, _ = scene
    bad = tmp_path / "bad.wav"
    bad.write_text("not audio")
    out = tmp_path / "cmp"
    rc, _, err = run_cli(
        *["compare", str(d / "take.wav"), "--liftmag", str(bad), "--out", str(out)]
    )
    assert rc == 2 and "liftmag: " in err and "cannot read" in err
    assert err.strip().count("\n") == 0
    _assert_nothing_written(out)


@pytest.mark.parametrize("which", ["version", "original", "clean"])
def test_silence_is_a_clear_error(scene, tmp_path, run_cli, which):
    d, fs = scene
    silent = tmp_path / "silent.wav"
    sf.write(silent, np.zeros(fs * 3), fs)
    files = {"original": d / "take.wav", "version": d / "lift.wav", "clean": d / "clean.flac"}
    files[which] = silent
    out = tmp_path / "cmp"
    argv = ["compare", str(files["original"]), "--liftmag", str(files["version"]),
            "--clean", str(files["clean"]), "--out", str(out)]  # fmt: skip
    rc, _, err = run_cli(*argv)
    assert rc == 2 and "digital silence" in err
    _assert_nothing_written(out)


def test_bad_arguments_are_clear_errors(scene, tmp_path, run_cli):
    d, _ = scene
    out = tmp_path / "cmp"
    base = ["compare", str(d / "take.wav"), "--liftmag", str(d / "lift.wav"), "--out", str(out)]
    cases = [
        (["--other", "nofile"], "NAME=FILE"),
        (["--other", f"original={d / 'lift.wav'}"], "reserved"),
        (["--channel", "5"], "out of range"),
        (["--noise-region", "3:2"], "START < END"),
        (["--noise-region", "40:41"], "beyond the original's end"),
    ]
    for extra, fragment in cases:
        rc, _, err = run_cli(*base + extra)
        assert rc == 2 and fragment in err, (extra, err)
    _assert_nothing_written(out)


def test_existing_outputs_need_force_and_inputs_are_never_overwritten(scene, tmp_path, run_cli):
    d, _ = scene
    out = tmp_path / "cmp"
    (out / "blind").mkdir(parents=True)
    (out / "blind" / "take-7.wav").write_bytes(b"old")
    argv = ["compare", str(d / "take.wav"), "--liftmag", str(d / "lift.wav"), "--out", str(out),
            "--noise-region", "4.1:4.4", "--noise-region", "7.7:8.0"]  # fmt: skip
    rc, _, err = run_cli(*argv)
    assert rc == 2 and "--force" in err
    assert sorted(p.name for p in out.rglob("*")) == ["blind", "take-7.wav"]
    rc, text, err = run_cli(*[*argv, "--force"])
    assert rc == 0, err
    assert "report:" in text and "caution" in text
    # The stale blind file from an earlier run is gone; the new set is complete.
    assert sorted(p.name for p in (out / "blind").iterdir()) == ["take-1.wav", "take-2.wav"]
    summary = json.loads((out / "scores.json").read_text())
    assert summary["noise_region"]["found_automatically"] is False
    assert summary["noise_region"]["total_s"] == pytest.approx(0.6, abs=0.01)
    # An output folder holding an input under an output's name is refused.
    clash = tmp_path / "clash"
    clash.mkdir()
    shutil.copy(d / "take.wav", clash / "report.html")
    rc, _, err = run_cli(
        *["compare", str(clash / "report.html"), "--liftmag", str(d / "lift.wav"),
         "--out", str(clash), "--force"],
    )  # fmt: skip
    assert rc == 2 and "overwrite an input" in err


def test_force_never_deletes_an_input_that_is_a_stale_blind_file(scene, tmp_path, run_cli):
    d, _ = scene
    out = tmp_path / "cmp"
    (out / "blind").mkdir(parents=True)
    stale_input = out / "blind" / "take-9.wav"  # named like a blind file of an earlier run
    shutil.copy(d / "lift.wav", stale_input)
    before = stale_input.read_bytes()
    rc, _, err = run_cli(
        *["compare", str(d / "take.wav"), "--liftmag", str(stale_input), "--out", str(out),
         "--force"],
    )  # fmt: skip
    assert rc == 2 and "input" in err and len(err.strip().splitlines()) == 1
    assert stale_input.read_bytes() == before


def test_force_never_replaces_a_fifo_among_the_outputs(scene, tmp_path, run_cli):
    d, _ = scene
    out = tmp_path / "cmp"
    out.mkdir()
    os.mkfifo(out / "report.md")
    rc, _, err = run_cli(
        *["compare", str(d / "take.wav"), "--liftmag", str(d / "lift.wav"), "--out", str(out),
         "--force"],
    )  # fmt: skip
    # POSIX S_ISFIFO: the FIFO is still there, untouched.
    assert rc == 2 and "not a regular file" in err
    assert stat.S_ISFIFO(os.lstat(out / "report.md").st_mode)


@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGHUP])
def test_sigterm_or_sighup_while_writing_leaves_nothing(scene, tmp_path, run_cli, monkeypatch,
                                                       signum):
    from liftmag.audio_io import StagedOutputs

    d, _ = scene
    out = tmp_path / "cmp"
    real_text = StagedOutputs.write_text
    sent = []

    def text_then_signal(self, final, text):
        staged = real_text(self, final, text)
        if not sent:  # the signal arrives once some outputs are staged, none committed
            sent.append(signum)
            os.kill(os.getpid(), signum)  # POSIX kill(): delivered before kill() returns
        return staged

    monkeypatch.setattr(StagedOutputs, "write_text", text_then_signal)
    rc, _, err = run_cli(
        *["compare", str(d / "take.wav"), "--liftmag", str(d / "lift.wav"), "--out", str(out)],
    )  # fmt: skip
    assert sent and rc == 128 + signum, err  # shells' 128 + N (common practice)
    assert not out.exists() or list(out.rglob("*")) == []
