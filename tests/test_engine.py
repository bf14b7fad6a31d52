"""The streaming engine: alignment, latency, block-size invariance, noise models, edge cases."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.signal import ShortTimeFFT

from liftmag.engine import NoiseLearner, Processor, iter_blocks, process_array
from liftmag.geometry import linear_array_m, steering_vectors
from liftmag.noise import NoiseModel
from liftmag.settings import ESTIMATORS, Settings
from liftmag.stft import StreamingStft, stft_config


def _noise(n_channels: int, n: int, seed: int = 0) -> np.ndarray:
    return 0.1 * np.random.default_rng(seed).standard_normal((n_channels, n))


def _run_blocks(proc: Processor, x: np.ndarray, block: int) -> np.ndarray:
    return np.concatenate([proc.push(b) for b in iter_blocks(x, block)], axis=1)


def test_streaming_frames_equal_scipy_shorttimefft_on_the_whole_signal():
    # Reference: scipy.signal.ShortTimeFFT.stft applied to the whole signal at once.
    cfg = stft_config(16000)
    x = _noise(2, 9000)
    stft = StreamingStft(cfg, 2, 2)
    frames = np.concatenate([stft.analyse(b) for b in iter_blocks(x, 777)], axis=0)
    whole = ShortTimeFFT(cfg.transform().win, cfg.hop, 16000, mfft=cfg.frame_length,
                         fft_mode="onesided", phase_shift=None)
    # Frame k covers [(k+1) hop - L, (k+1) hop): slice p of scipy is centred at p*hop.
    padded = np.concatenate([np.zeros((2, cfg.frame_length - cfg.hop)), x], axis=1)
    ref = whole.stft(padded, p0=0, p1=frames.shape[0], k_offset=cfg.frame_length // 2)
    np.testing.assert_allclose(frames, np.moveaxis(ref, -1, 0), atol=1e-12)


@pytest.mark.parametrize("fs", [16000, 44100, 48000, 96000])
def test_passthrough_is_sample_aligned(fs):
    # Fact of the trade: a processed take must stay sample-aligned with the original so it
    # can replace it in an edit without drifting against picture or other tracks.
    x = _noise(2, fs // 2)
    y = process_array(x, fs, Settings(estimator="passthrough"))
    assert y.shape == (1, x.shape[1])
    np.testing.assert_allclose(y[0], x[0], atol=1e-6)


def test_reported_latency_equals_observed_delay():
    # LV2 Core: a plugin's reported latency is what hosts subtract; it must equal the delay.
    fs = 16000
    proc = Processor(Settings(estimator="passthrough"), fs, 2)
    x = np.zeros((2, 3 * proc.latency_samples))
    x[:, 100] = 1.0
    y = _run_blocks(proc, x, 333)
    assert int(np.argmax(np.abs(y[0]))) - 100 == proc.latency_samples


@pytest.mark.parametrize("lookahead_s", [0.0, 1.5])
@pytest.mark.parametrize("estimator", ["auto", "linear-wiener", "lifted-wiener"])
def test_output_does_not_depend_on_block_size(estimator, lookahead_s):
    # The input is longer than the latency, so most of the compared output is processed.
    settings = Settings(estimator=estimator, lookahead_s=lookahead_s)
    x = _noise(2, 16000 + Processor(settings, 16000, 2).latency_samples)
    x[:, 6000:9000] += np.sin(2 * np.pi * 440 * np.arange(3000) / 16000)  # a 'talker' burst
    outs = [_run_blocks(Processor(settings, 16000, 2), x, b) for b in (4096, 100, 1)]
    # Frames that arrive together are summed as one batch, so the rounding differs between
    # block sizes; the architecture asks for agreement within float32 (about 6e-8).
    for other in outs[1:]:
        np.testing.assert_allclose(other, outs[0], rtol=0, atol=1e-9)


def test_every_estimator_and_output_mode_runs_finite_with_the_right_shape():
    x = _noise(2, 12000)
    for estimator in ESTIMATORS:
        nulls = estimator == "lifted-nulls"
        extra = {"mic_spacing_m": 0.08, "null_deg": (0.0, 180.0)} if nulls else {}
        for mode, channels in (("cleaned", 1), ("keep-image", 2), ("taken-out", 1)):
            y = process_array(x, 16000, Settings(estimator=estimator, output_mode=mode, **extra))
            assert y.shape == (channels, x.shape[1]), (estimator, mode)
            assert np.all(np.isfinite(y)), (estimator, mode)


def test_taken_out_plus_cleaned_is_the_reference_channel():
    # Linearity of the STFT synthesis (overlap-add): the removed part and the cleaned part
    # must add up to the original, or a listening check of "taken-out" would mislead.
    x = _noise(2, 12000, seed=3)
    cleaned = process_array(x, 16000, Settings(output_mode="cleaned"))
    removed = process_array(x, 16000, Settings(output_mode="taken-out"))
    np.testing.assert_allclose(cleaned + removed, x[:1], atol=1e-9)


def test_all_silent_input_gives_silent_output_without_warnings():
    x = np.zeros((2, 16000))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for estimator in ("auto", "linear-wiener", "lifted-affine", "delay-sum"):
            y = process_array(x, 16000, Settings(estimator=estimator))
            assert np.all(y == 0.0)


def test_refuses_nan_input_and_mono():
    proc = Processor(Settings(), 16000, 2)
    bad = np.zeros((2, 100))
    bad[1, 50] = np.nan
    with pytest.raises(ValueError, match="NaN"):
        proc.push(bad)
    with pytest.raises(ValueError, match="two or more microphones"):
        Processor(Settings(), 16000, 1)


def test_steering_vector_sign_matches_a_physically_delayed_signal():
    # DFT delay theorem (any signals text, e.g. Oppenheim & Schafer): a signal that arrives
    # tau later has its spectrum multiplied by exp(-j 2 pi f tau). A plane wave from 0 deg
    # (the +x side) reaches the mic at larger x first, so mic 1 leads mic 0.
    fs = 16000
    pos = linear_array_m(2, 343.0 * 4 / fs)  # 4 samples of travel between the mics
    rng = np.random.default_rng(5)
    s = rng.standard_normal(20000)
    x = np.stack([s[0:16000], s[4:16004]])  # mic 1 gets each sample 4 samples earlier
    cfg = stft_config(fs)
    frames = StreamingStft(cfg, 2, 2).analyse(x)[4:]
    cross = np.mean(frames[:, 1, :] * np.conj(frames[:, 0, :]), axis=0)
    d = steering_vectors(pos, 0.0, cfg.frequencies_hz)
    band = (cfg.frequencies_hz > 200) & (cfg.frequencies_hz < 1800)
    phase_err = np.angle(cross[band] * np.conj(d[band, 1]))
    assert np.max(np.abs(phase_err)) < 0.05


def test_circular_gaussian_noise_uses_the_linear_estimator_almost_everywhere():
    # Marchenko & Pastur (1967): a Gaussian sample's whitened lifted covariance has its
    # eigenvalues inside the bulk, so the spiked regulariser finds (almost) nothing.
    fs = 16000
    learner = NoiseLearner(fs, 2)
    learner.add_segment(iter_blocks(_noise(2, 20 * fs, seed=7), 1 << 15))
    model = learner.model()
    proc = Processor(Settings(noise_mode="hold"), fs, 2, model)
    proc.push(_noise(2, fs + proc.latency_samples, seed=8))  # one second is estimated
    assert proc.report.lifted_fraction < 0.02


def test_noise_model_round_trip_and_mismatch_messages():
    fs = 16000
    learner = NoiseLearner(fs, 2)
    learner.add_segment(iter_blocks(_noise(2, 3 * fs), 4096))
    model = learner.model("test room tone")
    again = NoiseModel.from_bytes(model.to_bytes())
    np.testing.assert_array_equal(again.covariance, model.covariance)
    np.testing.assert_array_equal(again.lift_second_moment, model.lift_second_moment)
    assert again.description == "test room tone" and again.frames == model.frames
    with pytest.raises(ValueError, match="sample rate 16000 Hz vs 48000 Hz"):
        Processor(Settings(), 48000, 2, model)
    with pytest.raises(ValueError, match="2 channels vs 4"):
        Processor(Settings(), 16000, 4, model)
    with pytest.raises(ValueError, match="STFT frame/hop"):
        Processor(Settings(frame_s=0.064), 16000, 2, model)
    with pytest.raises(ValueError, match="not a liftmag noise model"):
        NoiseModel.from_bytes(b"PK\x03\x04 not really")


def test_learning_from_what_passes_matches_the_room_tone_learner():
    fs = 16000
    x = _noise(2, 2 * fs, seed=11)
    proc = Processor(Settings(noise_mode="learn"), fs, 2)
    proc.push(x)
    learner = NoiseLearner(fs, 2)
    learner.add_segment([x])
    # Both average every frame of the same noise; the learner skips the zero-padded start.
    ratio = np.real(np.trace(proc.noise_model().covariance, axis1=1, axis2=2)) / np.real(
        np.trace(learner.model().covariance, axis1=1, axis2=2)
    )
    assert np.median(ratio) == pytest.approx(1.0, abs=0.1)


def test_closed_form_principal_eigenpair_matches_lapack():
    # Reference: numpy.linalg.eigh (LAPACK) on random 2 x 2 Hermitian matrices, plus the
    # degenerate diagonal cases where the closed form must pick the better-conditioned vector.
    from liftmag.engine import _principal_eigenpair

    rng = np.random.default_rng(9)
    a = rng.standard_normal((500, 2, 2)) + 1j * rng.standard_normal((500, 2, 2))
    h = a @ np.conj(np.swapaxes(a, 1, 2))
    h[0], h[1], h[2] = np.diag([2.0, 1.0]), np.diag([1.0, 3.0]), np.eye(2)
    lam, vec = _principal_eigenpair(h)
    ref_lam, ref_vec = np.linalg.eigh(h)
    np.testing.assert_allclose(lam, ref_lam[:, -1], atol=1e-12)
    np.testing.assert_allclose(np.einsum("fij,fj->fi", h, vec), lam[:, None] * vec, atol=1e-12)
    overlap = np.abs(np.einsum("fi,fi->f", np.conj(vec), ref_vec[:, :, -1]))
    np.testing.assert_allclose(overlap[3:], 1.0, atol=1e-9)  # unique up to phase


@pytest.mark.parametrize("m", [3, 4])
def test_squared_principal_eigenpair_matches_lapack(m: int):
    # Reference: numpy.linalg.eigh (LAPACK). The engine takes RTFs from whitened speech
    # covariances I + P g g^H + (estimation noise); here the second eigenvalue is up to 0.8
    # of the first, where H^32 still leaves an error below 0.8^32 ~ 8e-4 of the second vector.
    from liftmag.engine import _principal_eigenpair

    rng = np.random.default_rng(m)
    n = 400
    g = rng.standard_normal((n, m)) + 1j * rng.standard_normal((n, m))
    a = rng.standard_normal((n, m, m)) + 1j * rng.standard_normal((n, m, m))
    h = np.eye(m) + 0.2 * a @ np.conj(np.swapaxes(a, 1, 2)) / m
    h = h + rng.uniform(1.0, 20.0, (n, 1, 1)) * g[:, :, None] * np.conj(g[:, None, :])
    ref_lam, ref_vec = np.linalg.eigh(h)
    assert np.max(ref_lam[:, -2] / ref_lam[:, -1]) < 0.8
    lam, vec = _principal_eigenpair(h)
    np.testing.assert_allclose(lam, ref_lam[:, -1], rtol=1e-9)
    overlap = np.abs(np.einsum("fi,fi->f", np.conj(vec), ref_vec[:, :, -1]))
    np.testing.assert_allclose(overlap, 1.0, atol=1e-6)


@pytest.mark.parametrize("m", [2, 3, 4])
def test_whitener_is_the_hermitian_square_root(m: int):
    # Reference: scipy.linalg.sqrtm (Schur method) and numpy.linalg.inv, after the same
    # diagonal loading, on random Hermitian positive definite matrices; two microphones use
    # a closed form, more use eigh.
    from scipy.linalg import sqrtm

    from liftmag.engine import _root_inverse

    rng = np.random.default_rng(5)
    a = rng.standard_normal((60, m, m + 1)) + 1j * rng.standard_normal((60, m, m + 1))
    phi = a @ np.conj(np.swapaxes(a, 1, 2))
    root, inv = _root_inverse(phi, 1e-3)
    scale = np.real(np.trace(phi, axis1=1, axis2=2)) / m
    loaded = phi + (1e-3 * scale + 1e-20)[:, None, None] * np.eye(m)
    expected = np.stack([sqrtm(c) for c in loaded])
    np.testing.assert_allclose(root, expected, rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(inv, np.linalg.inv(expected), rtol=1e-8, atol=1e-10)


def test_outputs_follow_the_microphones_not_their_order():
    # Fact of the problem: numbering the microphones differently (and naming the same
    # reference) changes no physics, so the cleaned reference must not change. A 20 s take
    # in tracker mode re-analyses the lifted noise structure under later whiteners, which
    # with a Cholesky whitener made the output depend on the order (0.05 peak, measured).
    from liftmag.scenes import demo_scene

    x = demo_scene(seed=3).mixture[:, : 16000 * 20]
    for estimator in ("lifted-mv", "auto"):
        first = Settings(estimator=estimator, reference_channel=0)
        a = process_array(x, 16000, first)[0]
        b = process_array(x[::-1].copy(), 16000, first.replace(reference_channel=1))[0]
        np.testing.assert_allclose(a, b, atol=1e-9 * np.max(np.abs(a)))


@pytest.mark.parametrize("m", [2, 3, 4])
def test_engine_low_rank_lifted_mv_equals_the_direct_solve(m: int):
    # Reference: the core estimator liftmag.estimators.lifted_mv_weights, which solves
    # (C + P K) w = rho_g directly and is itself checked against the linear MVDR on Gaussian
    # noise (test_estimators). The engine's rank-(2M - 1) eigen-structure must give the same
    # unbiased power and variance for any C, RTF, prior and snapshot.
    from liftmag.engine import lifted_mv_power, lifted_mv_structure, lifted_mv_terms
    from liftmag.estimators import lifted_mv_weights, outer
    from liftmag.lift import crossterm_lift_covariance, lift_snapshots, rho

    rng = np.random.default_rng(m)
    n, d = 40, m * m
    a = rng.standard_normal((n, d, 3 * d))
    c = a @ np.swapaxes(a, 1, 2) / (3 * d) + 0.05 * np.eye(d)
    g = rng.standard_normal((n, m)) + 1j * rng.standard_normal((n, m))
    prior = 10 ** rng.uniform(-2, 3, n)
    y = rng.standard_normal((n, m)) + 1j * rng.standard_normal((n, m))
    values, vectors = np.linalg.eigh(c)
    inv_sqrt = np.swapaxes(vectors, 1, 2) / np.sqrt(values)[:, :, None]
    active, q, lam, s_active = lifted_mv_structure(inv_sqrt, np.ones(n, int), g, False)
    rho_g = rho(outer(g))
    lf = lifted_mv_terms(q, lam, s_active, rho_g[active])
    projected = np.einsum("fij,fj->fi", lf["projection"], lift_snapshots(y) - rho(np.eye(m)))
    p_hat, noise_eq = lifted_mv_power(projected[:, :-1], projected[:, -1], prior, lf)
    w, variance = lifted_mv_weights(rho_g, c, crossterm_lift_covariance(g, np.eye(m)), prior)
    p_ref = np.einsum("fd,fd->f", w, lift_snapshots(y) - rho(np.eye(m)))
    np.testing.assert_allclose(p_hat, p_ref, rtol=1e-8, atol=1e-10 * np.abs(p_ref).max())
    np.testing.assert_allclose(noise_eq, np.sqrt(prior**2 + variance) - prior, rtol=1e-8)


@pytest.mark.parametrize("n_frames", [1, 31, 64, 65, 300])
def test_presence_smoothing_matches_lfilter(n_frames: int):
    # Reference: scipy.signal.lfilter with the same first-order recursion and initial state.
    from scipy.signal import lfilter

    from liftmag.engine import _smooth_presence

    rng = np.random.default_rng(n_frames)
    spp, previous = rng.random((n_frames, 50)), rng.random(50)
    expected = lfilter([0.1], [1.0, -0.9], spp, axis=0, zi=0.9 * previous[None])[0]
    np.testing.assert_allclose(_smooth_presence(spp, previous), expected, rtol=1e-12, atol=1e-15)
