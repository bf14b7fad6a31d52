"""Cleaning quality on image-source rooms, scored with the reference implementations.

Rooms: pyroomacoustics' image-source method (Allen & Berkley 1979), via tests/rooms.py.
Scores: STOI from pystoi (Taal et al. 2011), wideband PESQ from the pesq package (ITU-T
P.862.2), SI-SDR per Le Roux et al. (2019). Input SNR 0 dB at the reference microphone.

"At least as well as" allows the spread that separates two runs of the same linear
estimator through numerically different but equivalent paths (0.02 PESQ, 0.005 STOI):
on Gaussian-like noise ``auto`` *is* the linear estimator in most bins, by design.
"""

from __future__ import annotations

import numpy as np
import pytest
from rooms import make_room_scene

from liftmag import metrics
from liftmag.engine import NoiseLearner, iter_blocks, process_array
from liftmag.settings import Settings

pytestmark = pytest.mark.slow

PESQ_TIE = 0.02
STOI_TIE = 0.005


def _model(scene, audio):
    learner = NoiseLearner(scene.fs_hz, scene.mixture.shape[0])
    learner.add_segment(iter_blocks(audio, 1 << 15))
    return learner.model()


def _scores(scene, signal):
    start = scene.noise_only_range[1]  # score the speech part, not the lead-in
    ref, out, fs = scene.target_image[start:], signal[start:], scene.fs_hz
    return {
        "stoi": metrics.stoi(ref, out, fs),
        "pesq": float(metrics.pesq_wb(ref, out, fs)),
        "si_sdr": metrics.si_sdr_db(out, ref),
    }


def _run(scene, estimator, model):
    settings = Settings(estimator=estimator, noise_mode="hold")
    return process_array(scene.mixture, scene.fs_hz, settings, noise_model=model)[0]


@pytest.mark.parametrize(
    ("kind", "n_mics"),
    [("two-interferers-diffuse", 2), ("two-interferers-diffuse", 4), ("directional-diffuse", 2)],
)
def test_default_improves_on_the_input_and_is_no_worse_than_linear_wiener(kind, n_mics):
    scene = make_room_scene(kind, n_mics, snr_db=0.0, seed=1)
    a, b = scene.noise_only_range
    model = _model(scene, scene.mixture[:, a:b])  # statistics from the 1.5 s lead-in
    unprocessed = _scores(scene, scene.mixture[scene.reference_mic])
    default = _scores(scene, _run(scene, Settings().estimator, model))
    linear = _scores(scene, _run(scene, "linear-wiener", model))
    assert default["stoi"] > unprocessed["stoi"] + 0.03
    assert default["pesq"] > unprocessed["pesq"] + 0.15
    assert default["pesq"] >= linear["pesq"] - PESQ_TIE
    assert default["stoi"] >= linear["stoi"] - STOI_TIE


def test_tracking_without_room_tone_still_improves_the_take():
    scene = make_room_scene("two-interferers-diffuse", 2, snr_db=0.0, seed=2)
    unprocessed = _scores(scene, scene.mixture[scene.reference_mic])
    cleaned = _scores(scene, process_array(scene.mixture, scene.fs_hz, Settings())[0])
    assert cleaned["stoi"] > unprocessed["stoi"] and cleaned["pesq"] > unprocessed["pesq"]


def test_competing_talker_room_tone_lift_beats_linear_and_long_tone_beats_lead_in():
    scene = make_room_scene("competing-talker", 2, snr_db=0.0, seed=1, room_tone_s=30.0)
    a, b = scene.noise_only_range
    tone_model = _model(scene, scene.room_tone)
    lead_model = _model(scene, scene.mixture[:, a:b])
    tone = {e: _scores(scene, _run(scene, e, tone_model)) for e in ("auto", "linear-wiener")}
    lead = {e: _scores(scene, _run(scene, e, lead_model)) for e in ("auto", "linear-wiener")}
    # Target from the issue: auto beats linear-wiener by at least 0.05 wideband PESQ.
    assert tone["auto"]["pesq"] - tone["linear-wiener"]["pesq"] >= 0.05
    for estimator in ("auto", "linear-wiener"):
        assert tone[estimator]["pesq"] > lead[estimator]["pesq"]
        assert tone[estimator]["si_sdr"] > lead[estimator]["si_sdr"]
    assert np.isfinite(tone["auto"]["stoi"])
