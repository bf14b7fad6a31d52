"""`liftmag demo`, the command `make demo` runs: files, report and honest scores."""

from __future__ import annotations

import json
from html.parser import HTMLParser

import browser
import numpy as np
import pytest
import soundfile as sf

from liftmag.cli import main


class _Images(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.sources: list[str] = []

    def handle_starttag(self, tag, attrs):
        if tag == "img":
            self.sources.append(dict(attrs)["src"])


def test_demo_writes_audio_model_and_report_and_improves_on_the_take(tmp_path, capsys):
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert str(out.resolve()) in printed and "not the original" in printed
    take = sf.info(out / "take.wav")
    for name in ("cleaned-auto.wav", "cleaned-linear-wiener.wav", "mvdr.wav"):
        assert sf.info(out / name).frames == take.frames
    assert (out / "noise-model.npz").stat().st_size > 0
    scores = json.loads((out / "scores.json").read_text())["scores"]
    base = scores["unprocessed (capsule 1)"]
    # Scores come from pystoi (Taal et al. 2011) and pesq (ITU-T P.862.2).
    assert scores["auto"]["stoi"] > base["stoi"] and scores["auto"]["pesq_wb"] > base["pesq_wb"]
    page = _Images()
    page.feed((out / "report.html").read_text())
    assert len(page.sources) == 5  # spectrograms, removed, talkers, levels, patterns
    assert all(s.startswith("data:image/png;base64,") for s in page.sources)
    # A second run refuses to overwrite the folder without --force, and with it replaces
    # every file the first run wrote (the demo knows them all by name).
    assert main(["demo", "--out", str(out)]) == 2
    written = sorted(p.name for p in out.rglob("*"))
    assert main(["demo", "--out", str(out), "--force"]) == 0
    assert sorted(p.name for p in out.rglob("*")) == written


@pytest.mark.skipif(browser.CHROMIUM is None, reason="Debian chromium not installed")
def test_demo_report_renders_in_headless_chromium(tmp_path):
    # Reference renderer: Chromium (Debian package), as a reader of the report would open it.
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out)]) == 0
    shot = browser.screenshot(out / "report.html", tmp_path / "shot.png", tmp_path / "profile")
    from matplotlib.image import imread

    pixels = imread(str(shot))[..., :3]
    assert pixels.shape[0] >= 2000 and pixels.shape[1] >= 1200
    rows_with_content = np.mean(pixels.std(axis=(1, 2)) > 0.02)
    # Text, tables and figures fill most of a 2400-pixel-high page; a blank or broken page
    # (missing images, unstyled error text) leaves it white.
    assert rows_with_content > 0.5, rows_with_content
