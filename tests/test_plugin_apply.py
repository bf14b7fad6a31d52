"""The plugin run by lilv's reference host tool ``lv2apply`` (one sample per run() call).

Its output must be ``liftmag.engine.process_array``'s, delayed by the reported latency; when
Python cannot run, it must be the dry input, delayed the same way, with a log line.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from lv2host import support

from liftmag.engine import Processor, process_array
from liftmag.settings import Settings

pytestmark = [
    pytest.mark.plugin,
    pytest.mark.skipif(bool(support.skip_reason()), reason=support.skip_reason()),
]


@pytest.fixture(scope="module")
def take() -> tuple[np.ndarray, int, np.ndarray]:
    """A two-mic take in an image-source room (pyroomacoustics; Allen & Berkley 1979): two
    directional interferers from opposite sides plus diffuse noise, 0 dB SNR, talker at
    broadside; its first 7 s (1.5 s of noise, then speech), as float32 values."""
    from rooms import make_room_scene

    scene = make_room_scene("two-interferers-diffuse", 2, snr_db=0.0, seed=3)
    n = 7 * scene.fs_hz
    x = scene.mixture[:, :n].astype(np.float32).astype(np.float64)
    return x, scene.fs_hz, scene.target_image[:n]


def _noise(channels: int, n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    common = rng.standard_normal(n)
    x = 0.05 * (common + 0.5 * rng.standard_normal((channels, n)))
    return x.astype(np.float32).astype(np.float64)


def _lookahead(fs: int) -> int:
    """Samples of the engine's default look-ahead: inputs are longer by it, so that the
    delayed output still covers what each test compares."""
    return round(Settings().lookahead_s * fs)


def _latency(settings: Settings, fs: int, channels: int, bundle: Path) -> int:
    return Processor(settings, fs, channels).latency_samples + support.block_frames(bundle)


def test_lv2apply_matches_process_array(bundle: Path, take, tmp_path: Path) -> None:
    x, fs, clean = take
    settings = Settings(reduction_limit_db=12.0)
    env = support.lv2_env(bundle.parent, tmp_path / "state")
    y = support.lv2apply(support.URI_2CH, x, fs, env, {"reduction_limit_db": 12.0},
                         workdir=tmp_path)
    latency = _latency(settings, fs, 2, bundle)
    expected = process_array(x, fs, settings, whole_take=False)[0]
    n = x.shape[1]
    assert y.shape == (2, n)
    # One output channel (cleaned) goes to both output ports.
    assert np.array_equal(y[0], y[1])
    # The plugin's own block comes first, as silence; the engine's frame delay follows.
    assert not np.any(y[:, : support.block_frames(bundle)])
    support.assert_f32_close(y[0, latency:], expected[: n - latency], "lv2apply vs offline")

    from liftmag.metrics import stoi

    aligned = y[0, latency:].astype(np.float64)
    # STOI (Taal et al. 2011, via pystoi) against the clean talker image.
    before = stoi(clean[: n - latency], x[0, : n - latency], fs)
    after = stoi(clean[: n - latency], aligned, fs)
    assert after > before, (before, after)


def test_lv2apply_with_every_control_at_zero_gives_the_default(bundle: Path, take,
                                                               tmp_path: Path) -> None:
    # What a host that starts every control port at 0 gives (ecasound does).
    x, fs, _ = take
    x = x[:, : 3 * fs + _lookahead(fs)]
    zeros = {p.symbol: 0.0 for p in support.ttl_module().control_ports()}
    env = support.lv2_env(bundle.parent, tmp_path / "state")
    y = support.lv2apply(support.URI_2CH, x, fs, env, zeros, workdir=tmp_path)
    latency = _latency(Settings(), fs, 2, bundle)
    expected = process_array(x, fs, Settings(), whole_take=False)[0]
    support.assert_f32_close(y[0, latency:], expected[: x.shape[1] - latency], "all zero")
    assert "reduction_limit_db 0 read as the default" in support.plugin_log(tmp_path / "state")


def test_lv2apply_4ch_keep_image(bundle: Path, tmp_path: Path) -> None:
    fs = 16000
    x = _noise(4, 2 * fs + _lookahead(fs), seed=5)
    x[:, fs // 2:] += 0.2 * np.sin(2 * np.pi * 440 * np.arange(x.shape[1] - fs // 2) / fs)
    x = x.astype(np.float32).astype(np.float64)
    settings = Settings(output_mode="keep-image", estimator="mvdr")
    ttl = support.ttl_module()
    ports = {p.field: p for p in ttl.control_ports()}
    controls = {
        "output_mode": ports["output_mode"].choices.index("keep-image"),
        "estimator": ports["estimator"].choices.index("mvdr"),
    }
    env = support.lv2_env(bundle.parent, tmp_path / "state")
    y = support.lv2apply(support.URI_4CH, x, fs, env, controls, workdir=tmp_path)
    latency = _latency(settings, fs, 4, bundle)
    expected = process_array(x, fs, settings, whole_take=False)
    n = x.shape[1]
    assert y.shape == (4, n) and expected.shape == (4, n)
    for c in range(4):
        support.assert_f32_close(y[c, latency:], expected[c, : n - latency], f"channel {c}")


def _assert_dry(y: np.ndarray, x: np.ndarray, delay: int) -> None:
    n = x.shape[1]
    assert not np.any(y[:, :delay])
    assert np.array_equal(y[:, delay:], x[:, : n - delay].astype(np.float32))


def test_injected_exception_gives_delayed_dry_output(bundle: Path, tmp_path: Path) -> None:
    fs = 16000
    x = _noise(2, fs + _lookahead(fs), seed=7)
    state = tmp_path / "state"
    fault = {support.bridge_module().TEST_FAULT_ENV: "process"}
    env = support.lv2_env(bundle.parent, state, **fault)
    y = support.lv2apply(support.URI_2CH, x, fs, env, workdir=tmp_path)
    _assert_dry(y, x, _latency(Settings(), fs, 2, bundle))
    log = support.plugin_log(state)
    assert "injected test fault" in log and "dry signal is output instead" in log


def test_failed_engine_start_passes_through(bundle: Path, tmp_path: Path) -> None:
    fs = 16000
    x = _noise(2, fs, seed=8)
    state = tmp_path / "state"
    env = support.lv2_env(bundle.parent, state,
                          **{support.bridge_module().TEST_FAULT_ENV: "import"})
    y = support.lv2apply(support.URI_2CH, x, fs, env, workdir=tmp_path)
    # No engine: the latency is the plugin's own block.
    _assert_dry(y, x, support.block_frames(bundle))
    assert "could not create the engine" in support.plugin_log(state)


def test_missing_environment_passes_through(tmp_path: Path) -> None:
    gone = tmp_path / "moved-venv" / "bin" / "python"
    moved = support.bundle(str(gone))
    fs = 16000
    x = _noise(2, fs, seed=9)
    state = tmp_path / "state"
    env = support.lv2_env(moved.parent, state)
    y = support.lv2apply(support.URI_2CH, x, fs, env, workdir=tmp_path)
    _assert_dry(y, x, support.block_frames(moved))
    log = support.plugin_log(state)
    assert str(gone) in log and "missing or moved" in log


def test_install_into_fresh_home_with_clean_environment(bundle: Path, take,
                                                        tmp_path: Path) -> None:
    home = tmp_path / "home"
    home.mkdir()
    liftmag = Path(sys.executable).parent / "liftmag"
    proc = subprocess.run(["env", "-i", f"HOME={home}", str(liftmag), "plugin", "install",
                           "--bundle", str(bundle)], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    installed = home / ".lv2" / "liftmag.lv2"
    assert (installed / support.build_module().BINARY).is_file()

    # lilv searches ~/.lv2 by default, so a host started with a bare environment finds it.
    listed = subprocess.run(["env", "-i", f"HOME={home}", shutil.which("lv2ls")],
                            capture_output=True, text=True, check=True).stdout.split()
    assert support.URI_2CH in listed

    x, fs, _ = take
    x = x[:, : 2 * fs + _lookahead(fs)]
    clean_env = ["env", "-i", f"HOME={home}", f"LV2_PATH={home / '.lv2'}"]
    y = support.lv2apply(support.URI_2CH, x, fs, {}, workdir=tmp_path, env_command=clean_env)
    latency = _latency(Settings(), fs, 2, bundle)
    expected = process_array(x, fs, Settings(), whole_take=False)[0]
    support.assert_f32_close(y[0, latency:], expected[: x.shape[1] - latency], "env -i")
    # Nothing went wrong, so nothing was logged (the log would be under ~/.cache/liftmag).
    assert not (home / ".cache" / "liftmag" / "lv2-plugin.log").exists()

    info = subprocess.run(["env", "-i", f"HOME={home}", str(liftmag), "plugin", "info"],
                          capture_output=True, text=True, check=True).stdout
    assert str(installed) in info and support.URI_4CH in info
