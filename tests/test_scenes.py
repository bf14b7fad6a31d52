"""Checks of liftmag.scenes against physics and signal-processing references.

Each check names its reference. Measurement helpers (GCC-PHAT, coherence) live in rooms.py.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal
from rooms import complex_coherence, gcc_phat_lag_s

from liftmag import scenes

FS = 16000
C = 343.0  # m/s, dry air at 20 degC (handbook value, recalled from memory)
PAIR_M = np.array([-0.04, 0.04])
ULA4_M = np.array([-0.075, -0.025, 0.025, 0.075])


@pytest.fixture(scope="module")
def demo() -> scenes.Scene:
    return scenes.demo_scene(seed=3)


def _active_snr_db(scene: scenes.Scene) -> float:
    # Independent re-implementation of the documented definition: 20 ms frames of the
    # reference target image within 40 dB of the loudest frame.
    s = scene.target_image
    v = scene.noise_image[scene.reference_mic]
    frame = FS // 50
    n = s.size // frame * frame
    e = (s[:n] ** 2).reshape(-1, frame).mean(axis=1)
    keep = np.repeat(e >= e.max() * 1e-4, frame)
    tail_s, tail_v = s[n:], v[n:]
    tail_active = tail_s.size and np.mean(tail_s**2) >= e.max() * 1e-4
    num = np.sum(s[:n][keep] ** 2) + (np.sum(tail_s**2) if tail_active else 0.0)
    den = np.sum(v[:n][keep] ** 2) + (np.sum(tail_v**2) if tail_active else 0.0)
    return 10 * np.log10(num / den)


# ----------------------------------------------------------------------------- propagation


@pytest.mark.parametrize("positions_m", [PAIR_M, ULA4_M], ids=["pair-8cm", "ula4-5cm"])
@pytest.mark.parametrize("bearing_deg", [0.0, 25.0, 60.0, 90.0, 125.0, 160.0, 180.0])
def test_far_field_delay_matches_geometry_by_gcc_phat(positions_m, bearing_deg):
    # Far-field plane wave: the end microphone leads the reference by d cos(theta) / c
    # (textbook array geometry); delay measured by GCC-PHAT (Knapp & Carter 1976).
    # Brief asks for one sample; free-field fractional delays are far better than that, so
    # hold them to 0.1 sample (GCC-PHAT here resolves 1/32 sample).
    src = scenes.coloured_noise(FS, FS, 11, tilt_db_per_octave=-3.0)
    img = scenes.source_image(src, FS, positions_m, bearing_deg)
    lag_s = gcc_phat_lag_s(img[0], img[-1], FS, max_lag_s=0.001)
    d_m = positions_m[-1] - positions_m[0]
    expected_s = -d_m * np.cos(np.deg2rad(bearing_deg)) / C
    assert abs(lag_s - expected_s) * FS < 0.1


def test_near_field_delay_uses_exact_path_lengths():
    # Point source 0.8 m from a 1 m pair: the delay is the path-length difference over c
    # (spherical wave), which differs from the far-field d cos(theta) / c by several samples.
    pos_m = np.array([0.0, 1.0])
    bearing_deg, r_m = 60.0, 0.8
    src = scenes.coloured_noise(FS, FS, 12, tilt_db_per_octave=-3.0)
    img = scenes.source_image(src, FS, pos_m, bearing_deg, distance_m=r_m)
    lag_s = gcc_phat_lag_s(img[0], img[-1], FS, max_lag_s=0.004)
    xy = r_m * np.array([np.cos(np.deg2rad(bearing_deg)), np.sin(np.deg2rad(bearing_deg))])
    paths_m = np.hypot(xy[0] - pos_m, xy[1])
    exact_s = (paths_m[1] - paths_m[0]) / C
    far_s = -(pos_m[1] - pos_m[0]) * np.cos(np.deg2rad(bearing_deg)) / C
    assert abs(far_s - exact_s) * FS > 2.0  # the check can tell the two models apart
    assert abs(lag_s - exact_s) * FS < 0.1
    # Spherical spreading: amplitude ratio r_0 / r_1 between the two microphones.
    ratio = np.std(img[1]) / np.std(img[0])
    assert ratio == pytest.approx(paths_m[0] / paths_m[1], rel=0.01)


def test_fractional_delay_response_is_flat_to_nine_tenths_nyquist():
    # Windowed-sinc fractional delay (Laakso et al. 1996): the impulse response of a
    # 0.37-sample delay, compared with the ideal exp(-j 2 pi f tau) up to 0.9 Nyquist.
    tau_s = 0.37 / FS
    irs, offset = scenes.impulse_responses(FS, [0.0, tau_s * C], 0.0)
    # Mic 1 lies tau*c further along +x: a source at 0 deg reaches it tau earlier.
    h = np.fft.rfft(irs[1], 8192)
    f = np.fft.rfftfreq(8192, 1 / FS)
    ideal = np.exp(-2j * np.pi * f * (offset / FS - tau_s))
    band = f <= 0.9 * FS / 2
    assert np.max(np.abs(h[band] - ideal[band])) < 1e-3
    assert np.array_equal(irs[0][offset], 1.0)  # integer delay: an exact unit impulse


def test_images_agree_with_the_package_steering_vectors():
    # The scenes must follow the project's own RTF convention (liftmag.geometry):
    # cross-spectrum phase of mic m against the reference = angle of d_m(f).
    geometry = pytest.importorskip("liftmag.geometry")
    src = scenes.coloured_noise(4 * FS, FS, 13, tilt_db_per_octave=0.0)
    img = scenes.source_image(src, FS, ULA4_M, 35.0)
    f, s0m = scipy.signal.csd(img[0][None, :], img, fs=FS, nperseg=512)  # conj(X0) Xm
    d = geometry.steering_vectors(ULA4_M, 35.0, f)  # (F, M)
    band = (f > 100) & (f < 7000)
    err = np.angle(s0m[:, band].T * np.conj(d[band]))
    assert np.max(np.abs(err)) < 0.01  # rad


# ----------------------------------------------------------------------------- reverberation


@pytest.mark.parametrize("rt60_s", [0.2, 0.5, 1.0])
def test_tail_decay_matches_rt60_by_schroeder_integration(rt60_s):
    # Schroeder backward integration (Schroeder, J. Acoust. Soc. Am. 37, 409, 1965) of the
    # impulse response; slope fitted from -5 to -25 dB (the T20 range of ISO 3382-1) and
    # extrapolated to 60 dB. Tail-dominated response (no early reflections, DRR -5 dB).
    # 5 % tolerance: one noise realisation fluctuates; measured errors were below 2 %.
    reverb = scenes.Reverb(rt60_s=rt60_s, drr_db=-5.0, n_early=0)
    irs, _ = scenes.impulse_responses(FS, PAIR_M, 60.0, 2.0, reverb, rng=5)
    h = irs[0]
    edc_db = 10 * np.log10(np.cumsum(h[::-1] ** 2)[::-1] / np.sum(h**2))
    i5, i25 = np.argmax(edc_db <= -5), np.argmax(edc_db <= -25)
    slope_db_s = np.polyfit(np.arange(i5, i25) / FS, edc_db[i5:i25], 1)[0]
    assert -60 / slope_db_s == pytest.approx(rt60_s, rel=0.05)


@pytest.mark.parametrize("drr_db", [-3.0, 3.0, 12.0])
def test_direct_to_reverberant_ratio_is_as_requested(drr_db):
    # DRR = direct-sound energy / reverberant energy at the reference microphone (definition).
    # The reference direct sound is a unit impulse (energy 1); the rest is reverberation.
    # 0.1 dB: the windowed-sinc reflections carry a little less than unit energy each.
    reverb = scenes.Reverb(rt60_s=0.3, drr_db=drr_db)
    irs, offset = scenes.impulse_responses(FS, PAIR_M, 70.0, 1.5, reverb, rng=6)
    h = irs[0]
    assert h[offset] == pytest.approx(1.0, abs=1e-3)
    reverberant = np.sum(h**2) - h[offset] ** 2
    assert 10 * np.log10(1.0 / reverberant) == pytest.approx(drr_db, abs=0.1)


# ----------------------------------------------------------------------------- noise fields


@pytest.mark.parametrize("positions_m", [PAIR_M, ULA4_M], ids=["pair-8cm", "ula4-5cm"])
def test_diffuse_noise_coherence_follows_cook_sinc(positions_m):
    # Spherically isotropic noise: Gamma(f) = sinc(2 pi f d / c) (Cook et al. 1955).
    # Tolerance: with K independent frames the real part of the sample coherence has a
    # standard deviation of at most 1/sqrt(2K) (its value when the true coherence is 0, where
    # Re S_xy is a mean of K products of independent Gaussians; it shrinks as |Gamma| -> 1).
    # 60 s, 512-point non-overlapping Hann frames: K = 1875, sigma <= 0.016. We require the
    # RMS error over bins below 1.3 sigma and every bin within 5 sigma; the sinc curve itself
    # lies 16-28 sigma (RMS) away from zero coherence, so an uncorrelated field would fail.
    noise = scenes.diffuse_noise(60 * FS, FS, positions_m, rng=21)
    for j in range(1, positions_m.size):
        f, gamma, k = complex_coherence(noise[0], noise[j], FS)
        sigma = 1 / np.sqrt(2 * k)
        model = np.sinc(2 * f * abs(positions_m[j] - positions_m[0]) / C)
        err = (gamma.real - model)[1:]  # DC is a single real bin
        assert np.sqrt(np.mean(err**2)) < 1.3 * sigma
        assert np.max(np.abs(err)) < 5 * sigma
        assert np.max(np.abs(gamma.imag[1:])) < 5 * sigma  # a diffuse field has no direction
        assert np.sqrt(np.mean(model[1:] ** 2)) > 10 * sigma
    # Homogeneous field: every microphone gets the same level (sampling error ~1/sqrt(N)).
    levels = np.mean(noise**2, axis=1)
    assert np.allclose(levels, 1.0, rtol=0.03)


def test_sensor_noise_is_uncorrelated_between_channels():
    # Self-noise of separate capsules and preamplifiers is independent (fact of the trade):
    # sample coherence within 5 sigma of 0 (sigma = 1/sqrt(2K), as above).
    noise = scenes.sensor_noise(30 * FS, 2, rng=22)
    _f, gamma, k = complex_coherence(noise[0], noise[1], FS)
    assert np.max(np.abs(gamma[1:])) < 5 * np.sqrt(2) / np.sqrt(2 * k)
    assert np.allclose(np.mean(noise**2, axis=1), 1.0, rtol=0.02)


@pytest.mark.parametrize("tilt_db_per_octave", [0.0, -3.0, -6.0])
def test_coloured_noise_spectral_slope(tilt_db_per_octave):
    # Pink noise falls 3 dB per octave, brown 6 (definition); Welch PSD (scipy.signal.welch),
    # least-squares slope over 200 Hz - 6 kHz against log2 f.
    x = scenes.coloured_noise(20 * FS, FS, 23, tilt_db_per_octave=tilt_db_per_octave)
    f, psd = scipy.signal.welch(x, fs=FS, nperseg=1024)
    band = (f >= 200) & (f <= 6000)
    slope = np.polyfit(np.log2(f[band]), 10 * np.log10(psd[band]), 1)[0]
    assert slope == pytest.approx(tilt_db_per_octave, abs=0.2)
    assert np.mean(x**2) == pytest.approx(1.0, rel=0.05)


def test_mains_hum_lines_sit_on_multiples_of_50_hz():
    # European mains frequency 50 Hz (fact of the trade); lines at 50 k Hz only.
    hum = scenes.mains_hum(10 * FS, FS, rng=24)
    f, psd = scipy.signal.periodogram(hum, fs=FS, window="hann")
    peaks, _ = scipy.signal.find_peaks(psd, height=psd.max() * 1e-4)
    assert peaks.size == 8
    assert np.allclose(f[peaks], 50.0 * np.arange(1, 9), atol=0.2)
    assert np.mean(hum**2) == pytest.approx(1.0, rel=1e-3)


def test_fan_noise_blade_pass_tones_and_low_pass_floor():
    # Blade-pass frequency = blades x rev/s (fact of the trade): 5 blades at 1440 rpm -> 120 Hz.
    x = scenes.fan_noise(20 * FS, FS, rng=25, blade_pass_hz=5 * 1440 / 60, n_harmonics=3,
                         tones_db=0.0, lowpass_hz=800.0)
    f, psd = scipy.signal.welch(x, fs=FS, nperseg=8192)
    df = f[1] - f[0]
    # tones_db = 0: tones and broadband share the unit power equally; harmonic k carries
    # (1/k^2) / sum(1/j^2) of the tonal half. Tone power = PSD integrated over +-8 Hz minus the
    # broadband floor (median of the neighbouring 20-50 Hz); within 1 dB.
    weights = 1 / np.arange(1, 4) ** 2
    for k in (1, 2, 3):
        near = (f > 120 * k - 8) & (f < 120 * k + 8)
        around = (f > 120 * k + 20) & (f < 120 * k + 50)
        tone = (np.sum(psd[near]) - np.median(psd[around]) * near.sum()) * df
        expected = 0.5 * weights[k - 1] / weights.sum()
        assert 10 * np.log10(tone / expected) == pytest.approx(0.0, abs=1.0)
    # 2nd-order Butterworth low-pass at 800 Hz: |H|^2 = 1 / (1 + (f / fc)^4), so from 1.6 to
    # 3.2 kHz the floor drops 10 log10(257 / 17) = 11.8 dB (analogue prototype; the bilinear
    # transform steepens it slightly at these frequencies: 2 dB allowance).
    p1 = np.mean(psd[(f > 1550) & (f < 1650)])
    p2 = np.mean(psd[(f > 3150) & (f < 3250)])
    assert 10 * np.log10(p1 / p2) == pytest.approx(10 * np.log10(257 / 17), abs=2.0)
    assert np.mean(x**2) == pytest.approx(1.0, rel=0.1)


# ----------------------------------------------------------------------------- scene contract


def test_demo_scene_contract(demo):
    assert demo.n_mics == 2 and demo.fs_hz == FS
    assert 10.0 < demo.duration_s < 13.0
    assert np.array_equal(demo.mixture, demo.target_images + demo.noise_image)  # exactly
    assert np.array_equal(demo.target_image, demo.target_images[demo.reference_mic])
    assert demo.noise_only_range == (0, round(1.5 * FS))
    np.testing.assert_allclose(sum(demo.noise_parts.values()), demo.noise_image, atol=1e-12)
    with pytest.raises(ValueError):
        demo.mixture[0, 0] = 1.0  # read-only: the identity above cannot be broken in place


def test_demo_scene_snr_is_met_over_speech(demo):
    # Requested 0 dB at the reference microphone over speech-active samples: within 0.2 dB.
    assert _active_snr_db(demo) == pytest.approx(0.0, abs=0.2)


@pytest.mark.parametrize("snr_db", [-5.0, 10.0])
def test_requested_snr_is_met(snr_db):
    scene = scenes.demo_scene(seed=1, snr_db=snr_db)
    assert _active_snr_db(scene) == pytest.approx(snr_db, abs=0.2)


def test_lead_in_is_noise_only(demo):
    lead = demo.target_images[:, demo.noise_only]
    speech = demo.target_images[:, demo.noise_only_range[1] :]
    assert 10 * np.log10(np.sum(lead**2) / np.sum(speech**2) + 1e-300) < -100
    assert np.mean(demo.noise_image[0, demo.noise_only] ** 2) > 0


def test_seeds_reproduce_and_differ(demo):
    again = scenes.demo_scene(seed=3)
    assert np.array_equal(again.mixture, demo.mixture)
    other = scenes.demo_scene(seed=4)
    assert not np.allclose(other.noise_image, demo.noise_image)


def test_room_tone_continues_the_take_without_changing_it(demo):
    with_tone = scenes.demo_scene(seed=3, room_tone_s=5.0)
    # The take is the same whether or not room tone follows (generators are prefix-stable).
    np.testing.assert_allclose(with_tone.mixture, demo.mixture, rtol=0, atol=1e-12)
    assert with_tone.room_tone.shape == (2, 5 * FS)
    # Continuity: the seam between the take's noise and the room tone is no bigger a step
    # than the noise makes elsewhere (it is one stream, not a splice).
    joined = np.concatenate([with_tone.noise_image, with_tone.room_tone], axis=1)
    steps = np.abs(np.diff(joined, axis=1))
    seam = steps[:, demo.mixture.shape[1] - 1]
    assert np.all(seam <= np.percentile(steps, 99.9, axis=1))
    # Same sources at the same levels: room tone level within 3 dB of the lead-in's.
    lead_db = 10 * np.log10(np.mean(demo.noise_image[:, demo.noise_only] ** 2))
    tone_db = 10 * np.log10(np.mean(with_tone.room_tone**2))
    assert abs(tone_db - lead_db) < 3.0


def test_packaged_speech_is_as_documented():
    # dsp/liftmag/data/README.md: mono 16 kHz, peak -3 dBFS, talker_a ~10.5 s, talker_b ~46 s.
    for name, seconds in (("talker_a", 10.5), ("talker_b", 46.1)):
        x, fs = scenes.load_speech(name)
        assert fs == FS and x.ndim == 1
        assert x.size / fs == pytest.approx(seconds, abs=0.1)
        assert 20 * np.log10(np.max(np.abs(x))) == pytest.approx(-3.0, abs=0.05)
        active = scenes.speech_activity(x, fs)
        assert 0.6 < active.mean() < 0.95  # pauses exist, and speech dominates
    with pytest.raises(ValueError):
        scenes.load_speech("nobody")


def test_arguments_are_validated():
    with pytest.raises(ValueError):
        scenes.source_image(np.ones(10), FS, [0.0], 90.0)
    with pytest.raises(ValueError):
        scenes.source_image(np.ones(10), FS, [0.0, 0.0], 90.0)
    with pytest.raises(ValueError):
        scenes.Reverb(rt60_s=-1.0)
    with pytest.raises(ValueError):
        scenes.diffuse_noise(100, FS, PAIR_M, rng=None)
    with pytest.raises(ValueError):
        scenes.demo_scene(room_tone_s=-1.0)
