"""The one region parser (``liftmag.regions``) and the one "learned means hold" rule.

A noise region is a stretch of the take in seconds from the take's start, so it runs forward
from a start at or after 0 (common practice in every editor's timeline). The parsed values are
checked against Python's own float() reading of the same text.
"""

from __future__ import annotations

import argparse
import math

import pytest

from liftmag.commands.common import parse_region as region_argument
from liftmag.regions import check_region, parse_region
from liftmag.settings import noise_mode_given_learned


@pytest.mark.parametrize(
    ("text", "expected"),
    [("0.5:4.0", (0.5, 4.0)), ("0:1.4", (0.0, 1.4)), ("1e-3:2", (0.001, 2.0)),
     (" 3 : 7 ", (3.0, 7.0))],
)
def test_regions_parse_to_seconds(text: str, expected: tuple[float, float]) -> None:
    assert parse_region(text) == expected


@pytest.mark.parametrize(
    ("text", "says"),
    [("3:2", "forward"), ("2:2", "forward"), ("-1:2", "forward"), ("nan:1", "forward"),
     ("0:inf", "forward"), ("3", "START:END"), ("a:b", "START:END"), ("1:2:3", "START:END")],
)
def test_bad_regions_are_refused_with_one_clear_line(text: str, says: str) -> None:
    with pytest.raises(ValueError, match=says) as info:
        parse_region(text)
    assert "\n" not in str(info.value)
    # The command-line type says the same through argparse's own error.
    with pytest.raises(argparse.ArgumentTypeError, match=says):
        region_argument(text)


def test_check_region_is_the_rule_parse_region_applies() -> None:
    assert check_region(0, 1) == (0.0, 1.0)
    with pytest.raises(ValueError):
        check_region(1.0, math.nextafter(1.0, 0.0))


@pytest.mark.parametrize(
    ("asked", "learned", "runs"),
    [(None, True, "hold"), (None, False, None), ("track", True, "track"),
     ("learn", True, "learn"), ("hold", False, "hold")],
)
def test_a_learned_model_is_held_unless_a_mode_is_chosen(asked, learned, runs) -> None:
    assert noise_mode_given_learned(asked, learned) == runs
