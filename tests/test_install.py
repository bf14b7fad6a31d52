"""A plain wheel install works without the source tree (what `pip install liftmag` gives a user).

Outside reference: the wheel format (PEP 427) carries only what the build put in it, so a
missing subpackage or data file shows up here and nowhere else; the editable install the rest
of the suite runs on would hide it. The newcomer's path is checked to the end: from the
installed wheel alone, `liftmag plugin install` builds the LV2 bundle and lilv's tools find
and run it.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import venv
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

pytestmark = pytest.mark.slow

REPO = Path(__file__).resolve().parents[1]


def run(args: list[str | Path], cwd: Path, timeout_s: float = 600,
        **extra_env: str) -> subprocess.CompletedProcess:
    """Run with no stdin and no PYTHONPATH, so nothing can reach the source tree."""
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}
    env.update(extra_env)
    result = subprocess.run([str(a) for a in args], cwd=cwd, env=env, capture_output=True,
                            text=True, timeout=timeout_s, stdin=subprocess.DEVNULL, check=False)
    assert result.returncode == 0, f"{args}: {result.stdout[-2000:]}\n{result.stderr[-2000:]}"
    return result


@pytest.fixture(scope="module")
def installed(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A fresh virtual environment holding only the built wheel and its dependencies."""
    root = tmp_path_factory.mktemp("wheel-install")
    # pip builds in the source folder (setuptools writes build/lib there): build from a copy.
    source = root / "source"
    shutil.copytree(REPO, source, ignore=shutil.ignore_patterns(
        ".git", ".venv", "build", "*.egg-info", "__pycache__", ".*_cache", ".hypothesis",
        "liftmag-demo", "liftmag-out"))
    wheels = root / "wheels"
    run([sys.executable, "-m", "pip", "wheel", "--quiet", "--no-deps", "-w", wheels, source],
        cwd=root)
    (wheel,) = wheels.glob("liftmag-*.whl")
    env_dir = root / "env"
    venv.create(env_dir, with_pip=True)
    run([env_dir / "bin" / "python", "-m", "pip", "install", "--quiet", wheel], cwd=root)
    return env_dir


def test_wheel_holds_every_subpackage_and_runs_from_an_empty_folder(
        installed: Path, tmp_path: Path) -> None:
    where = run([installed / "bin" / "python", "-c",
                 "import liftmag, liftmag.commands; print(liftmag.__file__)"], cwd=tmp_path)
    package_file = Path(where.stdout.strip())
    assert installed in package_file.parents and REPO not in package_file.parents

    assert "process" in run([installed / "bin" / "liftmag", "--help"], cwd=tmp_path).stdout

    demo = run([installed / "bin" / "liftmag", "demo", "--json"], cwd=tmp_path)
    scores = json.loads(demo.stdout)["scores"]
    (unprocessed,) = (v for k, v in scores.items() if k.startswith("unprocessed"))
    # STOI (Taal et al. 2011, pystoi) must rise: the installed engine did the job, not a copy.
    assert scores["auto"]["stoi"] > unprocessed["stoi"] + 0.02
    take = tmp_path / "liftmag-demo" / "take.wav"
    assert take.is_file() and (tmp_path / "liftmag-demo" / "report.html").is_file()

    cleaned = tmp_path / "take-clean.wav"
    run([installed / "bin" / "liftmag", "process", take, "-o", cleaned], cwd=tmp_path)
    original, fs_in = sf.read(take)
    result, fs_out = sf.read(cleaned)
    assert fs_out == fs_in and len(result) == len(original)
    assert np.all(np.isfinite(result)) and np.std(result) > 0


def test_wheel_carries_the_plugin_sources(installed: Path, tmp_path: Path) -> None:
    where = run([installed / "bin" / "python", "-c",
                 "import liftmag_lv2.bundle as b; print(b.HERE); print(b.source_checkout())"],
                cwd=tmp_path)
    package, checkout = where.stdout.split()
    assert checkout == "None"  # an installed package builds from itself, not from a checkout
    lv2 = Path(package)
    for name in ("shim.c", "templates/plugin.ttl.in", "templates/manifest.ttl.in", "bridge.py",
                 "build_shim.py", "ttl.py", "bundle.py"):
        assert (lv2 / name).is_file(), name


@pytest.mark.plugin
def test_newcomer_installs_the_plugin_from_the_wheel(installed: Path, tmp_path: Path) -> None:
    from lv2host import support

    if support.skip_reason():
        pytest.skip(support.skip_reason())
    home, empty, dest = tmp_path / "home", tmp_path / "empty", tmp_path / "lv2"
    home.mkdir()
    empty.mkdir()
    user = {"HOME": str(home), "XDG_CACHE_HOME": str(home / ".cache"),
            "XDG_STATE_HOME": str(home / ".state")}
    proc = run([installed / "bin" / "liftmag", "plugin", "install", "--dest", dest], cwd=empty,
               **user)
    bundle = dest / "liftmag.lv2"
    assert f"into {bundle}" in proc.stdout
    info = json.loads((bundle / "build-info.json").read_text())
    assert info["venv_python"] == str(installed / "bin" / "python")
    # Built in the user's cache (the package has no checkout around it), nothing in the folder
    # the command ran in.
    assert (home / ".cache" / "liftmag" / "liftmag.lv2" / "liftmag_lv2.so").is_file()
    assert list(empty.iterdir()) == []

    # lilv's lv2ls lists every plugin it finds in LV2_PATH.
    listed = run(["lv2ls"], cwd=empty, LV2_PATH=str(dest), **user).stdout.split()
    assert support.URI_2CH in listed and support.URI_4CH in listed

    # One short render through lilv's lv2apply equals the installed CLI's --one-pass output,
    # delayed by the latency the plugin reports on its latency port.
    fs = 16000
    rng = np.random.default_rng(5)
    n = round((1.0 + 3.5) * fs)  # longer than the default 3 s look-ahead
    t = np.arange(n) / fs
    x = 0.05 * (rng.standard_normal(n) + 0.7 * rng.standard_normal((2, n)))
    x[:, n // 3:] += 0.3 * np.sin(2 * np.pi * 300.0 * t[n // 3:])
    src, wet, dry = empty / "in.wav", empty / "plugin.wav", empty / "cli.wav"
    sf.write(src, x.astype(np.float32).T, fs, subtype="FLOAT")
    run(["lv2apply", "-i", src, "-o", wet, support.URI_2CH], cwd=empty, LV2_PATH=str(dest),
        **user)
    run([installed / "bin" / "liftmag", "process", src, "-o", dry, "--one-pass"], cwd=empty,
        **user)
    y = sf.read(wet, dtype="float32", always_2d=True)[0].T
    expected = sf.read(dry, dtype="float64", always_2d=True)[0].T
    latency = support.reported_latency(bundle, support.URI_2CH, fs,
                                       support.lv2_env(dest, home / ".state"), tmp_path / "lat")
    assert 0 < latency < n
    support.assert_f32_close(y[0, latency:], expected[0, : n - latency], "installed plugin")
    assert not (home / ".state" / "liftmag" / "lv2-plugin.log").exists()
