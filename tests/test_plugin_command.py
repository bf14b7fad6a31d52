"""``liftmag plugin install|info`` on stand-in bundles (no compiler or LV2 tools needed)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from liftmag.cli import main


def _fake_bundle(folder: Path, python: str = "/usr/bin/true") -> Path:
    bundle = folder / "liftmag.lv2"
    bundle.mkdir(parents=True)
    (bundle / "manifest.ttl").write_text("# stand-in\n")
    (bundle / "build-info.json").write_text(json.dumps({
        "venv_python": python, "block_frames": 4096, "liftmag_version": "test",
        "plugins": [{"uri": "urn:liftmag:dialogue-2ch", "channels": 2}],
    }))
    return bundle


def test_install_copies_and_replaces_an_earlier_install(tmp_path: Path,
                                                        capsys: pytest.CaptureFixture) -> None:
    bundle = _fake_bundle(tmp_path / "src")
    dest = tmp_path / "lv2"
    assert main(["plugin", "install", "--dest", str(dest), "--bundle", str(bundle)]) == 0
    installed = dest / "liftmag.lv2"
    assert (installed / "manifest.ttl").read_text() == "# stand-in\n"
    (bundle / "manifest.ttl").write_text("# newer\n")
    (installed / "stale.txt").write_text("left over")
    assert main(["plugin", "install", "--dest", str(dest), "--bundle", str(bundle)]) == 0
    assert (installed / "manifest.ttl").read_text() == "# newer\n"
    assert not (installed / "stale.txt").exists()
    assert sorted(p.name for p in dest.iterdir()) == ["liftmag.lv2"]  # no staging left
    out = capsys.readouterr().out
    assert "urn:liftmag:dialogue-2ch" in out and "offline" in out


def test_install_refuses_to_replace_a_foreign_folder(tmp_path: Path,
                                                     capsys: pytest.CaptureFixture) -> None:
    bundle = _fake_bundle(tmp_path / "src")
    foreign = tmp_path / "lv2" / "liftmag.lv2"
    foreign.mkdir(parents=True)
    (foreign / "precious.txt").write_text("keep me")
    assert main(["plugin", "install", "--dest", str(foreign.parent),
                 "--bundle", str(bundle)]) == 2
    assert (foreign / "precious.txt").read_text() == "keep me"
    assert "not a liftmag bundle" in capsys.readouterr().err


def test_info_reports_a_missing_interpreter(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                            capsys: pytest.CaptureFixture) -> None:
    dest = tmp_path / "lv2"
    _fake_bundle(dest, python=str(tmp_path / "gone" / "bin" / "python"))
    monkeypatch.setenv("HOME", str(tmp_path / "home"))  # info also looks in ~/.lv2
    monkeypatch.setenv("LV2_PATH", str(dest))
    monkeypatch.setenv("XDG_STATE_HOME", str(tmp_path / "state"))
    assert main(["plugin", "info", "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    [record] = report["bundles"]
    assert record["bundle"] == str((dest / "liftmag.lv2").resolve())
    assert record["python_present"] is False and record["in_lv2_path"] is True
    assert report["log_file"] == str(tmp_path / "state" / "liftmag" / "lv2-plugin.log")
    assert main(["plugin", "info"]) == 0
    assert "MISSING" in capsys.readouterr().out


def test_info_shows_the_latest_replaced_control_values(tmp_path: Path,
                                                       monkeypatch: pytest.MonkeyPatch,
                                                       capsys: pytest.CaptureFixture) -> None:
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    monkeypatch.setenv("LV2_PATH", str(tmp_path / "lv2"))
    monkeypatch.setenv("XDG_STATE_HOME", str(tmp_path / "state"))
    log = tmp_path / "state" / "liftmag" / "lv2-plugin.log"
    log.parent.mkdir(parents=True)
    lines = [f"2026-01-01T00:00:0{k}Z [1] instance {k}: control values replaced: "
             f"reduction_limit_db 0 read as the default 18" for k in range(7)]
    log.write_text("\n".join([*lines[:3], "2026-01-01T00:00:09Z [1] unrelated", *lines[3:]])
                   + "\n")
    assert main(["plugin", "info", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["control_notes"] == lines[-5:]
    assert main(["plugin", "info"]) == 0
    out = capsys.readouterr().out
    assert lines[-1] in out and lines[1] not in out and "unrelated" not in out


@pytest.mark.parametrize("how", ["empty PATH", "CC not found"])
def test_install_without_a_compiler_says_what_is_needed(how: str, tmp_path: Path) -> None:
    # setuptools compiles with $CC, else with the compiler Python was built with, found on
    # PATH: take either away and the build cannot run.
    env = {k: v for k, v in os.environ.items() if k not in ("CC", "PYTHONPATH")}
    env.update(HOME=str(tmp_path / "home"), XDG_CACHE_HOME=str(tmp_path / "cache"))
    if how == "empty PATH":
        (tmp_path / "bin").mkdir()
        env["PATH"] = str(tmp_path / "bin")
    else:
        env["CC"] = "liftmag-test-no-such-cc"
    dest = tmp_path / "lv2"
    liftmag = Path(sys.executable).parent / "liftmag"
    proc = subprocess.run([str(liftmag), "plugin", "install", "--rebuild", "--dest", str(dest)],
                          env=env, capture_output=True, text=True, stdin=subprocess.DEVNULL,
                          timeout=300)
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert "needs a C compiler" in lines[0] and "missing: a C compiler" in lines[0]
    assert not dest.exists() and not (tmp_path / "cache").exists()
