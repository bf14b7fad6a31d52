"""The varied benchmark scenes (``benchmarks/varied_scenes.py``): design and geometry."""

from __future__ import annotations

import sys
from collections import Counter
from pathlib import Path

import numpy as np
import pyroomacoustics as pra

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "benchmarks"))

import varied_scenes as vs
from rooms import gcc_phat_lag_s


def test_design_is_balanced_within_every_noise_type():
    specs = vs.design()
    assert len(specs) == 8 * len(vs.KINDS)
    assert specs == vs.design()  # fixed seed: the same grid every run
    for kind in vs.KINDS:
        mine = [s for s in specs if s.kind == kind]
        assert set(Counter(s.snr_db for s in mine).values()) == {2}
        assert set(Counter((s.n_mics, s.spacing_m) for s in mine).values()) == {2}
        assert max(Counter((s.snr_db, s.n_mics, s.spacing_m) for s in mine).values()) == 1
        assert set(Counter(s.rt60_s for s in mine).values()) == {2}
        assert {s.bearing_deg for s in mine} == set(vs.BEARINGS_DEG)
        assert sum(s.length == "long" for s in mine) == 1
        assert sum(s.fs_hz == 48000 for s in mine) == 2


def test_talker_bearing_shows_in_the_rendered_inter_microphone_delay():
    # The talker's image must arrive with the delay its position implies: (r_1 - r_0) / c
    # for a point source (free-field geometry; talker 1.2 m away, so not quite the plane-wave
    # d cos(theta) / c), measured by GCC-PHAT (Knapp & Carter 1976) on the rendered target
    # images of a dry room. Tolerance: 1/8 of a sample at 16 kHz, well below the 15 cm
    # array's delay at 30 deg (about 6 samples).
    spec = vs.SceneSpec("sensor", 10.0, 30.0, 0.15, 2, 0.15, 6.0, 16000, 5)
    scene = vs.render(spec)
    assert scene.mixture.shape == (2, 6 * 16000)
    assert scene.room_tone.shape == (2, round(vs.ROOM_TONE_S * 16000))
    assert scene.noise_only_range == (0, round(vs.LEAD_IN_S * 16000))
    mics = vs.rooms.ARRAY_CENTRE_M[:, None] + np.outer([1.0, 0, 0], [-0.075, 0.075])
    talker = vs.rooms.position_at(30.0, vs.TALKER_DISTANCE_M)
    r = np.linalg.norm(mics - talker[:, None], axis=0)
    expected_s = (r[1] - r[0]) / pra.constants.get("c")
    images = scene.target_images
    measured_s = gcc_phat_lag_s(images[0], images[1], 16000, max_lag_s=1e-3)
    assert abs(measured_s - expected_s) < 1 / (8 * 16000)
    assert expected_s < -5 / 16000  # the talker at 30 deg (toward +x) reaches microphone 1 first
    # The lead-in holds no talker: its energy there is far below the speech's.
    lead = images[0, : scene.noise_only_range[1]]
    assert np.sum(lead**2) < 1e-6 * np.sum(images[0] ** 2)
