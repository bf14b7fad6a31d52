"""Finding the take's talkers and choosing the wanted one (``liftmag.talkers``).

Outside references: the generalised cross-correlation with the phase transform peaks at a
pure delay (Knapp & Carter, IEEE Trans. ASSP 24(4), 1976); far-field time differences
``tau_m = -(p_m - p_0) . u / c`` with c = 343 m/s (the value pyroomacoustics uses, and the
handbook figure for air at 20 degC, recalled from memory); image-source rooms from
pyroomacoustics; SI-SDR (Le Roux et al. 2019).
"""

from __future__ import annotations

import json

import numpy as np
import pyroomacoustics as pra
import pytest
import rooms
import soundfile

from liftmag import metrics, talkers
from liftmag.cli import main as cli_main
from liftmag.engine import iter_blocks, talker_prior
from liftmag.settings import Settings

FS = 16000
SPACING_M = 0.08
C_M_S = 343.0
NEAR = (60.0, 1.0)  # talker_a: bearing deg, distance m
FAR = (140.0, 2.2)  # talker_b
SOLO_NEAR_S = (0.5, 3.5)
SOLO_FAR_S = (4.0, 7.0)
TAKE_S = 13.0


def far_field_delays_s(bearing_deg: float, n_mics: int = 2, spacing_m: float = SPACING_M):
    """Time differences to microphone 0 of a plane wave from ``bearing_deg`` (x-axis array)."""
    m = np.arange(1, n_mics)
    return -m * spacing_m * np.cos(np.radians(bearing_deg)) / C_M_S


def _speech(name: str, n: int) -> np.ndarray:
    from liftmag import scenes

    s, fs = scenes.load_speech(name)
    assert fs == FS
    return s[np.arange(n) % s.size]


def _two_talker_take(n_mics: int, spacing_m: float, seed: int):
    """A 13 s take in a 0.3 s RT60 room: the near talker alone, the far one alone, then both.

    Returns (mixture (n_mics, n), near image (n,), far image (n,)) at microphone 0.
    """
    n = round(TAKE_S * FS)
    pos = rooms.ARRAY_CENTRE_M[:, None] + np.outer([1.0, 0.0, 0.0],
                                                    (np.arange(n_mics) - (n_mics - 1) / 2)
                                                    * spacing_m)
    room = rooms.build_room([rooms.position_at(*NEAR), rooms.position_at(*FAR)], pos, FS)
    near = np.zeros(n)
    far = np.zeros(n)
    a, b = (round(t * FS) for t in SOLO_NEAR_S)
    near[a:b] = _speech("talker_a", b - a)
    a, b = (round(t * FS) for t in SOLO_FAR_S)
    far[a:b] = _speech("talker_b", b - a)
    both = round(7.5 * FS)
    near[both:] = _speech("talker_a", n - both)
    far[both:] = _speech("talker_b", n - both)[::-1].copy()
    crop = slice(0, n)
    near_img = rooms.source_images(room, 0, near, crop)
    far_img = rooms.source_images(room, 1, far, crop)
    rng = np.random.default_rng(seed)
    sensor = 1e-3 * rng.standard_normal((n_mics, n))
    return near_img + far_img + sensor, near_img[0], far_img[0]


@pytest.fixture(scope="module")
def two_talkers():
    """The two-talker take on the 8 cm pair."""
    return _two_talker_take(2, SPACING_M, 7)


def test_gcc_phat_finds_a_pure_delay():
    # Knapp & Carter 1976: for one source and a pure delay the PHAT-weighted correlation
    # peaks at that delay. White noise bursts, microphone 1 delayed by 3.3 samples (fractional
    # delay applied in the frequency domain).
    rng = np.random.default_rng(1)
    n = 6 * FS
    x = rng.standard_normal(n) * np.repeat(rng.random(n // 800) > 0.5, 800)
    delay_s = 3.3 / FS
    f = np.fft.rfftfreq(n, 1 / FS)
    y = np.fft.irfft(np.fft.rfft(x) * np.exp(-2j * np.pi * f * delay_s), n)
    feats = talkers.take_features([np.stack([x, y])], FS, 2)
    found = talkers.find_sources(feats)
    assert len(found) == 1
    assert found[0].delays_s[0] == pytest.approx(delay_s, abs=talkers.DELAY_STEP_S)


def test_both_talkers_are_found_at_their_geometric_delays(two_talkers):
    # Image-source room (pyroomacoustics): each source's direct path sets its time difference,
    # tau = -(p_1 - p_0) . u / c for a far-field source; at 1-2 m from an 8 cm pair the
    # far-field error is below 2 us.
    x, _, _ = two_talkers
    feats = talkers.take_features(iter_blocks(x, 1 << 15), FS, 2)
    found = talkers.find_sources(feats)
    delays = np.array([s.delays_s[0] for s in found])
    for bearing, _ in (NEAR, FAR):
        expected = far_field_delays_s(bearing)[0]
        assert np.min(np.abs(delays - expected)) < 2.5 * talkers.DELAY_STEP_S, (
            bearing, expected, delays)
    # Bearings back from the delays (least squares on the linear array).
    bearings = sorted(s.bearing_deg(SPACING_M) for s in found if s.share > 0.15)
    assert bearings[0] == pytest.approx(NEAR[0], abs=10)
    assert bearings[-1] == pytest.approx(FAR[0], abs=10)


def test_the_default_keeps_the_most_direct_voice(two_talkers):
    # The nearer talker's direct sound dominates its reverberation more (direct-to-reverberant
    # ratio falls with distance: a fact of room acoustics), so its frames are more coherent.
    x, _, _ = two_talkers
    tm, prior = talker_prior(Settings(), FS, 2, iter_blocks(x, 1 << 15))
    assert tm.chosen_by == "direct"
    wanted = tm.sources[tm.wanted]
    assert wanted.delays_s[0] == pytest.approx(far_field_delays_s(NEAR[0])[0],
                                               abs=2.5 * talkers.DELAY_STEP_S)
    assert prior is not None and tm.competing


@pytest.mark.parametrize("keep", ["near", "far"])
def test_the_output_follows_the_marked_talker(two_talkers, tmp_path, keep):
    # Roles swapped on the same take: marking the other talker's solo stretch must make the
    # output follow that talker. Checked where both speak at once, by SI-SDR against each
    # talker's image at the reference microphone.
    x, near, far = two_talkers
    take = tmp_path / "take.wav"
    soundfile.write(take, x.T, FS, subtype="FLOAT")
    region = SOLO_NEAR_S if keep == "near" else SOLO_FAR_S
    out = tmp_path / f"{keep}.wav"
    argv = ["process", str(take), "-o", str(out), "--subtype", "FLOAT", "--json",
            "--talker-region", f"{region[0]:g}:{region[1]:g}"]
    assert cli_main(argv) == 0
    y, _ = soundfile.read(out)
    both = slice(round(8 * FS), None)
    to_near = metrics.si_sdr_db(y[both], near[both])
    to_far = metrics.si_sdr_db(y[both], far[both])
    unprocessed = metrics.si_sdr_db(x[0, both], near[both]) - metrics.si_sdr_db(
        x[0, both], far[both])
    if keep == "near":
        assert to_near - to_far > unprocessed + 3.0
    else:
        assert to_far - to_near > -unprocessed + 3.0


def test_a_bearing_chooses_the_far_talker(two_talkers, capsys):
    # The default keeps the near voice; a bearing towards the far one overrides it.
    x, _, _ = two_talkers
    settings = Settings(target_deg=FAR[0], mic_spacing_m=SPACING_M)
    tm, _ = talker_prior(settings, FS, 2, iter_blocks(x, 1 << 15))
    assert tm.chosen_by == "bearing"
    assert tm.sources[tm.wanted].bearing_deg(SPACING_M) == pytest.approx(FAR[0], abs=10)


def test_the_summary_reports_the_choice(two_talkers, tmp_path, capsys):
    x, _, _ = two_talkers
    take = tmp_path / "take.wav"
    soundfile.write(take, x.T, FS, subtype="FLOAT")
    assert cli_main(["process", str(take), "-o", str(tmp_path / "o.wav"), "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert result["talkers"]["chosen_by"] == "direct"
    assert sum(s["wanted"] for s in result["talkers"]["sources"]) == 1
    assert len(result["talkers"]["sources"]) >= 2
    assert "learned as noise" in result["talker_summary"]


def test_ignoring_other_voices_is_todays_processing(two_talkers, tmp_path):
    # --other-voices ignore must give exactly what the engine gives without the analysis.
    from liftmag.engine import process_array

    x, _, _ = two_talkers
    take = tmp_path / "take.wav"
    soundfile.write(take, x.T, FS, subtype="FLOAT")
    out = tmp_path / "o.wav"
    argv = ["process", str(take), "-o", str(out), "--subtype", "FLOAT", "--other-voices",
            "ignore"]
    assert cli_main(argv) == 0
    y, _ = soundfile.read(out)
    x32 = soundfile.read(take)[0].T
    ref = process_array(x32, FS, Settings(), find_talkers=False)[0]
    np.testing.assert_allclose(y, ref.astype(np.float32), atol=1e-6)


def test_one_voice_gives_no_spatial_prior():
    # A single talker in a room with only sensor noise: one source, nothing to learn as noise,
    # so the engine runs exactly as without the analysis.
    n = 8 * FS
    pos = rooms.ARRAY_CENTRE_M[:, None] + np.outer([1.0, 0.0, 0.0],
                                                    np.array([-0.5, 0.5]) * SPACING_M)
    room = rooms.build_room([rooms.position_at(*NEAR)], pos, FS)
    dry = np.zeros(n)
    dry[FS:] = _speech("talker_a", n - FS)
    x = rooms.source_images(room, 0, dry, slice(0, n))
    x += 1e-3 * np.random.default_rng(3).standard_normal(x.shape)
    tm, prior = talker_prior(Settings(), FS, 2, iter_blocks(x, 1 << 15))
    assert len(tm.sources) == 1 and prior is None


def test_a_talker_region_without_speech_is_refused(tmp_path, capsys):
    rng = np.random.default_rng(0)
    x = 1e-3 * rng.standard_normal((2, 5 * FS))
    take = tmp_path / "quiet.wav"
    soundfile.write(take, x.T, FS, subtype="FLOAT")
    status = cli_main(["process", str(take), "-o", str(tmp_path / "o.wav"),
                       "--talker-region", "1:2"])
    assert status == 2
    err = capsys.readouterr().err
    assert "talker region" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "o.wav").exists()


def test_speed_of_sound_agrees_with_the_room_simulator():
    # The test's delays and the simulated rooms use the same c.
    assert pra.constants.get("c") == pytest.approx(C_M_S, abs=0.5)


def test_features_do_not_depend_on_how_the_take_is_read(two_talkers):
    # A streaming pass must see the same frames whatever the block size (a file is read in
    # blocks, an array in one piece); only rounding may differ (batched FFTs and products).
    x, _, _ = two_talkers
    whole = talkers.take_features([x], FS, 2)
    pieces = talkers.take_features(iter_blocks(x, 777), FS, 2)
    assert whole.delays_s.shape == pieces.delays_s.shape
    np.testing.assert_allclose(whole.delays_s, pieces.delays_s, rtol=0, atol=1e-12)
    np.testing.assert_allclose(whole.peak, pieces.peak, rtol=1e-9)


def test_frames_held_by_the_other_voice_are_its_solo_frames(two_talkers):
    # The far talker's solo stretch is the take's own "other voice, not ours" region: many of
    # its frames are marked, none of the near talker's solo stretch, and no frame beside one
    # of the near talker's frames.
    x, _, _ = two_talkers
    feats = talkers.take_features(iter_blocks(x, 1 << 15), FS, 2)
    tm = talkers.choose_wanted(talkers.find_sources(feats), feats)
    held = talkers.other_frames(tm, feats)
    in_far = (feats.times_s >= SOLO_FAR_S[0] + 0.2) & (feats.times_s < SOLO_FAR_S[1])
    in_near = (feats.times_s >= SOLO_NEAR_S[0]) & (feats.times_s < SOLO_NEAR_S[1] - 0.1)
    assert held[in_far].mean() > 0.3, held[in_far].mean()
    assert not held[in_near].any()
    prior = talkers.spatial_prior(tm, np.linspace(0, FS / 2, 257), feats)
    frame_s = prior.feature_frame_s
    k = int(np.flatnonzero(held)[0])
    weights = prior.frame_weight(np.array([(k + 0.5) * frame_s, -1.0, 1e6]))
    np.testing.assert_array_equal(weights, [0.0, 1.0, 1.0])


def test_two_voices_as_loud_as_each_other_are_left_undecided(tmp_path, capsys):
    # Two talkers at the same distance from the array (so the same direct level: the
    # inverse-square law) and the same speech level, from different bearings, both talking
    # throughout: nothing in the take says which one is wanted. The search must say so and
    # keep both as speech, which is the engine without the analysis.
    from liftmag.engine import process_array

    n = 10 * FS
    pos = rooms.ARRAY_CENTRE_M[:, None] + np.outer([1.0, 0.0, 0.0],
                                                    np.array([-0.5, 0.5]) * SPACING_M)
    room = rooms.build_room([rooms.position_at(45.0, 1.0), rooms.position_at(135.0, 1.0)],
                            pos, FS)
    a = _speech("talker_a", n)
    b = _speech("talker_b", n)
    b *= np.std(a) / np.std(b)
    x = (rooms.source_images(room, 0, a, slice(0, n))
         + rooms.source_images(room, 1, b, slice(0, n)))
    x += 1e-3 * np.random.default_rng(5).standard_normal(x.shape)
    tm, prior = talker_prior(Settings(), FS, 2, iter_blocks(x, 1 << 15))
    assert len(tm.rivals) >= 1, tm
    assert tm.chosen_by == "undecided" and tm.removed == () and prior is None
    assert "no way to tell" in tm.describe(SPACING_M)
    np.testing.assert_array_equal(process_array(x, FS), process_array(x, FS, find_talkers=False))
    take = tmp_path / "take.wav"
    soundfile.write(take, x.T, FS, subtype="FLOAT")
    assert cli_main(["process", str(take), "-o", str(tmp_path / "o.wav"), "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert result["talkers"]["chosen_by"] == "undecided"
    assert not any(s["learned_as_noise"] or s["wanted"] for s in result["talkers"]["sources"])


def test_both_talkers_are_found_with_four_microphones():
    # Four microphones 5 cm apart in the same image-source room: each frame's delay vector has
    # three pairs, each with its own error, and both talkers must still be found at their
    # far-field time differences tau_m = -m d cos(theta) / c (pyroomacoustics geometry).
    spacing_m = 0.05
    x, _, _ = _two_talker_take(4, spacing_m, 11)
    feats = talkers.take_features(iter_blocks(x, 1 << 15), FS, 4)
    found = talkers.find_sources(feats)
    radius = 2.5 * talkers.kernel_width_s(3)
    for bearing, _ in (NEAR, FAR):
        expected = far_field_delays_s(bearing, 4, spacing_m)
        dist = [np.linalg.norm(np.asarray(s.delays_s) - expected) for s in found]
        assert min(dist) < radius, (bearing, expected, [s.delays_s for s in found])
    tm = talkers.choose_wanted(found, feats)
    assert tm.chosen_by == "direct"
    assert np.linalg.norm(np.asarray(tm.sources[tm.wanted].delays_s)
                          - far_field_delays_s(NEAR[0], 4, spacing_m)) < radius


def test_the_search_does_not_depend_on_how_the_take_is_read(two_talkers):
    # The frames another voice holds are found on the take's own time axis, not per block: a
    # file read in blocks of any size must give the same output (up to rounding).
    from liftmag.engine import process_array

    x, _, _ = two_talkers
    whole = process_array(x, FS, chunk_samples=1 << 16)
    pieces = process_array(x, FS, chunk_samples=4099)
    np.testing.assert_allclose(pieces, whole, rtol=0, atol=1e-9 * np.max(np.abs(whole)))


def test_process_draws_the_talker_map_when_asked(two_talkers, tmp_path, capsys):
    # --talker-map writes a real image (PNG signature, ISO/IEC 15948) after the search; with a
    # noise region there is no search, so it says so and writes nothing; a format matplotlib
    # cannot write is refused before any work.
    x, _, _ = two_talkers
    take = tmp_path / "take.wav"
    soundfile.write(take, x.T, FS, subtype="FLOAT")
    figure = tmp_path / "who.png"
    argv = ["process", str(take), "-o", str(tmp_path / "o.wav"), "--talker-map", str(figure)]
    assert cli_main(argv) == 0
    assert figure.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    capsys.readouterr()
    again = ["process", str(take), "-o", str(tmp_path / "o2.wav"), "--talker-map", str(figure)]
    assert cli_main(again) == 2  # the map exists: refused without --force, before any work
    assert str(figure) in capsys.readouterr().err and not (tmp_path / "o2.wav").exists()
    other = tmp_path / "none.png"
    assert cli_main(["process", str(take), "-o", str(tmp_path / "r.wav"), "--noise-region",
                     "0:0.4", "--talker-map", str(other)]) == 0
    assert "no talker map written" in capsys.readouterr().err and not other.exists()
    status = cli_main(["process", str(take), "-o", str(tmp_path / "b.wav"), "--talker-map",
                       str(tmp_path / "map.bmp")])
    assert status == 2 and not (tmp_path / "b.wav").exists()
