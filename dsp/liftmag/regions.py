"""Stretches of a take given in seconds (``START:END``): one parser, one validation.

``liftmag process --noise-region``, ``liftmag learn --region`` and ``liftmag compare
--noise-region`` read them here, and :func:`liftmag.fileproc.learn_noise` checks regions given
through the API with the same rule. Checking a region against a file's length needs the file,
so that stays with the code that opened it.
"""

from __future__ import annotations

import math

__all__ = ["check_region", "parse_region"]


def check_region(start_s: float, end_s: float) -> tuple[float, float]:
    """Return ``(start_s, end_s)`` if ``0 <= start_s < end_s`` (finite); else ``ValueError``."""
    if not (math.isfinite(start_s) and math.isfinite(end_s)) or start_s < 0 or end_s <= start_s:
        raise ValueError(f"{start_s:g}:{end_s:g} is not a forward range of times: need "
                         "0 <= START < END (seconds)")
    return float(start_s), float(end_s)


def parse_region(text: str) -> tuple[float, float]:
    """``"START:END"`` in seconds -> ``(start_s, end_s)``, checked by :func:`check_region`."""
    start, sep, end = text.partition(":")
    try:
        if not sep:
            raise ValueError
        start_s, end_s = float(start), float(end)
    except ValueError:
        raise ValueError(
            f"a region is START:END in seconds, e.g. 0.5:4.0; got {text!r}"
        ) from None
    return check_region(start_s, end_s)
