"""The textbook offline chain of ``benchmarks/offline_baseline.py`` against outside facts.

The benchmark compares liftmag with this chain, so the chain itself must be right: MVDR is
distortionless (Capon 1969), covariance whitening finds the RTF of a free-field source as
pyroomacoustics renders it, and the decision-directed Wiener post-filter approaches the Wiener
gain SNR / (1 + SNR) on stationary Gaussian signals (Ephraim & Malah 1984).
"""

from __future__ import annotations

import itertools
import sys
from pathlib import Path

import numpy as np
import pyroomacoustics as pra
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "benchmarks"))

import offline_baseline as ob


def _random_psd(rng: np.random.Generator, f: int, m: int) -> np.ndarray:
    a = rng.standard_normal((f, m, 2 * m)) + 1j * rng.standard_normal((f, m, 2 * m))
    return a @ np.conj(np.swapaxes(a, -1, -2)) / (2 * m)


@pytest.mark.parametrize("m", [2, 4])
def test_mvdr_is_distortionless_for_a_known_steering_vector(m):
    # Capon (1969); Van Trees, Optimum Array Processing (2002), eq. 6.71 (recalled from
    # memory): w = Phi^-1 g / (g^H Phi^-1 g) satisfies w^H g = 1, so a point source with
    # steering vector g passes unchanged whatever the noise covariance.
    rng = np.random.default_rng(7)
    f, t = 33, 50
    phi_v = _random_psd(rng, f, m)
    g = rng.standard_normal((f, m)) + 1j * rng.standard_normal((f, m))
    g /= g[:, :1]
    w, residual = ob.mvdr_weights(phi_v, g)
    np.testing.assert_allclose(np.einsum("fm,fm->f", np.conj(w), g), 1.0, atol=1e-12)
    s = rng.standard_normal((f, t)) + 1j * rng.standard_normal((f, t))
    y = g[:, None, :] * s[..., None]  # (F, T, M): the source alone
    z = np.einsum("fm,ftm->ft", np.conj(w), y)
    np.testing.assert_allclose(z, s, rtol=0, atol=1e-12 * np.abs(s).max())
    # Residual noise PSD: w^H Phi_v w = 1 / (g^H Phi_v^-1 g) (same reference).
    expected = 1 / np.real(np.einsum("fm,fm->f", np.conj(g),
                                     np.linalg.solve(phi_v, g[..., None])[..., 0]))
    np.testing.assert_allclose(residual, expected, rtol=1e-9)


def _anechoic(fs: int, sources: list, mics: np.ndarray) -> pra.ShoeBox:
    room = pra.ShoeBox([20.0, 20.0, 6.0], fs=fs, max_order=0)
    room.add_microphone_array(mics)
    for pos in sources:
        room.add_source(pos)
    room.compute_rir()
    return room


def _image(room, src: int, signal: np.ndarray) -> np.ndarray:
    import scipy.signal

    irs = [np.asarray(room.rir[m][src]) for m in range(len(room.rir))]
    n = max(h.size for h in irs)
    irs = np.stack([np.pad(h, (0, n - h.size)) for h in irs])
    return scipy.signal.oaconvolve(signal[None, :], irs, axes=-1)[:, : signal.size]


def test_covariance_whitening_finds_the_free_field_rtf_of_a_pyroomacoustics_source():
    # pyroomacoustics with max_order=0 renders the direct path only: a point source at
    # distance r_m from microphone m gives H_m = exp(-j 2 pi f r_m / c) / (4 pi r_m), so the
    # RTF to microphone 0 is g_m = (r_0 / r_m) exp(-j 2 pi f (r_m - r_0) / c) (free-field
    # Green's function). A directional white-noise interferer plus sensor noise is present
    # in the take and in a separate noise-only stretch (the room tone).
    fs = 16000
    rng = np.random.default_rng(3)
    centre = np.array([10.0, 10.0, 3.0])
    mics = centre[:, None] + np.outer([1.0, 0, 0], (np.arange(3) - 1) * 0.06)
    theta_t, theta_i = np.deg2rad(60.0), np.deg2rad(150.0)
    talker = centre + 2.0 * np.array([np.cos(theta_t), np.sin(theta_t), 0])
    interferer = centre + 2.5 * np.array([np.cos(theta_i), np.sin(theta_i), 0])
    room = _anechoic(fs, [talker, interferer], mics)
    n = 8 * fs

    def noise() -> np.ndarray:
        return (_image(room, 1, rng.standard_normal(n))
                + 0.01 * rng.standard_normal((3, n)))

    take = 3.0 * _image(room, 0, rng.standard_normal(n)) + noise()  # about +8 dB at mic 0
    tone = noise()
    y, transform = ob.analyse(take, fs)
    v, _ = ob.analyse(tone, fs)
    g = ob.rtf_covariance_whitening(ob.covariance(y), ob.covariance(v))

    c = pra.constants.get("c")
    r = np.linalg.norm(mics - talker[:, None], axis=0)
    freqs = transform.f
    g_true = (r[0] / r)[None, :] * np.exp(-2j * np.pi * freqs[:, None] * (r - r[0])[None] / c)
    band = (freqs >= 200) & (freqs <= 7000)  # pyroomacoustics' fractional-delay filter is
    # accurate well inside the band (a windowed sinc; its edge near fs/2 is not)
    np.testing.assert_allclose(g[:, 0], 1.0)  # normalised to the reference microphone
    err = np.abs(g[band, 1:] - g_true[band, 1:])
    # Tolerance: about 500 frames per bin at about +8 dB; the estimate's spread is of order
    # 1 / sqrt(frames * SNR), about 2 %. (Measured while writing this test: median 0.017,
    # largest 0.08; with 4x the frames both halved, so it is estimation noise, not bias.)
    assert np.median(err) < 0.03
    assert np.percentile(err, 95) < 0.1
    # A wrong answer would not pass: the RTF of the interferer differs by order one.
    r_i = np.linalg.norm(mics - interferer[:, None], axis=0)
    g_i = (r_i[0] / r_i)[None, :] * np.exp(-2j * np.pi * freqs[:, None] * (r_i - r_i[0])[None] / c)
    assert np.median(np.abs(g_i[band, 1:] - g_true[band, 1:])) > 0.3


def test_postfilter_gain_approaches_the_wiener_gain_on_gaussian_signals():
    # Wiener gain SNR / (1 + SNR) for Gaussian speech in Gaussian noise (Wiener 1949; the
    # MMSE estimator of Ephraim & Malah 1984 reduces to it in the Gaussian case). With the
    # decision-directed prior the gain only approaches it as the SNR grows: the prior is
    # essentially the previous frame's single-frame estimate G^2 gamma, as random as gamma
    # itself, and at low SNR it is dominated by (1 - alpha) max(gamma - 1, 0), so it is
    # biased low there (Cappe, IEEE Trans. Speech Audio Process. 2(2), 1994). Measured
    # while writing this test (mean gain vs Wiener): 0 dB 0.035 vs 0.50, 10 dB 0.70 vs 0.91,
    # 20 dB 0.965 vs 0.990, 30 dB 0.996 vs 0.999.
    rng = np.random.default_rng(11)
    f, t = 64, 4000
    errors = []
    for snr_db in (0.0, 10.0, 20.0, 30.0):
        snr = 10 ** (snr_db / 10)
        s = np.sqrt(snr / 2) * (rng.standard_normal((f, t)) + 1j * rng.standard_normal((f, t)))
        v = np.sqrt(0.5) * (rng.standard_normal((f, t)) + 1j * rng.standard_normal((f, t)))
        gain = ob.wiener_dd_gain(s + v, np.ones(f))
        errors.append(abs(gain[:, t // 10 :].mean() - snr / (1 + snr)))
    assert errors[-1] < 0.005  # 30 dB
    assert errors[-2] < 0.04  # 20 dB
    assert all(a > b for a, b in itertools.pairwise(errors))  # closer at every step up


def test_postfilter_floor_holds_on_noise_alone():
    # The -18 dB floor of the textbook chain: on noise alone the Wiener gain falls
    # far below it (xi near its -25 dB floor), so the applied gain sits on the floor.
    rng = np.random.default_rng(5)
    f, t = 32, 2000
    v = np.sqrt(0.5) * (rng.standard_normal((f, t)) + 1j * rng.standard_normal((f, t)))
    gain = ob.postfilter(v, np.ones(f))
    floor = 10 ** (-18 / 20)
    assert gain.min() >= floor - 1e-15
    assert np.median(gain[:, t // 10 :]) == pytest.approx(floor, abs=1e-12)


def test_chain_passes_a_noise_free_point_source_and_keeps_length():
    # With the talker alone (a tiny sensor floor makes the noise covariance invertible) the
    # RTF is exact, MVDR passes the talker unchanged and the post-filter's gain is near 1:
    # the output is the reference microphone's signal (STFT round trip by scipy's
    # ShortTimeFFT, which inverts its analysis exactly for a Hann window at 75 % overlap).
    fs = 16000
    rng = np.random.default_rng(2)
    centre = np.array([10.0, 10.0, 3.0])
    mics = centre[:, None] + np.outer([1.0, 0, 0], [-0.04, 0.04])
    talker = centre + 1.5 * np.array([0.5, np.sqrt(3) / 2, 0])
    room = _anechoic(fs, [talker], mics)
    n = 5 * fs + 123
    s = _image(room, 0, rng.standard_normal(n))
    floor = 1e-4 * rng.standard_normal((2, n))
    x = s + floor
    x[:, : fs] = floor[:, : fs]  # a 1 s noise-only lead-in
    result = ob.enhance(x, fs, (0, fs))
    assert result.output.shape == (n,)
    body = slice(fs + 2048, n - 2048)
    err = result.output[body] - x[0, body]
    assert np.sqrt(np.mean(err**2)) < 1e-2 * np.sqrt(np.mean(x[0, body] ** 2))
