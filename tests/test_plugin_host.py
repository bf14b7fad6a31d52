"""The plugin in our own C test host (tests/lv2host/lv2host.c): threads, odd block sizes,
rates from 16 to 192 kHz, NaN and denormal input, unload/reload cycles, and LV2 state.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import scipy.signal
from lv2host import support

from liftmag.engine import NoiseModel, Processor, process_array
from liftmag.settings import Settings

pytestmark = [
    pytest.mark.plugin,
    pytest.mark.skipif(bool(support.skip_reason()), reason=support.skip_reason()),
]

ttl = support.ttl_module()
PORTS = {p.field: p for p in ttl.control_ports()}


def _index(field: str, choice: str) -> int:
    return PORTS[field].choices.index(choice)


@pytest.fixture(scope="module")
def host(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return support.compile_host(tmp_path_factory.mktemp("host"))


def _signal(channels: int, seconds: float, fs: int, seed: int, hostile: bool) -> np.ndarray:
    """Correlated noise plus a tone; ``hostile`` adds NaN, Inf and float32 denormals."""
    rng = np.random.default_rng(seed)
    # Longer by the engine's look-ahead, so the delayed output covers ``seconds``.
    n = int((seconds + Settings().lookahead_s) * fs)
    t = np.arange(n) / fs
    common = rng.standard_normal(n)
    x = 0.05 * (common + 0.7 * rng.standard_normal((channels, n)))
    x[:, n // 3:] += 0.3 * np.sin(2 * np.pi * 300.0 * t[n // 3:])
    x = x.astype(np.float32)
    if hostile:
        x[0, rng.integers(0, n, 5)] = np.nan
        x[-1, rng.integers(0, n, 3)] = np.inf
        x[:, n // 5: n // 5 + 2000] = np.float32(1e-41)  # subnormal in float32
    return x


def _sanitised(x: np.ndarray) -> np.ndarray:
    y = x.astype(np.float64)
    y[~np.isfinite(y)] = 0.0
    return y


def test_threads_rates_blocks_and_reloads(bundle: Path, host: Path, tmp_path: Path) -> None:
    spacing = {"mic_spacing_m": 0.08, "target_deg": 90.0}
    cases = [  # (uri, rate, seconds, settings as port values, Settings)
        (support.URI_2CH, 16000, 0.8, {"reduction_limit_db": 12.0},
         Settings(reduction_limit_db=12.0)),
        (support.URI_2CH, 22050, 0.5, {"estimator": _index("estimator", "lifted-wiener")},
         Settings(estimator="lifted-wiener")),
        (support.URI_2CH, 44100, 0.4, {"estimator": _index("estimator", "linear-wiener")},
         Settings(estimator="linear-wiener")),
        (support.URI_4CH, 48000, 0.35,
         {"estimator": _index("estimator", "mvdr"),
          "output_mode": _index("output_mode", "keep-image")},
         Settings(estimator="mvdr", output_mode="keep-image")),
        (support.URI_2CH, 96000, 0.35, {"estimator": _index("estimator", "delay-sum"), **spacing},
         Settings(estimator="delay-sum", **spacing)),
        (support.URI_2CH, 192000, 0.3, {"estimator": _index("estimator", "passthrough")},
         Settings(estimator="passthrough")),
    ]
    jobs = []
    for k, (uri, rate, seconds, controls, _) in enumerate(cases):
        channels = 4 if uri == support.URI_4CH else 2
        x = _signal(channels, seconds, rate, seed=k, hostile=True)
        jobs.append(support.Job(uri, rate, x, controls, blocks=f"r{k + 1}"))
    env = support.lv2_env(bundle.parent, tmp_path / "state")
    threaded = support.run_host(host, bundle, jobs, tmp_path, env, threads=3, rounds=2,
                                tag="threads")
    # The same jobs, one thread, and every run() one block of 64 frames.
    single_jobs = [support.Job(j.uri, j.rate, j.x, j.controls, blocks="f64") for j in jobs]
    single = support.run_host(host, bundle, single_jobs, tmp_path, env, threads=1, rounds=1,
                              tag="single")
    block = support.block_frames(bundle)
    for k, (_uri, rate, _s, _c, settings) in enumerate(cases):
        x = jobs[k].x
        reference = single.outputs[0][k]
        assert np.all(np.isfinite(reference)), f"job {k}: non-finite output"
        for r in range(2):
            assert np.array_equal(threaded.outputs[r][k], reference), f"job {k} round {r}"
        latency = Processor(settings, rate, x.shape[0]).latency_samples + block
        assert threaded.latency[(k, 0)] == latency == single.latency[(k, 0)]
        n = x.shape[1]
        expected = process_array(_sanitised(x), rate, settings, whole_take=False)
        for c in range(reference.shape[0]):
            row = expected[c] if expected.shape[0] > 1 else expected[0]
            support.assert_f32_close(reference[c, latency:], row[: n - latency],
                                     f"job {k} ({rate} Hz) channel {c}")
    assert "replaced by 0" in support.plugin_log(tmp_path / "state")


def test_reported_latency_is_the_observed_delay(bundle: Path, host: Path,
                                                tmp_path: Path) -> None:
    # With the passthrough estimator the output is the reference input, delayed: the
    # delay that lines the two up must be the value on the latency port.
    rate = 48000
    x = _signal(2, 0.5, rate, seed=11, hostile=False)
    controls = {"estimator": _index("estimator", "passthrough")}
    env = support.lv2_env(bundle.parent, tmp_path / "state")
    result = support.run_host(host, bundle, [support.Job(support.URI_2CH, rate, x, controls,
                                                         blocks="r3")], tmp_path, env)
    y = result.outputs[0][0][0].astype(np.float64)
    reported = result.latency[(0, 0)]
    ref = x[0].astype(np.float64)
    xcorr = scipy.signal.correlate(y, ref, mode="full", method="fft")
    lags = scipy.signal.correlation_lags(len(y), len(ref), mode="full")
    assert int(lags[int(np.argmax(xcorr))]) == reported
    support.assert_f32_close(y[reported:], ref[: len(ref) - reported], "delayed passthrough")


def test_state_saves_and_restores_the_noise_model(bundle: Path, host: Path,
                                                  tmp_path: Path) -> None:
    from liftmag.scenes import demo_scene

    scene = demo_scene(seed=4, snr_db=0.0)
    fs = scene.fs_hz
    lead = scene.noise_only_range[1]
    room_tone = scene.mixture[:, :lead].astype(np.float32)
    span = round((2 + Settings().lookahead_s) * fs)  # 2 s of output after the look-ahead
    take = scene.mixture[:, lead: lead + span].astype(np.float32)
    env = support.lv2_env(bundle.parent, tmp_path / "state")
    learn = {"noise_mode": _index("noise_mode", "learn")}
    hold = {"noise_mode": _index("noise_mode", "hold")}
    saved = tmp_path / "learned.state"
    first = support.run_host(host, bundle, [support.Job(support.URI_2CH, fs, room_tone, learn,
                                                        save=saved)], tmp_path, env, tag="learn")
    assert first.save_status[(0, 0)] == 0  # LV2_STATE_SUCCESS

    props = support.read_state(saved)
    assert len(props) == 1
    key, type_, flags, chunk = props[0]
    assert key == ttl.STATE_KEY_URI
    # LV2 state: opaque bytes go as atom:Chunk; ours are plain, portable bytes.
    assert type_ == support.ATOM_CHUNK_URI and flags == support.STATE_FLAGS_POD_PORTABLE
    model = NoiseModel.from_bytes(chunk)
    assert model.n_channels == 2 and model.sample_rate_hz == fs and model.frames > 10

    empty = tmp_path / "empty.state"
    empty.write_bytes(b"")
    jobs = [
        support.Job(support.URI_2CH, fs, take, hold, blocks="r21", restore=saved),
        support.Job(support.URI_2CH, fs, take, hold, blocks="r22", restore=saved),
        support.Job(support.URI_2CH, fs, take, hold, blocks="r23"),
        support.Job(support.URI_2CH, fs, take, hold, blocks="r24", restore=empty),
    ]
    runs = support.run_host(host, bundle, jobs, tmp_path, env, threads=2, tag="restore")
    restored_a, restored_b, fresh, reset = runs.outputs[0]
    assert [runs.restore_status[(k, 0)] for k in (0, 1, 3)] == [0, 0, 0]
    assert np.array_equal(restored_a, restored_b)
    assert not np.allclose(restored_a, fresh, atol=1e-4)
    # LV2 state: restoring from an empty store returns the plugin to its defaults.
    assert np.array_equal(reset, fresh)

    settings = Settings(noise_mode="hold")
    latency = runs.latency[(0, 0)]
    n = take.shape[1]
    expected = process_array(take.astype(np.float64), fs, settings, noise_model=model,
                             whole_take=False)[0]
    support.assert_f32_close(restored_a[0, latency:], expected[: n - latency], "restored")


@pytest.mark.parametrize("fault", ["process", "save", "restore"])
def test_injected_faults_are_logged_not_fatal(fault: str, bundle: Path, host: Path,
                                              tmp_path: Path) -> None:
    bridge = support.bridge_module()
    rate = 16000
    x = _signal(2, 1.0, rate, seed=31, hostile=True)
    state_dir = tmp_path / "state"
    saved = tmp_path / "ok.state"
    ok_env = support.lv2_env(bundle.parent, state_dir)
    support.run_host(host, bundle, [support.Job(support.URI_2CH, rate, x, {}, save=saved)],
                     tmp_path, ok_env, tag="prep")
    env = support.lv2_env(bundle.parent, state_dir, **{bridge.TEST_FAULT_ENV: fault})
    job = support.Job(support.URI_2CH, rate, x, {}, blocks="r5",
                      restore=saved if fault == "restore" else None,
                      save=tmp_path / "fault.state" if fault == "save" else None)
    result = support.run_host(host, bundle, [job], tmp_path, env, tag=fault)
    y = result.outputs[0][0]
    assert np.all(np.isfinite(y))
    log = support.plugin_log(state_dir)
    assert f"injected test fault ({bridge.TEST_FAULT_ENV}={fault})" in log
    if fault == "process":
        latency = result.latency[(0, 0)]
        dry = np.nan_to_num(x, nan=0.0, posinf=0.0, neginf=0.0)
        assert not np.any(y[:, :latency])
        assert np.array_equal(y[:, latency:], dry[:, : x.shape[1] - latency])
    elif fault == "save":
        assert result.save_status[(0, 0)] not in (-1, 0)  # an LV2_State_Status error
        assert "saving the noise model failed" in log
    else:
        assert result.restore_status[(0, 0)] not in (-1, 0)
        assert "restoring the noise model failed" in log


def test_host_without_features_gets_audio_and_a_state_refusal(bundle: Path, host: Path,
                                                              tmp_path: Path) -> None:
    # LV2 core: a host passes a NULL-terminated feature list, possibly empty, and a plugin
    # must cope with every feature it lists as lv2:optionalFeature being absent (urid:map
    # here). Without a URID map the state cannot name its key, so save() and restore() must
    # refuse with LV2_STATE_ERR_NO_FEATURE (LV2 state extension, state.h) while the audio is
    # the same as with every feature offered.
    rate = 16000
    x = _signal(2, 1.0, rate, seed=41, hostile=False)
    saved = tmp_path / "with-map.state"
    env = support.lv2_env(bundle.parent, tmp_path / "state")
    offered = support.run_host(host, bundle, [support.Job(support.URI_2CH, rate, x, {},
                                                          blocks="r7", save=saved)],
                               tmp_path, env, tag="features")
    assert offered.save_status[(0, 0)] == 0 and saved.is_file()

    bare_env = dict(env, LV2HOST_FEATURES="none")
    jobs = [support.Job(support.URI_2CH, rate, x, {}, blocks="r7",
                        save=tmp_path / "no-map.state"),
            support.Job(support.URI_2CH, rate, x, {}, blocks="r8", restore=saved)]
    bare = support.run_host(host, bundle, jobs, tmp_path, bare_env, tag="no-features")
    lv2_state_err_no_feature = 4  # LV2_STATE_ERR_NO_FEATURE in lv2/state/state.h
    assert bare.save_status[(0, 0)] == lv2_state_err_no_feature
    assert bare.restore_status[(1, 0)] == lv2_state_err_no_feature
    assert not (tmp_path / "no-map.state").exists()
    assert np.array_equal(bare.outputs[0][0], offered.outputs[0][0])
    assert np.array_equal(bare.outputs[0][1], offered.outputs[0][0])
    assert bare.latency[(0, 0)] == offered.latency[(0, 0)]
