"""The plugin in general-purpose LV2 hosts from Debian: ecasound, GStreamer's lv2 bridge and
lv2file, each given no control values.

ecasound starts every control port at 0 (observed: its log line below shows 0 for the
reduction limit); GStreamer and lv2file start them at the TTL defaults (GStreamer at the
first scale point where a port has whole-number scale points). Either way the output must be
what ``liftmag process --one-pass`` writes with default settings, delayed by the latency the plugin
reports: neither ecasound nor GStreamer's bridge compensates plugin latency, so the output
is that many frames late and the last frames are cut (seen in these runs; the latency is
read from the plugin, never assumed, because it follows the engine).
"""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from lv2host import support

from liftmag.settings import Settings

pytestmark = [
    pytest.mark.plugin,
    pytest.mark.skipif(bool(support.skip_reason()), reason=support.skip_reason()),
]

FS = 16000
CHANNELS = {support.URI_2CH: 2, support.URI_4CH: 4}


def _needs(*tools: str) -> None:
    missing = [t for t in tools if shutil.which(t) is None]
    if missing:
        pytest.skip(f"LV2 host missing: {', '.join(missing)} (`make system-deps` installs "
                    "it; CI runs these tests)")


def _take(channels: int, n: int, seed: int) -> np.ndarray:
    """Diffuse-like noise common to all microphones, each microphone's own noise, and a
    talker stand-in (a 220 Hz harmonic tone in 0.4 s bursts) from the second second on."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / FS
    x = 0.05 * (rng.standard_normal(n) + 0.6 * rng.standard_normal((channels, n)))
    voice = sum(np.sin(2 * np.pi * 220.0 * k * t) / k for k in (1, 2, 3))
    gate = (t >= 1.0) & (np.floor(t / 0.4) % 2 == 0)
    delays = np.arange(channels)  # a talker off broadside: one sample per microphone
    for c in range(channels):
        x[c] += 0.2 * np.roll(voice * gate, delays[c])
    return x.astype(np.float32).astype(np.float64)


def _case(bundle: Path, uri: str, tmp_path: Path) -> tuple[np.ndarray, int, np.ndarray, Path]:
    """(input, reported latency, the CLI's default output, input WAV) for one plugin."""
    env = support.lv2_env(bundle.parent, tmp_path / "latency-state")
    latency = support.reported_latency(bundle, uri, FS, env, tmp_path)
    assert latency > 0
    # Three seconds beyond the latency, so the comparison covers the take whatever the delay.
    n = latency + 3 * FS
    x = _take(CHANNELS[uri], n, seed=len(uri) + CHANNELS[uri])
    expected = support.cli_process(x, FS, tmp_path)
    assert expected.shape == (1, n)
    # The default processing does change the take (so matching it is not matching the input).
    residual = expected[0] - x[0]
    assert np.sqrt(np.mean(residual**2)) > 0.1 * np.sqrt(np.mean(x[0] ** 2))
    src = tmp_path / "in.wav"
    support.write_float_wav(src, x, FS)
    return x, latency, expected[0], src


def _assert_matches_cli(y: np.ndarray, channels: int, latency: int, expected: np.ndarray,
                        what: str) -> None:
    n = expected.shape[0]
    assert y.shape == (channels, n), (what, y.shape)
    # The cleaned channel goes to every output port.
    for c in range(channels):
        support.assert_f32_close(y[c, latency:], expected[: n - latency], f"{what} output {c}")


@pytest.mark.parametrize("uri", [support.URI_2CH, support.URI_4CH])
def test_ecasound_with_every_control_at_zero_gives_the_default(bundle: Path, uri: str,
                                                                tmp_path: Path) -> None:
    _needs("ecasound")
    x, latency, expected, src = _case(bundle, uri, tmp_path)
    state = tmp_path / "state"
    env = support.lv2_env(bundle.parent, state)
    dst = tmp_path / "ecasound.wav"
    support.run_ecasound(uri, src, dst, FS, x.shape[0], env)
    y = support.read_wav(dst, FS)
    _assert_matches_cli(y, x.shape[0], latency, expected, "ecasound")

    # The host really gave 0, the plugin read it as the default and says so; `liftmag
    # plugin info` shows that line.
    log = support.plugin_log(state)
    note = f"reduction_limit_db 0 read as the default {Settings().reduction_limit_db:g}"
    assert note in log, log
    assert "ignored" not in log and "defaults used" not in log, log
    info = subprocess.run([str(support.LIFTMAG_CLI), "plugin", "info", "--json"], env=env,
                          capture_output=True, text=True, check=True).stdout
    assert any(note in line for line in json.loads(info)["control_notes"])


@pytest.mark.parametrize("uri", [support.URI_2CH, support.URI_4CH])
def test_gstreamer_pipeline_matches_the_cli(bundle: Path, uri: str, tmp_path: Path) -> None:
    _needs("gst-launch-1.0", "gst-inspect-1.0")
    x, latency, expected, src = _case(bundle, uri, tmp_path)
    env = support.gst_env(bundle.parent, tmp_path / "state", tmp_path / "gst-registry.bin")
    element = support.gst_element(uri, env)
    details = subprocess.run(["gst-inspect-1.0", element], env=env, capture_output=True,
                             text=True, check=True).stdout
    # GStreamer's bridge wraps a plugin as an audio filter only when its audio ports form
    # one input and one output stream (LV2 port groups); two loose mono inputs are refused.
    assert "GstAudioFilter" in details, details
    dst = tmp_path / "gstreamer.wav"
    support.run_gstreamer(element, src, dst, env)
    y = support.read_wav(dst, FS)
    _assert_matches_cli(y, x.shape[0], latency, expected, "GStreamer")


def test_lv2file_with_ttl_defaults_matches_the_cli(bundle: Path, tmp_path: Path) -> None:
    _needs("lv2file")
    x, latency, expected, src = _case(bundle, support.URI_2CH, tmp_path)
    env = support.lv2_env(bundle.parent, tmp_path / "state")
    dst = tmp_path / "lv2file.wav"
    support.run_lv2file(support.URI_2CH, src, dst, env)
    y = support.read_wav(dst, FS)
    _assert_matches_cli(y, x.shape[0], latency, expected, "lv2file")
    # Nothing had to be replaced: lv2file starts controls at their TTL defaults.
    assert "control values replaced" not in support.plugin_log(tmp_path / "state")

