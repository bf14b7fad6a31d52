"""Engine settings: one definition from which CLI options, LV2 ports and docs are made.

Each field of :class:`Settings` carries metadata (help text, unit, range, choices, and
whether it is an LV2 control port). ``liftmag.commands.common`` builds the CLI options from
it, the plugin build writes the TTL port list from it, and a test checks that the README's
settings table matches it, so the three cannot drift.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Any

ESTIMATORS: tuple[str, ...] = (
    "auto",
    "lifted-mv",
    "lifted-wiener",
    "lifted-affine",
    "lifted-nulls",
    "lifted-wiener-fixed",
    "linear-wiener",
    "mvdr",
    "delay-sum",
    "passthrough",
)
ESTIMATOR_HELP: dict[str, str] = {
    "auto": "lifted-mv in bins whose noise shows non-Gaussian structure, linear elsewhere",
    "lifted-mv": "lifted minimum-variance unbiased power (uses fourth-order noise statistics)",
    "lifted-wiener": "quadratic Wiener power estimate for random speech power (uncentred)",
    "lifted-affine": "centred (affine) lifted LMMSE power estimate",
    "lifted-nulls": "closed-form power nulls towards --null-deg bearings (needs geometry)",
    "lifted-wiener-fixed": "iterative quadratic Wiener for a fixed unknown magnitude per bin",
    "linear-wiener": "MVDR followed by a single-channel Wiener post-filter",
    "mvdr": "MVDR beamformer alone (distortionless, no post-filter)",
    "delay-sum": "delay-and-sum beamformer followed by the shared post-filter",
    "passthrough": "reference channel unchanged (for checks and A/B)",
}
OUTPUT_MODES: tuple[str, ...] = ("cleaned", "keep-image", "taken-out")
OUTPUT_MODE_HELP: dict[str, str] = {
    "cleaned": "the cleaned reference channel (one channel)",
    "keep-image": "one spectral gain applied to every channel, so the stereo image survives",
    "taken-out": "what was removed from the reference channel, for listening checks",
}
NOISE_MODES: tuple[str, ...] = ("track", "learn", "hold")
NOISE_MODE_HELP: dict[str, str] = {
    "track": "follow the noise during speech pauses (speech-presence driven)",
    "learn": "treat everything that passes as noise and learn from it (play room tone)",
    "hold": "keep the noise model as it is",
}
PHASE_SOURCES: tuple[str, ...] = ("mvdr", "reference")


def _meta(
    help_text: str,
    *,
    unit: str = "",
    minimum: float | None = None,
    maximum: float | None = None,
    choices: tuple[str, ...] | None = None,
    lv2_port: bool = False,
    lv2_label: str = "",
    lv2_zero: str = "",
    option: str = "",
    old_options: tuple[str, ...] = (),
) -> dict[str, Any]:
    return {
        # The command-line spelling (without "--") where it differs from the field name, and
        # earlier spellings still accepted, hidden from --help, for one release.
        "option": option,
        "old_options": old_options,
        "help": help_text,
        "unit": unit,
        "minimum": minimum,
        "maximum": maximum,
        "choices": choices,
        "lv2_port": lv2_port,
        "lv2_label": lv2_label,
        # What port value 0 stands for where 0 itself would be useless or invalid: "unset"
        # (None, for optional fields) or "default". Some hosts start every control at 0.
        "lv2_zero": lv2_zero,
    }


@dataclass(frozen=True)
class Settings:
    """What the engine does with a take. Defaults suit speech at any rate from 16 to 192 kHz."""

    estimator: str = field(
        default="auto",
        metadata=_meta(
            "magnitude estimator", choices=ESTIMATORS, lv2_port=True, lv2_label="Estimator"
        ),
    )
    reduction_limit_db: float = field(
        default=24.0,
        metadata=_meta(
            "deepest reduction applied to any bin; lower keeps more room sound",
            unit="dB", minimum=0.0, maximum=40.0, lv2_port=True, lv2_label="Reduction limit",
            lv2_zero="default",
        ),
    )
    target_deg: float | None = field(
        default=None,
        metadata=_meta(
            "talker bearing (90 = broadside, needs --mic-spacing-m); unset: found from the "
            "recording", unit="deg", minimum=0.0, maximum=180.0, lv2_port=True,
            lv2_label="Talker bearing", lv2_zero="unset",
        ),
    )
    mic_spacing_m: float | None = field(
        default=None,
        metadata=_meta(
            "spacing of a uniform linear array; unset: geometry not used", unit="m",
            minimum=0.005, maximum=2.0, lv2_port=True, lv2_label="Microphone spacing",
            lv2_zero="unset",
        ),
    )
    null_deg: tuple[float, ...] = field(
        default=(),
        metadata=_meta(
            "bearings whose power lifted-nulls removes (needs --mic-spacing-m)", unit="deg",
            minimum=0.0, maximum=180.0,
        ),
    )
    noise_mode: str = field(
        default="track",
        metadata=_meta(
            "how the noise model changes while processing", choices=NOISE_MODES,
            lv2_port=True, lv2_label="Noise learning",
        ),
    )
    output_mode: str = field(
        default="cleaned",
        metadata=_meta(
            "what to write", choices=OUTPUT_MODES, lv2_port=True, lv2_label="Output"
        ),
    )
    reference_channel: int = field(
        default=0,
        metadata=_meta("channel whose sound is cleaned (0-based)", minimum=0, maximum=63),
    )
    phase_source: str = field(
        default="mvdr",
        metadata=_meta("phase of the output: the MVDR output or the reference channel",
                       choices=PHASE_SOURCES),
    )
    frame_s: float = field(
        default=0.128,
        metadata=_meta("STFT frame length (rounded per sample rate)", unit="s",
                       minimum=0.016, maximum=0.5),
    )
    speech_memory_s: float = field(
        default=2.0,
        metadata=_meta("memory of the speech statistics used to find the talker", unit="s",
                       minimum=0.2, maximum=60.0),
    )
    noise_memory_s: float = field(
        default=3.0,
        metadata=_meta("memory of the noise tracker", unit="s", minimum=0.2, maximum=600.0),
    )
    lookahead_s: float = field(
        default=3.0,
        metadata=_meta(
            "future the statistics see before a frame is cleaned (added to the latency); "
            "0 = causal", unit="s", minimum=0.0, maximum=10.0,
        ),
    )
    # On the command line --prior-smoothing (--smoothing, its first name, read as if it smoothed
    # the output; still accepted, hidden, for one release). The field keeps its name: batch
    # manifests, resume records and saved settings use it, and it has no LV2 port.
    smoothing: float = field(
        default=0.98,
        metadata=_meta(
            "weight of the previous frame in the decision-directed speech prior (against "
            "musical noise)", minimum=0.0, maximum=0.999,
            option="prior-smoothing", old_options=("smoothing",),
        ),
    )
    spike_threshold: float = field(
        default=1.5,
        metadata=_meta(
            "how far beyond the Gaussian (Marchenko-Pastur) bulk an eigenvalue of the "
            "whitened lifted noise covariance must lie to count as non-Gaussian structure",
            minimum=1.0, maximum=10.0,
        ),
    )
    diagonal_loading: float = field(
        default=1e-3,
        metadata=_meta("diagonal loading of inverted covariances, relative to their mean "
                       "eigenvalue", minimum=0.0, maximum=1.0),
    )
    bypass: bool = field(
        default=False,
        metadata=_meta("pass the reference channel through untouched", lv2_port=True,
                       lv2_label="Bypass"),
    )

    def __post_init__(self) -> None:
        for f in dataclasses.fields(self):
            value = getattr(self, f.name)
            meta = f.metadata
            if meta.get("choices") and value not in meta["choices"]:
                raise ValueError(
                    f"{f.name} must be one of {', '.join(meta['choices'])}; got {value!r}"
                )
            values = value if isinstance(value, tuple) else (value,)
            for v in values:
                if v is None or isinstance(v, (str, bool)):
                    continue
                if not math.isfinite(float(v)):
                    raise ValueError(f"{f.name} must be finite, got {v}")
                lo, hi = meta.get("minimum"), meta.get("maximum")
                if (lo is not None and v < lo) or (hi is not None and v > hi):
                    unit = f" {meta['unit']}" if meta.get("unit") else ""
                    raise ValueError(f"{f.name} must be within {lo}..{hi}{unit}, got {v}")
        if self.estimator == "lifted-nulls" and (self.mic_spacing_m is None or not self.null_deg):
            raise ValueError("lifted-nulls needs the geometry (mic_spacing_m) and null bearings")
        if self.target_deg is not None and self.mic_spacing_m is None:
            raise ValueError("a talker bearing needs the microphone spacing as well")

    def replace(self, **changes: Any) -> Settings:
        """A copy with some fields changed (validated again)."""
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able dict (tuples become lists)."""
        return {
            k: list(v) if isinstance(v, tuple) else v for k, v in dataclasses.asdict(self).items()
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Settings:
        """Inverse of :meth:`to_dict`; unknown keys are refused."""
        names = {f.name for f in dataclasses.fields(cls)}
        unknown = set(data) - names
        if unknown:
            raise ValueError(f"unknown setting(s): {', '.join(sorted(unknown))}")
        clean = {k: tuple(v) if isinstance(v, list) else v for k, v in data.items()}
        return cls(**clean)


def settings_fields() -> tuple[dataclasses.Field, ...]:
    """The fields of :class:`Settings`, with their metadata, in declaration order."""
    return dataclasses.fields(Settings)


def noise_mode_given_learned(noise_mode: str | None, learned: bool) -> str | None:
    """The noise mode to run with: a learned model or region is held unless one is chosen.

    Room tone the user pointed at is better than what the tracker finds on its own, so with a
    learned model (``--noise-model``, ``--room-tone``, ``--noise-region``) the noise is held as
    learned; an explicit ``noise_mode`` (``track`` to keep following the take) wins. Without a
    learned model the choice is left to :class:`Settings`' default (None here).
    """
    if learned and noise_mode is None:
        return "hold"
    return noise_mode
