"""``liftmag pattern``: power beam patterns of the estimators for an array and a noise field."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from liftmag.commands.common import check_figure_path
from liftmag.errors import UserError

HELP = """\
Plot power beam patterns B(theta) = d^H H d of linear and lifted estimators for a linear
array (bearings in degrees, 90 = broadside, 0 and 180 = endfire). Statistics-based
estimators (mvdr, linear-wiener, lifted-mv, lifted-wiener, lifted-affine,
lifted-wiener-fixed) are designed for a model noise field: one circular Gaussian plane wave
per --null-deg bearing, each --inr-db above the white sensor noise, which sits
--sensor-noise-db below the target's power (the target has unit power; complex Gaussian
for lifted-wiener and lifted-affine, a fixed magnitude 1 for lifted-wiener-fixed). lifted-
nulls holds the target at 1 and nulls the power from every --null-deg bearing. B can be
negative for a lifted estimator: the figure plots 10 log10 |B| and marks where B < 0.
"""

DEFAULT_ESTIMATORS = "delay-sum,mvdr,lifted-nulls,lifted-mv,lifted-wiener-fixed"
FLOOR_DB = -200.0  # stands for B = 0 in JSON, which cannot carry -inf


def parse_float_list(values: Sequence[str] | str | None, what: str) -> list[float]:
    """Floats from repeated and/or comma-separated option values; UserError if unreadable."""
    if values is None:
        return []
    if isinstance(values, str):
        values = [values]
    out: list[float] = []
    for chunk in values:
        for item in str(chunk).split(","):
            item = item.strip()
            if not item:
                continue
            try:
                x = float(item)
            except ValueError:
                raise UserError(f"{what}: {item!r} is not a number") from None
            if not np.isfinite(x):
                raise UserError(f"{what}: {item!r} is not a finite number")
            out.append(x)
    return out


def check_bearings(values: Sequence[float], what: str) -> None:
    """Bearings of a linear array are unique within 0..180 deg; refuse anything else."""
    for b in values:
        if not 0.0 <= b <= 180.0:
            raise UserError(
                f"{what} {b:g} deg is out of range: use 0..180 (90 = broadside, 0 and 180 = "
                f"endfire; a linear array cannot tell theta from -theta)"
            )


def add_arguments(parser: argparse.ArgumentParser) -> None:
    from liftmag.study import PATTERN_ESTIMATORS

    parser.add_argument(
        "--estimators", default=DEFAULT_ESTIMATORS,
        help=f"comma list from: {', '.join(PATTERN_ESTIMATORS)} (default: %(default)s)",
    )
    geo = parser.add_argument_group("geometry (a linear array along x)")
    geo.add_argument("--mics", type=int, default=None,
                     help="number of microphones of a uniform linear array (default 2)")
    geo.add_argument("--mic-spacing-m", type=float, default=None,
                     help="spacing of the uniform linear array in metres (default 0.08)")
    geo.add_argument("--positions-m", default=None,
                     help="microphone positions along x in metres, e.g. "
                     "--positions-m=-0.04,0.04 (the = keeps a leading minus sign) "
                     "(instead of --mics/--mic-spacing-m)")
    parser.add_argument("--frequency-hz", type=float, default=1000.0,
                        help="frequency of the narrowband pattern (default %(default)s)")
    parser.add_argument("--target-deg", type=float, default=90.0,
                        help="talker bearing, 0..180 deg (default %(default)s = broadside)")
    parser.add_argument("--null-deg", action="append", default=None,
                        help="interferer bearing(s) to null, repeatable or comma list "
                        "(default 0,180: both endfire sides)")
    parser.add_argument("--inr-db", type=float, default=20.0,
                        help="each interferer's power above the sensor noise, dB, for the "
                        "statistics-based estimators (default %(default)s)")
    parser.add_argument("--sensor-noise-db", type=float, default=-20.0,
                        help="white sensor-noise power relative to the target's, dB "
                        "(default %(default)s)")
    parser.add_argument("--angle-step-deg", type=float, default=0.5,
                        help="bearing grid step over 0..360 deg (default %(default)s)")
    parser.add_argument("--out", default="liftmag-pattern.png",
                        help="PNG to write (default %(default)s)")
    parser.add_argument("--json", action="store_true",
                        help="print the patterns as JSON on stdout")


def _check_out(out: Path) -> None:
    # Replaces an earlier figure, never a folder, FIFO or device.
    check_figure_path(out, "--out", force=True)


def _positions(args: argparse.Namespace) -> np.ndarray:
    from liftmag.geometry import as_positions_m, linear_array_m

    if args.positions_m is not None:
        if args.mics is not None or args.mic_spacing_m is not None:
            raise UserError("give either --positions-m or --mics/--mic-spacing-m, not both")
        xs = parse_float_list(args.positions_m, "--positions-m")
        if len(xs) < 2:
            raise UserError(f"an array needs at least 2 microphones, got {len(xs)}")
        if len(set(xs)) != len(xs):
            raise UserError("--positions-m: two microphones at the same place")
        return as_positions_m(np.asarray(xs))
    n_mics = 2 if args.mics is None else args.mics
    spacing_m = 0.08 if args.mic_spacing_m is None else args.mic_spacing_m
    if n_mics < 2:
        raise UserError(f"an array needs at least 2 microphones, got --mics {n_mics}")
    if not (np.isfinite(spacing_m) and spacing_m > 0):
        raise UserError(f"--mic-spacing-m must be a positive number of metres, got {spacing_m}")
    return linear_array_m(n_mics, spacing_m)


def compute_patterns(
    estimators: Sequence[str],
    positions_m: np.ndarray,
    frequency_hz: float,
    target_deg: float,
    null_deg: Sequence[float],
    inr_db: float,
    sensor_noise_db: float,
    angles_deg: np.ndarray,
) -> dict[str, np.ndarray]:
    """``{estimator: B(angles)}`` for the model noise field described in :data:`HELP`."""
    from liftmag import estimators as est
    from liftmag.geometry import steering_vectors
    from liftmag.lift import gaussian_lift_covariance
    from liftmag.study import ModelStatistics, lifted_weights

    g = steering_vectors(positions_m, target_deg, frequency_hz)
    m = g.shape[-1]
    sensor = 10.0 ** (sensor_noise_db / 10.0)
    phi_v = sensor * np.eye(m, dtype=complex)
    d_null = None
    if null_deg:
        d_null = np.atleast_2d(steering_vectors(positions_m, np.asarray(null_deg), frequency_hz))
        phi_v = phi_v + sensor * 10.0 ** (inr_db / 10.0) * np.einsum(
            "km,kn->mn", d_null, np.conj(d_null)
        )
    stats = ModelStatistics(
        g=g, phi_v=phi_v, c_v=gaussian_lift_covariance(phi_v), speech_power=1.0,
        speech_power_sq=2.0, null_steering=d_null,
    )
    steering = steering_vectors(positions_m, angles_deg, frequency_hz)
    out = {}
    for name in estimators:
        if name == "lifted-wiener-fixed":
            # A fixed magnitude: E[P^2] = A^4 = 1, not the Gaussian-speech 2.
            w = lifted_weights(name, ModelStatistics(
                g=g, phi_v=phi_v, c_v=stats.c_v, speech_power=1.0, speech_power_sq=1.0,
            ))
        else:
            w = lifted_weights(name, stats)
        out[name] = est.power_pattern(w, steering)
    return out


def gain_db(b: np.ndarray) -> np.ndarray:
    """``10 log10 |B|``, with ``FLOOR_DB`` standing for an exact zero."""
    return np.maximum(10.0 * np.log10(np.maximum(np.abs(b), 1e-300)), FLOOR_DB)


def run(args: argparse.Namespace) -> int:
    from liftmag.study import PATTERN_ESTIMATORS

    names = [e.strip() for e in args.estimators.split(",") if e.strip()]
    unknown = [e for e in names if e not in PATTERN_ESTIMATORS]
    if unknown or not names:
        raise UserError(
            f"unknown estimator(s) {', '.join(unknown) or '(none given)'}; choose from "
            f"{', '.join(PATTERN_ESTIMATORS)}"
        )
    _check_out(Path(args.out))
    positions_m = _positions(args)
    m = positions_m.shape[0]
    if not (np.isfinite(args.frequency_hz) and args.frequency_hz > 0):
        raise UserError(f"--frequency-hz must be positive, got {args.frequency_hz}")
    check_bearings([args.target_deg], "--target-deg")
    null_deg = (
        [0.0, 180.0] if args.null_deg is None else parse_float_list(args.null_deg, "--null-deg")
    )
    check_bearings(null_deg, "--null-deg")
    if "lifted-nulls" in names:
        if not null_deg:
            raise UserError("lifted-nulls needs at least one --null-deg bearing")
    if not (0.0 < args.angle_step_deg <= 45.0):
        raise UserError(f"--angle-step-deg must be in (0, 45], got {args.angle_step_deg}")
    angles_deg = np.arange(0.0, 360.0, args.angle_step_deg)
    try:
        patterns = compute_patterns(
            names, positions_m, args.frequency_hz, args.target_deg, null_deg, args.inr_db,
            args.sensor_noise_db, angles_deg,
        )
        at_target = compute_patterns(
            names, positions_m, args.frequency_hz, args.target_deg, null_deg, args.inr_db,
            args.sensor_noise_db, np.asarray([args.target_deg, *null_deg]),
        )
    except (ValueError, np.linalg.LinAlgError) as exc:
        raise UserError(str(exc).splitlines()[0]) from None

    from liftmag.plots import pattern_figure, pattern_sign

    spacing = ", ".join(f"{x:g}" for x in positions_m[:, 0])
    title = (
        f"{m} mics at x = [{spacing}] m, {args.frequency_hz:g} Hz, target "
        f"{args.target_deg:g} deg, nulls/interferers {', '.join(f'{b:g}' for b in null_deg)}"
        f" deg (INR {args.inr_db:g} dB)"
    )
    marks = [(args.target_deg, "target")] + [(b, "null") for b in null_deg]
    out = pattern_figure(args.out, angles_deg, patterns, title=title, marks_deg=marks)
    if args.json:
        doc = {
            "angles_deg": angles_deg.tolist(),
            "estimators": {
                name: {
                    "gain_db": gain_db(b).tolist(),
                    "sign": pattern_sign(b).tolist(),
                    "gain_at_target_db": float(gain_db(at_target[name][:1])[0]),
                    "gain_at_nulls_db": gain_db(at_target[name][1:]).tolist(),
                }
                for name, b in patterns.items()
            },
            "target_deg": args.target_deg,
            "null_deg": null_deg,
            "frequency_hz": args.frequency_hz,
            "positions_m": positions_m[:, 0].tolist(),
            "inr_db": args.inr_db,
            "sensor_noise_db": args.sensor_noise_db,
            "floor_db": FLOOR_DB,
        }
        json.dump(doc, sys.stdout)
        sys.stdout.write("\n")
    else:
        print(f"wrote {out}")
    return 0
