"""Figures for ``liftmag pattern`` and ``liftmag study`` (matplotlib, Agg, imported lazily).

Figures are built on :class:`matplotlib.figure.Figure` directly (no pyplot state), so
nothing here touches a display or global figure registry. Every function writes one PNG
and returns its path.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
from numpy.typing import ArrayLike


def pattern_sign(b: ArrayLike, relative_tolerance: float = 1e-12) -> np.ndarray:
    """Sign of ``B`` (+1, -1), with 0 where ``|B|`` is rounding noise: at most
    ``relative_tolerance`` times the largest ``|B|``, as at an exact null."""
    b = np.asarray(b, dtype=float)
    scale = np.max(np.abs(b)) if b.size else 0.0
    return np.where(np.abs(b) <= relative_tolerance * scale, 0, np.sign(b)).astype(int)


def _figure(width_in: float, height_in: float):
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    return Figure(figsize=(width_in, height_in), layout="constrained")


def pattern_figure(
    path: str | Path,
    angles_deg: ArrayLike,
    patterns: Mapping[str, ArrayLike],
    title: str = "",
    floor_db: float = -60.0,
    marks_deg: Sequence[tuple[float, str]] = (),
) -> Path:
    """Polar and dB-versus-bearing plot of power patterns ``B(theta)``.

    ``patterns`` maps an estimator id to ``B`` at ``angles_deg``. Both panels show
    ``10 log10 |B|`` clipped at ``floor_db``; where ``B < 0`` (an indefinite quadratic form
    returns negative power there) the curve is overdrawn with markers, labelled "B < 0".
    ``marks_deg`` are ``(bearing, label)`` pairs drawn as vertical lines (target, nulls).
    """
    angles = np.asarray(angles_deg, dtype=float)
    fig = _figure(12.0, 5.2)
    ax_polar = fig.add_subplot(1, 2, 1, projection="polar")
    ax_lin = fig.add_subplot(1, 2, 2)
    colours = [f"C{i}" for i in range(10)]
    # Overlapping curves (e.g. MVDR and lifted-mv in Gaussian noise) stay visible.
    styles = ["-", "--", "-.", ":"]
    negative_labelled = False
    for i, (name, b) in enumerate(patterns.items()):
        b = np.asarray(b, dtype=float)
        gain_db = np.maximum(10.0 * np.log10(np.maximum(np.abs(b), 1e-30)), floor_db)
        negative = pattern_sign(b) < 0
        colour = colours[i % len(colours)]
        style = styles[i % len(styles)]
        ax_polar.plot(np.deg2rad(angles), gain_db - floor_db, color=colour, linestyle=style,
                      label=name)
        ax_lin.plot(angles, gain_db, color=colour, linestyle=style, label=name)
        if np.any(negative):
            label = "B < 0 (marked)" if not negative_labelled else None
            negative_labelled = True
            ax_polar.plot(
                np.deg2rad(angles[negative]), gain_db[negative] - floor_db, linestyle="none",
                marker="o", markersize=2.5, markerfacecolor="none", color=colour,
            )
            ax_lin.plot(
                angles[negative], gain_db[negative], linestyle="none", marker="o",
                markersize=2.5, markerfacecolor="none", color=colour, label=label,
            )
    ticks_db = np.arange(floor_db, 0.1, 10.0 if floor_db >= -60 else 20.0)
    ax_polar.set_rticks(ticks_db - floor_db)
    ax_polar.set_yticklabels([f"{t:.0f}" for t in ticks_db], fontsize=7)
    ax_polar.set_rlim(0, max(0.0, -floor_db) + 5.0)
    ax_polar.set_title("power pattern, dB (polar)", fontsize=10)
    for bearing, label in marks_deg:
        ax_lin.axvline(bearing, color="0.6", linestyle=":", linewidth=1.0)
        ax_lin.annotate(label, (bearing, floor_db), fontsize=7, color="0.4",
                        xytext=(2, 2), textcoords="offset points")
    ax_lin.set_xlim(0, 180)
    ax_lin.set_ylim(floor_db, 10.0)
    ax_lin.set_xlabel("bearing, deg (90 = broadside)")
    ax_lin.set_ylabel("10 log10 |B|, dB")
    ax_lin.grid(True, alpha=0.3)
    ax_lin.legend(fontsize=8, loc="lower center")
    if title:
        fig.suptitle(title, fontsize=11)
    out = Path(path)
    fig.savefig(out, dpi=110)
    return out


def study_figure(
    path: str | Path,
    snr_db: ArrayLike,
    rmse: Mapping[str, ArrayLike],
    rmse_se: Mapping[str, ArrayLike] | None = None,
    title: str = "",
) -> Path:
    """RMSE of the magnitude (fraction of ``A``) versus input SNR, log scale, one line per
    estimator, with +-2 standard-error bars when ``rmse_se`` is given."""
    snr = np.asarray(snr_db, dtype=float)
    fig = _figure(7.5, 5.0)
    ax = fig.add_subplot(1, 1, 1)
    styles = ["-", "--", "-.", ":"]
    for i, (name, values) in enumerate(rmse.items()):
        values = np.asarray(values, dtype=float)
        err = None if rmse_se is None else 2.0 * np.asarray(rmse_se[name], dtype=float)
        ax.errorbar(
            snr, values, yerr=err, label=name, marker="o", markersize=3,
            linestyle=styles[i % len(styles)], capsize=2, color=f"C{i % 10}",
        )
    ax.set_yscale("log")
    ax.set_xlabel("input SNR at the reference microphone, dB")
    ax.set_ylabel("RMSE of |A^ - A|, fraction of A")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    if title:
        ax.set_title(title, fontsize=10)
    out = Path(path)
    fig.savefig(out, dpi=110)
    return out
