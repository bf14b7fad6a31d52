"""Renamed options keep their first spelling, hidden, for one release.

``--smoothing`` became ``--prior-smoothing``: the value is the weight of the previous frame in
the decision-directed a-priori SNR estimate (Ephraim & Malah 1984, IEEE Trans. ASSP 32(6),
their alpha; 0.98 is the value they recommend, recalled from memory), not a smoothing of the
output. ``compare --version NAME=FILE`` became ``compare --other NAME=FILE`` so that it does
not read as the program's ``--version`` (the argparse convention for printing the version).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from liftmag import batch
from liftmag.cli import _build_parser
from liftmag.commands.common import settings_from_args
from liftmag.settings import Settings


@pytest.mark.parametrize("verb", ["process", "batch"])
@pytest.mark.parametrize("spelling", ["--prior-smoothing", "--smoothing"])
def test_both_spellings_set_the_prior_weight(verb: str, spelling: str) -> None:
    extra = ["-o", "out.wav"] if verb == "process" else ["--out", "OUT"]
    args = _build_parser(verb).parse_args([verb, "take.wav", *extra, spelling, "0.9"])
    assert settings_from_args(args) == Settings(smoothing=0.9)


def test_the_default_prior_weight_is_unchanged() -> None:
    args = _build_parser("process").parse_args(["process", "take.wav", "-o", "out.wav"])
    assert settings_from_args(args).smoothing == 0.98  # Ephraim & Malah's alpha (from memory)


@pytest.mark.parametrize(("verb", "new", "old"), [
    ("process", "--prior-smoothing", "--smoothing"),
    ("compare", "--other", "--version"),
])
def test_help_shows_the_new_spelling_only(verb: str, new: str, old: str,
                                          capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        _build_parser(verb).parse_args([verb, "--help"])
    text = capsys.readouterr().out
    assert new in text
    assert f"{old} " not in text and f"[{old}" not in text


def test_compare_other_and_its_old_spelling_collect_in_order() -> None:
    args = _build_parser("compare").parse_args(
        ["compare", "take.wav", "--liftmag", "l.wav",
         "--other", "a=a.wav", "--version", "b=b.wav", "--other", "c=c.wav"]
    )
    assert args.versions == ["a=a.wav", "b=b.wav", "c=c.wav"]


def test_a_manifest_may_name_the_setting_either_way(tmp_path: Path) -> None:
    (tmp_path / "t1.wav").write_bytes(b"")
    (tmp_path / "t2.wav").write_bytes(b"")
    manifest = tmp_path / "takes.csv"
    manifest.write_text("input,output,prior_smoothing\nt1.wav,a.wav,0.9\n"
                        "t2.wav,b.wav,0.5\n")
    other = tmp_path / "old.csv"
    other.write_text("input,output,smoothing\nt1.wav,a.wav,0.9\nt2.wav,b.wav,0.5\n")
    new_plans = batch.read_manifest(manifest, tmp_path / "out")
    old_plans = batch.read_manifest(other, tmp_path / "out")
    assert [p.overrides for p in new_plans] == [(("smoothing", 0.9),), (("smoothing", 0.5),)]
    assert [p.overrides for p in old_plans] == [p.overrides for p in new_plans]
