"""User-facing errors: one base class, one line on stderr, exit status 2, however liftmag is run.

Exit status 2 for a request the program cannot carry out as asked is common practice for
command-line tools (argparse exits 2 on a usage error; POSIX utilities such as grep and diff use
2 for trouble). A one-line message with no traceback is what a user can read and a script log.
"""

from __future__ import annotations

import subprocess
import sys
import types
from pathlib import Path

import pytest

from liftmag import audio_io, batch, cli, tracks
from liftmag.errors import LiftmagError, UserError


@pytest.mark.parametrize(
    "cls",
    [UserError, audio_io.AudioInputError, audio_io.AudioOutputError, audio_io.OutputExistsError,
     tracks.TrackChoiceError, batch.BatchError],
)
def test_every_user_facing_error_shares_the_base(cls: type) -> None:
    assert issubclass(cls, LiftmagError)


def test_the_old_import_path_names_the_same_class() -> None:
    assert cli.UserError is UserError


@pytest.mark.parametrize("how", ["module", "script"])
def test_missing_input_is_one_line_and_status_2_however_run(tmp_path: Path, how: str) -> None:
    # `python -m liftmag.cli` imports cli.py twice (as __main__ and as liftmag.cli); an error
    # raised by a verb must still be caught by the one handler, not end in a traceback.
    runner = (["-m", "liftmag.cli"] if how == "module"
              else ["-c", "import sys; from liftmag.cli import main; sys.exit(main())"])
    missing = tmp_path / "no such take.wav"
    out = tmp_path / "out.wav"
    proc = subprocess.run([sys.executable, *runner, "process", str(missing), "-o", str(out)],
                          capture_output=True, text=True, timeout=120, check=False)
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert "Traceback" not in proc.stderr
    assert lines[0].startswith("liftmag process: error:") and "no such file" in lines[0]
    assert not out.exists()


def test_a_base_class_error_a_verb_lets_through_is_one_line(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    # A verb that does not wrap an input error itself: the dispatcher still gives one line.
    def run(args: object) -> int:
        raise audio_io.AudioInputError("take.wav: holds NaN\nin track 2")

    fake = types.SimpleNamespace(HELP="", add_arguments=lambda parser: None, run=run)
    real_import = cli.importlib.import_module
    monkeypatch.setattr(cli.importlib, "import_module",
                        lambda name: fake if name == cli.VERBS["tracks"] else real_import(name))
    assert cli.main(["tracks"]) == 2
    err = capsys.readouterr().err
    assert err == "liftmag tracks: error: take.wav: holds NaN in track 2\n"
