"""Checks of the image-source room scenes (rooms.py, pyroomacoustics) against physics.

Each check names its reference. Scenes are rendered once per module (about 3 s in all).
"""

from __future__ import annotations

import numpy as np
import pytest
import rooms
import scipy.signal

FS = 16000
C = 343.0  # m/s at 20 degC (handbook value, recalled from memory; pyroomacoustics uses it too)
SEED = 2


@pytest.fixture(scope="module")
def scene_set() -> dict:
    return {
        (kind, m): rooms.make_room_scene(kind, m, 0.0, SEED)
        for kind in rooms.KINDS
        for m in (2, 4)
    }


def _active_snr_db(scene) -> float:
    # The documented SNR definition, re-implemented: 20 ms frames of the reference target
    # image within 40 dB of the loudest frame (the last partial frame is dropped here; it is
    # silent in these scenes).
    s, v = scene.target_image, scene.noise_image[scene.reference_mic]
    frame = FS // 50
    n = s.size // frame * frame
    e = (s[:n] ** 2).reshape(-1, frame).mean(axis=1)
    keep = np.repeat(e >= e.max() * 1e-4, frame)
    return 10 * np.log10(np.sum(s[:n][keep] ** 2) / np.sum(v[:n][keep] ** 2))


# Broadband directional parts only: GCC-PHAT (Knapp & Carter 1976) is derived for broadband
# signals; the hum and the fan's blade-pass tones make the correlation periodic.
_BROADBAND = {
    "competing-talker": ("talker_b", "air-handler"),
    "two-interferers-diffuse": ("interferer-left", "interferer-right"),
    "directional-diffuse": ("directional",),
}


@pytest.mark.parametrize("n_mics", [2, 4])
@pytest.mark.parametrize("kind", sorted(_BROADBAND))
def test_directional_delays_match_geometry_in_the_room(scene_set, kind, n_mics):
    # Direct-path delay between the end microphones = d cos(theta) / c (far-field geometry),
    # found by GCC-PHAT on each source's reverberant image; within one sample, as the
    # phase transform is known to keep the direct-path peak in moderate reverberation.
    scene = scene_set[(kind, n_mics)]
    pos = scene.mic_positions_m
    seg = slice(2 * FS, 6 * FS)
    for name in _BROADBAND[kind]:
        v = np.asarray(scene.metadata["sources_m"][name]) - rooms.ARRAY_CENTRE_M
        cos_theta = v[0] / np.linalg.norm(v)
        expected_s = -(pos[-1] - pos[0]) * cos_theta / C
        part = scene.noise_parts[name]
        lag_s = rooms.gcc_phat_lag_s(part[0, seg], part[-1, seg], FS, 0.001, upsample=16)
        assert abs(lag_s - expected_s) * FS < 1.0, name
    # The talker at broadside reaches both end microphones together.
    t = scene.target_images
    lag_s = rooms.gcc_phat_lag_s(t[0, seg], t[-1, seg], FS, 0.001, upsample=16)
    assert abs(lag_s) * FS < 1.0


@pytest.mark.parametrize("n_mics", [2, 4])
@pytest.mark.parametrize("kind", ["two-interferers-diffuse", "directional-diffuse"])
def test_diffuse_part_coherence_follows_cook_sinc(scene_set, kind, n_mics):
    # sinc(2 pi f d / c) between the end microphones (Cook et al. 1955). Tolerance as in
    # test_scenes: sigma <= 1/sqrt(2K) for K non-overlapping frames (K = 376 here); RMS error
    # below 1.3 sigma, every bin within 5 sigma.
    scene = scene_set[(kind, n_mics)]
    pos = scene.mic_positions_m
    part = scene.noise_parts["diffuse"]
    f, gamma, k = rooms.complex_coherence(part[0], part[-1], FS)
    sigma = 1 / np.sqrt(2 * k)
    err = (gamma.real - np.sinc(2 * f * (pos[-1] - pos[0]) / C))[1:]
    assert np.sqrt(np.mean(err**2)) < 1.3 * sigma
    assert np.max(np.abs(err)) < 5 * sigma


def test_sensor_kind_is_uncorrelated_and_even(scene_set):
    # Self-noise of separate channels is independent (fact of the trade) and equally loud.
    scene = scene_set[("sensor", 4)]
    noise = scene.noise_image
    _f, gamma, k = rooms.complex_coherence(noise[0], noise[1], FS)
    assert np.max(np.abs(gamma[1:])) < 5 / np.sqrt(k)
    assert np.allclose(np.mean(noise**2, axis=1), np.mean(noise[0] ** 2), rtol=0.03)


def test_hum_reaches_the_microphones_on_50_hz_lines(scene_set):
    # A room is linear and time-invariant: it changes the hum's harmonic amplitudes and
    # phases, never its frequencies (European mains at 50 Hz, fact of the trade).
    hum = scene_set[("hum-fan", 2)].noise_parts["hum"][0]
    f, psd = scipy.signal.periodogram(hum, fs=FS, window="hann")
    peaks, _ = scipy.signal.find_peaks(psd, height=psd.max() * 1e-3)
    assert peaks.size >= 5
    assert np.allclose(f[peaks] / 50.0, np.round(f[peaks] / 50.0), atol=0.01)


def test_room_decay_is_about_the_design_rt60():
    # Schroeder backward integration (1965), T20 range of ISO 3382-1, on one image-source
    # RIR. Absorption comes from Sabine's formula for 0.3 s; Sabine is a diffuse-field
    # approximation and image-source shoeboxes decay somewhat slower (0.35 s measured here),
    # so accept 0.25 to 0.45 s; a wrong absorption (e.g. a bare or a dead room) falls outside.
    mics = rooms.ARRAY_CENTRE_M[:, None] + np.outer([1.0, 0.0, 0.0], rooms.array_positions_m(2))
    room = rooms.build_room([rooms.position_at(60.0, 2.0)], mics, FS)
    h = np.asarray(room.rir[0][0])
    edc_db = 10 * np.log10(np.cumsum(h[::-1] ** 2)[::-1] / np.sum(h**2))
    i5, i25 = np.argmax(edc_db <= -5), np.argmax(edc_db <= -25)
    slope_db_s = np.polyfit(np.arange(i5, i25) / FS, edc_db[i5:i25], 1)[0]
    assert 0.25 < -60 / slope_db_s < 0.45


@pytest.mark.parametrize("kind", rooms.KINDS)
def test_scene_contract_and_snr(scene_set, kind):
    for n_mics in (2, 4):
        scene = scene_set[(kind, n_mics)]
        assert scene.mixture.shape[0] == n_mics
        assert np.array_equal(scene.mixture, scene.target_images + scene.noise_image)
        np.testing.assert_allclose(sum(scene.noise_parts.values()), scene.noise_image,
                                   atol=1e-12)
        # Requested 0 dB over speech-active samples at the reference microphone, within 0.2 dB.
        assert _active_snr_db(scene) == pytest.approx(0.0, abs=0.2)
        # Noise-only lead-in: the talker is silent there (60 dB below its speech).
        lead = scene.target_images[:, scene.noise_only]
        rest = scene.target_images[:, scene.noise_only_range[1] :]
        assert np.sum(lead**2) < 1e-6 * np.sum(rest**2)


@pytest.mark.parametrize("snr_db", [-5.0, 10.0])
def test_requested_snr_other_levels(snr_db):
    scene = rooms.make_room_scene("competing-talker", 2, snr_db, SEED)
    assert _active_snr_db(scene) == pytest.approx(snr_db, abs=0.2)


def test_seeds_reproduce_and_differ(scene_set):
    again = rooms.make_room_scene("two-interferers-diffuse", 2, 0.0, SEED)
    assert np.array_equal(again.mixture, scene_set[("two-interferers-diffuse", 2)].mixture)
    other = rooms.make_room_scene("two-interferers-diffuse", 2, 0.0, SEED + 1)
    assert not np.allclose(other.noise_image, again.noise_image)


def test_room_tone_continues_the_same_sources(scene_set):
    take = scene_set[("directional-diffuse", 4)]
    with_tone = rooms.make_room_scene("directional-diffuse", 4, 0.0, SEED, room_tone_s=10.0)
    # The take does not depend on whether room tone follows it.
    np.testing.assert_allclose(with_tone.mixture, take.mixture, rtol=0, atol=1e-12)
    tone = with_tone.room_tone
    assert tone.shape == (4, 10 * FS)
    # Stationary sources: the room tone has the take's noise level at every mic (within
    # 0.5 dB; 10 s of Gaussian noise fluctuates far less) and is not a copy of it.
    take_db = 10 * np.log10(np.mean(take.noise_image**2, axis=1))
    tone_db = 10 * np.log10(np.mean(tone**2, axis=1))
    assert np.allclose(tone_db, take_db, atol=0.5)
    n = tone.shape[1]
    corr = np.corrcoef(tone[0], take.noise_image[0, :n])[0, 1]
    assert abs(corr) < 0.05


def test_competing_talker_keeps_talking_in_room_tone():
    # talker_b talks throughout: its speech fills the room tone too (level varies, not gone).
    scene = rooms.make_room_scene("competing-talker", 2, 0.0, SEED, room_tone_s=30.0)
    tone = scene.room_tone[0]
    frame = FS // 10
    e = (tone[: tone.size // frame * frame] ** 2).reshape(-1, frame).mean(axis=1)
    assert 10 * np.log10(np.percentile(e, 90) / np.percentile(e, 10)) > 6.0


def test_bad_arguments_are_refused():
    with pytest.raises(ValueError):
        rooms.make_room_scene("quiet", 2, 0.0, 0)
    with pytest.raises(ValueError):
        rooms.make_room_scene("sensor", 3, 0.0, 0)
    with pytest.raises(ValueError):
        rooms.make_room_scene("sensor", 2, 0.0, 0, fs_hz=48000)
