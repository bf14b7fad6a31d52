"""The statistics stage: whole-take first pass, look-ahead, and what they may not do.

Outside references: SI-SDR (Le Roux et al. 2019) of the cleaned take against the talker's
image rendered by pyroomacoustics' image-source method (Allen & Berkley 1979), and the LV2
Core rule that a plugin's output may depend on its input only up to the reported latency.
"""

from __future__ import annotations

import numpy as np
import pytest
from rooms import make_room_scene
from scipy.integrate import quad

from liftmag import metrics
from liftmag.engine import (
    SPEECH_PRIOR_SNR_DB,
    Processor,
    analyse_take,
    iter_blocks,
    process_array,
)
from liftmag.settings import Settings

FIRST_S = 2.0


def _first_and_rest_gain_db(scene, y: np.ndarray) -> tuple[float, float]:
    """SI-SDR improvement over the reference mic: first FIRST_S s of speech, and the rest."""
    fs, start = scene.fs_hz, scene.noise_only_range[1]
    ref, x = scene.target_image, scene.mixture[scene.reference_mic]
    cut = start + round(FIRST_S * fs)

    def gain(lo: int, hi: int | None) -> float:
        return metrics.si_sdr_db(y[lo:hi], ref[lo:hi]) - metrics.si_sdr_db(x[lo:hi], ref[lo:hi])

    return gain(start, cut), gain(cut, None)


@pytest.mark.parametrize("kind", ["directional-diffuse", "two-interferers-diffuse"])
def test_the_first_seconds_of_speech_are_cleaned_as_well_as_the_rest(kind: str) -> None:
    # A take whose talker starts 0.3 s in, nothing given (the tracker alone). A causal engine
    # starts cold: its first two seconds of speech gain 1.3-1.9 dB less SI-SDR than the rest
    # (measured), and the check below makes sure this scene shows that, so the test can tell.
    # The whole-take first pass and the look-ahead (the plugin's way) must each close the gap
    # to within 0.75 dB (measured: -0.35 to +0.3 dB).
    scene = make_room_scene(kind, 2, 0.0, seed=4, lead_in_s=0.3)
    x, fs = scene.mixture, scene.fs_hz
    cold_first, cold_rest = _first_and_rest_gain_db(
        scene, process_array(x, fs, Settings(lookahead_s=0.0), whole_take=False)[0]
    )
    assert cold_first < cold_rest - 1.0, (cold_first, cold_rest)
    for settings, whole_take in (
        (Settings(), True),  # the default for files
        (Settings(lookahead_s=0.0), True),  # the whole take alone
        (Settings(), False),  # the look-ahead alone, what the plugin does
    ):
        first, rest = _first_and_rest_gain_db(
            scene, process_array(x, fs, settings, whole_take=whole_take)[0]
        )
        assert first > rest - 0.75, (settings.lookahead_s, whole_take, first, rest)


@pytest.mark.parametrize("lookahead_s", [0.0, 1.5])
def test_output_uses_no_future_beyond_the_reported_latency(lookahead_s: float) -> None:
    # LV2 Core: hosts align a plugin's output by its reported latency, so output sample j may
    # depend on input samples up to j and no later. Change the input from sample t on: the
    # streamed output before t must stay identical, bit for bit.
    fs = 16000
    rng = np.random.default_rng(21)
    n = 6 * fs
    x = 0.1 * rng.standard_normal((2, n))
    x[:, fs : 5 * fs] += np.sin(2 * np.pi * 300 * np.arange(4 * fs) / fs)
    t = 3 * fs + 123
    changed = x.copy()
    changed[:, t:] += 0.5 * rng.standard_normal((2, n - t))
    settings = Settings(lookahead_s=lookahead_s)
    outs = []
    for signal in (x, changed):
        proc = Processor(settings, fs, 2)
        outs.append(np.concatenate([proc.push(b) for b in iter_blocks(signal, 1000)], axis=1))
    latency = proc.latency_samples
    np.testing.assert_array_equal(outs[0][:, :t], outs[1][:, :t])
    # ... and the look-ahead is really used: output aligned to input before t (streamed
    # sample j < t + latency, j >= t) already reacts to the change.
    assert not np.allclose(outs[0][:, t : t + latency], outs[1][:, t : t + latency], atol=1e-6)
    if lookahead_s:
        # Output for input more than a frame before t still sees the change through the
        # statistics (the frame itself does not reach t). Derived values are renewed once a
        # second (REFRESH_S), so the statistics reach the output only with a look-ahead
        # longer than that.
        frame = Processor(Settings(lookahead_s=0.0), fs, 2).latency_samples + 1
        early = slice(t + frame, t + latency - frame)
        assert not np.allclose(outs[0][:, early], outs[1][:, early], atol=1e-6)


def test_whole_take_processing_does_not_depend_on_block_size() -> None:
    # The first pass and the look-ahead queue split frames by stream position only.
    fs = 16000
    rng = np.random.default_rng(3)
    x = 0.1 * rng.standard_normal((2, 3 * fs))
    x[:, 8000:30000] += np.sin(2 * np.pi * 440 * np.arange(22000) / fs)
    settings = Settings(lookahead_s=0.5)
    ref = process_array(x, fs, settings, chunk_samples=1 << 16)
    for chunk in (4096, 777):
        np.testing.assert_allclose(process_array(x, fs, settings, chunk_samples=chunk), ref,
                                   rtol=0, atol=1e-9)


def test_noise_from_the_takes_pauses_matches_the_noise_alone() -> None:
    # A take of steady white noise with a tone in every other second: the first pass's
    # automatic noise model, outside the tone's bins, must hold the power of the noise alone
    # times the known bias of presence-weighted averaging. With a fixed a-priori SNR xi
    # (Gerkmann & Hendriks 2012) a noise-only frame of a-posteriori SNR gamma ~ Exp(1) (a
    # complex Gaussian MVDR output) has weight 1 - p(gamma), and loud noise frames get some
    # presence, so the weighted mean is E[(1-p) gamma] / E[1-p] times the power (0.864 for
    # xi = 15 dB, integrated with scipy.integrate.quad below).
    fs = 16000
    rng = np.random.default_rng(8)
    n = 8 * fs
    noise = 0.1 * rng.standard_normal((2, n))
    x = noise.copy()
    tone = np.sin(2 * np.pi * 1000 * np.arange(n) / fs) * (np.arange(n) // fs % 2 == 1)
    x += tone
    take = analyse_take(Settings(), fs, 2, iter_blocks(x, 4096))
    proc = Processor(Settings(), fs, 2)
    freqs = proc.config.frequencies_hz
    band = (np.abs(freqs - 1000) > 100) & (freqs > 100)
    cov = take.noise.covariance
    measured = np.real(cov[band, 0, 0])
    # White noise of variance s^2 through a window w: E|Y|^2 = s^2 sum w^2 per bin (Parseval).
    win = proc.config.transform().win
    expected = 0.1**2 * np.sum(np.abs(win) ** 2)
    xi = 10 ** (SPEECH_PRIOR_SNR_DB / 10)

    def absence(g: float) -> float:
        return 1.0 - 1.0 / (1.0 + (1.0 + xi) * np.exp(-g * xi / (1.0 + xi)))

    bias = (quad(lambda g: absence(g) * g * np.exp(-g), 0, 60)[0]
            / quad(lambda g: absence(g) * np.exp(-g), 0, 60)[0])
    assert np.median(measured) == pytest.approx(bias * expected, rel=0.05)
    # In the tone's bin half of the frames are pauses, each weighted by E[1 - p] (0.90).
    tone_bin = int(np.argmin(np.abs(freqs - 1000)))
    assert 0.35 < take.noise_share[tone_bin] < 0.5
