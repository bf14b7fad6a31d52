"""Staged outputs (``audio_io.StagedOutputs``): files and folders in place together, or none.

The guarantees lean on POSIX rename(2) (IEEE Std 1003.1): renaming within one file system
replaces the target in one step, so a reader sees the old file or the new one, never a mix; a
non-empty directory cannot be the target of a rename (EEXIST or ENOTEMPTY), which is why a
staged directory is swapped by moving the old one aside first. flock(2) locks are released by
the kernel when their holder dies (Linux man-pages, flock(2)); the sweep relies on that.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from liftmag import audio_io
from liftmag.audio_io import StagedOutputs


def _tree(folder: Path) -> dict[str, bytes | None]:
    """Every path under ``folder`` (relative) with a file's bytes, None for a directory."""
    return {
        str(p.relative_to(folder)): (None if p.is_dir() else p.read_bytes())
        for p in sorted(folder.rglob("*"))
    }


def test_nothing_shows_under_its_final_name_before_commit(tmp_path: Path) -> None:
    out = tmp_path / "out"
    stage = StagedOutputs()
    stage.write_text(out / "report.md", "# report\n")
    stage.write_bytes(out / "figures" / "level.png", b"\x89PNG")
    bundle = stage.stage_dir(out / "thing.lv2")
    (bundle / "manifest.ttl").write_text("@prefix lv2: <http://lv2plug.in/ns/lv2core#> .\n")
    # Only hidden temporary names, all of the scheme the batch sweeper looks for.
    names = [p.name for p in out.rglob("*") if p.name != "figures"]
    assert names and all(".partial-" in n for n in names if n != "manifest.ttl")
    assert not (out / "report.md").exists() and not (out / "thing.lv2").exists()
    stage.commit()
    assert _tree(out) == {
        "figures": None,
        "figures/level.png": b"\x89PNG",
        "report.md": b"# report\n",
        "thing.lv2": None,
        "thing.lv2/manifest.ttl": b"@prefix lv2: <http://lv2plug.in/ns/lv2core#> .\n",
    }


def test_rollback_leaves_nothing_not_even_the_folders_it_made(tmp_path: Path) -> None:
    (tmp_path / "keep.txt").write_text("mine")
    before = _tree(tmp_path)
    stage = StagedOutputs()
    stage.write_text(tmp_path / "new" / "deeper" / "a.txt", "a")
    (stage.stage_dir(tmp_path / "new" / "b.lv2") / "x").write_text("x")
    stage.rollback()
    assert _tree(tmp_path) == before


@pytest.mark.parametrize("interrupt", [RuntimeError, KeyboardInterrupt])
def test_an_exception_midway_leaves_nothing(tmp_path: Path, interrupt: type) -> None:
    (tmp_path / "a.txt").write_text("old a")
    before = _tree(tmp_path)
    with pytest.raises(interrupt), StagedOutputs() as stage:
        stage.write_text(tmp_path / "a.txt", "new a")
        stage.write_text(tmp_path / "sub" / "b.txt", "new b")
        (stage.stage_dir(tmp_path / "c.lv2") / "f").write_text("f")
        raise interrupt("stopped half-way")
    assert _tree(tmp_path) == before


def test_the_with_block_commits_and_replaces_files(tmp_path: Path) -> None:
    (tmp_path / "a.txt").write_text("old a")
    with StagedOutputs() as stage:
        stage.write_text(tmp_path / "a.txt", "new a")
        assert (tmp_path / "a.txt").read_text() == "old a"  # untouched until the commit
    assert _tree(tmp_path) == {"a.txt": b"new a"}


def test_a_staged_directory_replaces_the_old_one_whole(tmp_path: Path) -> None:
    dest = tmp_path / "liftmag.lv2"
    dest.mkdir()
    (dest / "old-only.ttl").write_text("old")
    (dest / "shared.ttl").write_text("old shared")
    with StagedOutputs() as stage:
        new = stage.stage_dir(dest)
        (new / "shared.ttl").write_text("new shared")
        (new / "new-only.so").write_bytes(b"\x7fELF")
        # Until the commit the old bundle stays as it was.
        assert _tree(dest) == {"old-only.ttl": b"old", "shared.ttl": b"old shared"}
    # Swapped whole: the old-only file is gone, not merged; no aside copy is left.
    assert _tree(dest) == {"new-only.so": b"\x7fELF", "shared.ttl": b"new shared"}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["liftmag.lv2"]


def test_a_file_where_a_directory_is_staged_stops_the_commit_before_anything_moves(
    tmp_path: Path,
) -> None:
    (tmp_path / "bundle.lv2").write_text("a file, not a bundle")
    stage = StagedOutputs()
    stage.write_text(tmp_path / "first.txt", "staged first")
    stage.stage_dir(tmp_path / "bundle.lv2")
    with pytest.raises(audio_io.AudioOutputError, match="not a directory"):
        stage.commit()
    assert _tree(tmp_path) == {"bundle.lv2": b"a file, not a bundle"}


_KILLED_WRITER = """
import os, sys
from liftmag.audio_io import StagedOutputs
stage = StagedOutputs()
d = stage.stage_dir(sys.argv[1])
(d / "half.ttl").write_text("half written")
print(d, flush=True)
os._exit(9)  # dies without rollback, as a SIGKILLed process would
"""


def test_the_sweeper_removes_a_dead_writers_directory_but_not_a_live_one(
    tmp_path: Path,
) -> None:
    live = StagedOutputs()
    live_dir = live.stage_dir(tmp_path / "live.lv2")
    proc = subprocess.run([sys.executable, "-c", _KILLED_WRITER, str(tmp_path / "dead.lv2")],
                          capture_output=True, text=True, timeout=60, check=False)
    assert proc.returncode == 9, proc.stderr
    dead_dir = Path(proc.stdout.strip())
    assert dead_dir.name.startswith(audio_io.temp_prefix(tmp_path / "dead.lv2"))
    assert dead_dir.is_dir()
    assert audio_io.remove_stale_temp(dead_dir) is True
    assert not dead_dir.exists()
    assert audio_io.remove_stale_temp(live_dir) is False  # still locked by this process
    assert live_dir.is_dir()
    live.rollback()
    assert os.listdir(tmp_path) == []


def test_sha256_file_matches_a_published_test_vector(tmp_path: Path) -> None:
    # FIPS 180-2, appendix B.1: SHA-256("abc").
    path = tmp_path / "abc"
    path.write_bytes(b"abc")
    assert audio_io.sha256_file(path) == (
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    )
