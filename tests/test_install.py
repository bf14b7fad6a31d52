"""A plain wheel install works without the source tree (what `pip install liftmag` gives a user).

Outside reference: the wheel format (PEP 427) carries only what the build put in it, so a
missing subpackage or data file shows up here and nowhere else; the editable install the rest
of the suite runs on would hide it.
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


def run(args: list[str | Path], cwd: Path, timeout_s: float = 600) -> subprocess.CompletedProcess:
    """Run with no stdin and no PYTHONPATH, so nothing can reach the source tree."""
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}
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
