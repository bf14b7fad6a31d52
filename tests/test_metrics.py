"""Tests of liftmag.metrics against published definitions, handbook maths and the
open reference libraries (pystoi, pesq, pyloudnorm).

Speech material: dsp/liftmag/data/talker_a.flac (synthetic speech made by this project,
16 kHz mono; see dsp/liftmag/data/README.md).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.special import digamma

from liftmag import metrics

DATA = Path(__file__).resolve().parents[1] / "dsp" / "liftmag" / "data"


@pytest.fixture(scope="module")
def talker_a() -> tuple[np.ndarray, int]:
    x, fs = sf.read(DATA / "talker_a.flac", dtype="float64")
    return x, fs


def _white_noise_at_snr(speech: np.ndarray, snr_db: float, seed: int) -> np.ndarray:
    noise = np.random.default_rng(seed).standard_normal(speech.size)
    return noise * math.sqrt(np.mean(speech**2) / np.mean(noise**2) / 10 ** (snr_db / 10))


# --------------------------------------------------------------------------- SI-SDR


def test_si_sdr_worked_example_by_hand():
    # Le Roux et al., "SDR - half-baked or well done?", ICASSP 2019: definition
    # alpha = <s_hat, s>/||s||^2, target = alpha s,
    # SI-SDR = 10 log10(|target|^2 / |s_hat - target|^2).
    s = np.array([1.0, 2.0, 3.0, 4.0])
    s_hat = np.array([2.0, 3.0, 5.0, 7.0])
    # By hand: <s_hat, s> = 2 + 6 + 15 + 28 = 51, ||s||^2 = 30, alpha = 1.7;
    # target = [1.7, 3.4, 5.1, 6.8], |target|^2 = 1.7^2 * 30 = 86.7;
    # residual = [0.3, -0.4, -0.1, 0.2], |residual|^2 = 0.30; ratio = 289.
    expected_db = 10 * math.log10(86.7 / 0.30)
    assert expected_db == pytest.approx(24.6090, abs=1e-4)
    assert metrics.si_sdr_db(s_hat, s, zero_mean=False) == pytest.approx(expected_db, abs=1e-9)


def test_si_sdr_zero_mean_option_removes_offsets_first():
    # Same definition applied to the mean-removed signals (common practice in evaluation code).
    s = np.array([1.0, 2.0, 3.0, 4.0])
    s_hat = np.array([2.0, 3.0, 5.0, 7.0])
    s0, e0 = s - s.mean(), s_hat - s_hat.mean()
    alpha = (e0 @ s0) / (s0 @ s0)
    by_formula = 10 * math.log10(np.sum((alpha * s0) ** 2) / np.sum((e0 - alpha * s0) ** 2))
    assert metrics.si_sdr_db(s_hat, s) == pytest.approx(by_formula, abs=1e-9)
    assert metrics.si_sdr_db(s_hat + 5.0, s) == pytest.approx(by_formula, abs=1e-9)


@settings(max_examples=40, deadline=None)
@given(
    scale=st.floats(min_value=1e-3, max_value=1e3) | st.floats(min_value=-1e3, max_value=-1e-3),
    seed=st.integers(min_value=0, max_value=2**31),
)
def test_si_sdr_is_scale_invariant(scale, seed):
    # Scale invariance is the defining property in Le Roux et al. 2019.
    rng = np.random.default_rng(seed)
    s = rng.standard_normal(256)
    e = s + 0.3 * rng.standard_normal(256)
    assert metrics.si_sdr_db(scale * e, s) == pytest.approx(metrics.si_sdr_db(e, s), abs=1e-7)


def test_si_sdr_of_known_additive_noise():
    # For s_hat = s + n with n orthogonal to s, alpha = 1 and SI-SDR = 10 log10(|s|^2/|n|^2)
    # (follows from the definition).
    rng = np.random.default_rng(7)
    s = rng.standard_normal(4000)
    n = rng.standard_normal(4000)
    s0 = s - s.mean()
    n = n - n.mean()
    n -= (n @ s0) / (s0 @ s0) * s0  # exactly orthogonal to the centred reference
    n *= math.sqrt((s0 @ s0) / (n @ n) / 10.0)  # 10 dB below
    assert metrics.si_sdr_db(s + n, s) == pytest.approx(10.0, abs=1e-9)


def test_si_sdr_rejects_bad_input():
    with pytest.raises(ValueError, match="same length"):
        metrics.si_sdr_db(np.ones(3), np.ones(4))
    with pytest.raises(ValueError, match="no energy"):
        metrics.si_sdr_db(np.ones(4), np.zeros(4))


# --------------------------------------------------------------------------- STOI / PESQ


def test_stoi_and_estoi_match_pystoi_and_improve_when_cleaner(talker_a):
    # Reference implementation: pystoi (Taal et al. 2011; Jensen & Taal 2016).
    import pystoi

    s, fs = talker_a
    noisy = s + _white_noise_at_snr(s, 0.0, seed=1)
    cleaner = s + _white_noise_at_snr(s, 15.0, seed=1)
    for extended in (False, True):
        ours_noisy = metrics.stoi(s, noisy, fs, extended=extended)
        assert ours_noisy == pytest.approx(pystoi.stoi(s, noisy, fs, extended=extended))
        ours_cleaner = metrics.stoi(s, cleaner, fs, extended=extended)
        assert ours_cleaner > ours_noisy + 0.05
    assert metrics.stoi(s, s, fs) == pytest.approx(1.0, abs=1e-6)


def test_pesq_wb_improves_when_cleaner_and_handles_other_rates(talker_a):
    # Reference implementation: the pesq package (ITU-T P.862.2 wideband).
    import pesq as pesq_pkg

    s, fs = talker_a
    noisy = s + _white_noise_at_snr(s, 5.0, seed=2)
    cleaner = s + _white_noise_at_snr(s, 30.0, seed=2)
    noisy_score = metrics.pesq_wb(s, noisy, fs)
    cleaner_score = metrics.pesq_wb(s, cleaner, fs)
    assert noisy_score.reason == "" and cleaner_score.reason == ""
    assert noisy_score.mos_lqo == pytest.approx(pesq_pkg.pesq(16000, s, noisy, "wb"))
    assert float(cleaner_score) > float(noisy_score) + 0.5
    # 48 kHz input is resampled to 16 kHz first; the score stays close to the 16 kHz one.
    s48 = metrics.resample_to(s, fs, 48000)
    c48 = metrics.resample_to(cleaner, fs, 48000)
    assert float(metrics.pesq_wb(s48, c48, 48000)) == pytest.approx(float(cleaner_score), abs=0.15)


def test_pesq_wb_gives_nan_with_reason_on_silence_or_short_input():
    silence = np.zeros(32000)
    result = metrics.pesq_wb(silence, silence, 16000)
    assert math.isnan(result.mos_lqo)
    assert "silence" in result.reason
    # The pesq package raises BufferTooShortError below a quarter of a second.
    short = np.random.default_rng(3).standard_normal(1000)
    result = metrics.pesq_wb(short, short, 16000)
    assert math.isnan(result.mos_lqo)
    assert "too short" in result.reason


# --------------------------------------------------------------------------- WADA SNR


def test_wada_table_end_points_match_the_model_analytically():
    # The table is simulated (Gamma(0.4) amplitudes + Gaussian noise). Its ends must agree
    # with closed forms of G = ln E|z| - E ln|z| (handbook results):
    #   Gaussian z:   E|z| = sigma sqrt(2/pi), E ln|z| = ln sigma - (gamma_E + ln 2)/2
    #   Gamma(a) |z|: E|z| = a theta,          E ln|z| = psi(a) + ln theta
    snr_db, g = metrics.wada_lookup_table()
    g_gauss = 0.5 * math.log(2 / math.pi) + (np.euler_gamma + math.log(2)) / 2
    a = metrics.WADA_GAMMA_SHAPE
    g_gamma = math.log(a) - digamma(a)
    assert snr_db[0] == -20 and snr_db[-1] == 100
    assert g[0] == pytest.approx(g_gauss, abs=0.01)  # -20 dB: noise dominates
    assert g[-1] == pytest.approx(g_gamma, abs=0.02)  # 100 dB: speech only
    assert np.all(np.diff(g) >= 0)


@pytest.mark.parametrize("true_snr_db", [0.0, 10.0, 20.0])
def test_wada_snr_close_to_true_snr_on_speech_plus_white_noise(talker_a, true_snr_db):
    # Kim & Stern 2008 report estimates within a few dB for speech in white noise.
    # Speech: dsp/liftmag/data/talker_a.flac (synthetic); SNR = whole-file power ratio.
    s, _ = talker_a
    noisy = s + _white_noise_at_snr(s, true_snr_db, seed=int(true_snr_db) + 11)
    assert metrics.wada_snr_db(noisy) == pytest.approx(true_snr_db, abs=3.0)


def test_wada_snr_is_scale_invariant_and_refuses_silence(talker_a):
    s, _ = talker_a
    noisy = s + _white_noise_at_snr(s, 10.0, seed=5)
    assert metrics.wada_snr_db(0.01 * noisy) == pytest.approx(metrics.wada_snr_db(noisy))
    with pytest.raises(ValueError, match="silence"):
        metrics.wada_snr_db(np.zeros(1000))


# --------------------------------------------------------------------------- kurtosis ratio


def test_power_spectral_kurtosis_of_gaussian_noise_is_six():
    # Gaussian noise: each STFT power sample is exponentially distributed, whose raw
    # moments are E[P^m] = m! mean^m, so E[P^4]/E[P^2]^2 = 24/4 = 6 (handbook maths);
    # also (a+2)(a+3)/(a(a+1)) at Gamma shape a = 1 (Uemura et al. 2009, recalled from memory).
    fs = 16000
    noise = np.random.default_rng(8).standard_normal(fs * 8)
    everywhere = np.ones(noise.size, dtype=bool)
    assert metrics.power_spectral_kurtosis(noise, everywhere, fs) == pytest.approx(6.0, rel=0.05)


def test_kurtosis_ratio_one_for_linear_filter_and_high_for_spectral_subtraction():
    # Uemura et al. 2009: spectral subtraction raises the kurtosis of the noise power
    # (musical noise); a fixed linear filter leaves its distribution (our per-bin
    # normalisation) unchanged.
    from scipy.signal import istft, lfilter, stft

    fs = 16000
    noise = np.random.default_rng(9).standard_normal(fs * 6)
    region = np.ones(noise.size, dtype=bool)
    coloured = lfilter([1.0, 0.7], [1.0], noise)
    assert metrics.kurtosis_ratio(noise, coloured, region, fs) == pytest.approx(1.0, abs=0.1)
    # Power spectral subtraction with the true noise power and a zero floor.
    _, _, z = stft(noise, fs, nperseg=512)
    power = np.abs(z) ** 2
    gain = np.sqrt(np.maximum(power - 2.0 * power.mean(axis=1, keepdims=True), 0.0) / power)
    _, subtracted = istft(z * gain, fs, nperseg=512)
    subtracted = subtracted[: noise.size]
    assert metrics.kurtosis_ratio(noise, subtracted, region, fs) > 2.0
    assert math.isnan(metrics.kurtosis_ratio(noise, np.zeros_like(noise), region, fs))


def test_kurtosis_needs_enough_frames():
    fs = 16000
    x = np.random.default_rng(1).standard_normal(fs)
    region = metrics.mask_from_intervals([(0.0, 0.1)], fs, x.size)
    with pytest.raises(ValueError, match="too few"):
        metrics.power_spectral_kurtosis(x, region, fs)


# --------------------------------------------------------------------------- levels


def test_level_changes_follow_the_power_ratio():
    # Definition: 10 log10 of the mean-square ratio over the region.
    rng = np.random.default_rng(4)
    fs = 8000
    x = rng.standard_normal(fs * 2)
    region = metrics.mask_from_intervals([(0.0, 0.5), (1.5, 2.0)], fs, x.size)
    assert region.sum() == fs
    y = x.copy()
    y[region] *= 0.1
    assert metrics.noise_floor_change_db(x, y, region) == pytest.approx(-20.0, abs=1e-9)
    assert metrics.speech_level_change_db(x, y, ~region) == pytest.approx(0.0, abs=1e-12)
    assert metrics.noise_floor_change_db(x, np.zeros_like(x), region) == -math.inf
    with pytest.raises(ValueError, match="empty"):
        metrics.noise_floor_change_db(x, y, np.zeros(x.size, dtype=bool))


def test_frame_levels_of_full_scale_sine():
    # A full-scale sine has mean square 1/2, i.e. -3.01 dB (handbook value).
    fs = 8000
    t = np.arange(fs) / fs
    levels = metrics.frame_levels_db(np.sin(2 * np.pi * 1000 * t), 80)
    np.testing.assert_allclose(levels, 10 * math.log10(0.5), atol=1e-9)


# --------------------------------------------------------------------------- loudness


def test_integrated_loudness_of_sine_and_gain_change():
    # ITU-R BS.1770-4: a 0 dBFS 1 kHz sine in one channel reads -3.01 LKFS (recalled from
    # memory; K-weighting is near 0 dB at 1 kHz). Reference implementation: pyloudnorm.
    import pyloudnorm

    fs = 48000
    t = np.arange(5 * fs) / fs
    sine = np.sin(2 * np.pi * 1000 * t)
    lufs = metrics.integrated_loudness_lufs(sine, fs)
    assert lufs == pytest.approx(pyloudnorm.Meter(fs).integrated_loudness(sine))
    assert lufs == pytest.approx(-3.01, abs=0.1)
    # Loudness is a power measure: a -6.2 dB gain lowers it by 6.2 LU (BS.1770 definition).
    quieter = metrics.integrated_loudness_lufs(sine * 10 ** (-6.2 / 20), fs)
    assert quieter - lufs == pytest.approx(-6.2, abs=1e-6)
    assert metrics.integrated_loudness_lufs(np.zeros(fs), fs) == -math.inf
    with pytest.raises(ValueError, match="400 ms"):
        metrics.integrated_loudness_lufs(sine[: fs // 10], fs)
