"""Microphone-array geometry and far-field steering vectors.

Conventions
-----------
* Positions in metres, shape ``(M, 3)`` (or ``(M,)`` for positions along the x axis).
* Bearings in degrees in the horizontal plane, measured from the +x axis, so that for a
  linear array along x, 90 deg is broadside and 0/180 deg are the two endfire directions.
* A plane wave arriving from unit direction ``u`` reaches microphone ``m`` earlier by
  ``p_m . u / c``; relative to the reference microphone ``r`` the steering vector is
  ``d_m = exp(+j 2 pi f (p_m - p_r) . u / c)``. With the STFT sign convention
  ``X(f) = sum x(t) exp(-j 2 pi f t)``, a delay ``tau`` is ``exp(-j 2 pi f tau)``, hence the
  plus sign for an earlier arrival.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

# Speed of sound in dry air at 20 degC, 343 m/s (handbook value, e.g. Kinsler et al.,
# Fundamentals of Acoustics, 4th ed., Table of properties of air; recalled from memory).
SPEED_OF_SOUND_M_S = 343.0


def linear_array_m(n_mics: int, spacing_m: float) -> NDArray[np.float64]:
    """Positions ``(n_mics, 3)`` of a uniform linear array along x, centred on the origin.

    Raises ``ValueError`` for fewer than two microphones or a non-positive spacing.
    """
    if int(n_mics) != n_mics or n_mics < 2:
        raise ValueError(f"an array needs at least 2 microphones, got {n_mics}")
    if not np.isfinite(spacing_m) or spacing_m <= 0:
        raise ValueError(f"microphone spacing must be a positive number of metres, got {spacing_m}")
    x_m = (np.arange(n_mics) - (n_mics - 1) / 2) * spacing_m
    return np.stack([x_m, np.zeros(n_mics), np.zeros(n_mics)], axis=1)


def as_positions_m(positions_m: ArrayLike) -> NDArray[np.float64]:
    """Validate positions and return them as ``(M, 3)`` metres (1-D input lies along x)."""
    pos = np.asarray(positions_m, dtype=float)
    if pos.ndim == 1:
        pos = np.stack([pos, np.zeros_like(pos), np.zeros_like(pos)], axis=1)
    if pos.ndim != 2 or pos.shape[1] not in (2, 3):
        raise ValueError(f"positions must have shape (M,), (M, 2) or (M, 3), got {pos.shape}")
    if pos.shape[1] == 2:
        pos = np.concatenate([pos, np.zeros((pos.shape[0], 1))], axis=1)
    if pos.shape[0] < 2:
        raise ValueError(f"an array needs at least 2 microphones, got {pos.shape[0]}")
    if not np.all(np.isfinite(pos)):
        raise ValueError("microphone positions must be finite")
    return pos


def check_bearings_deg(bearings_deg: ArrayLike) -> NDArray[np.float64]:
    """Return bearings as a float array, refusing values outside [-360, 360] degrees or NaN."""
    b = np.atleast_1d(np.asarray(bearings_deg, dtype=float))
    if not np.all(np.isfinite(b)) or np.any(np.abs(b) > 360):
        raise ValueError(f"bearings must be finite degrees within [-360, 360], got {b.tolist()}")
    return b


def steering_vectors(
    positions_m: ArrayLike,
    bearings_deg: ArrayLike,
    frequencies_hz: ArrayLike,
    reference: int = 0,
    speed_of_sound_m_s: float = SPEED_OF_SOUND_M_S,
) -> NDArray[np.complex128]:
    """Far-field, free-field relative transfer functions (steering vectors).

    Parameters
    ----------
    positions_m : (M,) or (M, 3) array
        Microphone positions in metres.
    bearings_deg : scalar or (K,) array
        Arrival bearings in degrees (90 = broadside of an array along x).
    frequencies_hz : scalar or (F,) array
        Frequencies in Hz.
    reference : int
        Reference microphone, whose entry is 1.

    Returns
    -------
    d : (F, K, M) complex array, squeezed over scalar ``frequencies_hz`` / ``bearings_deg``
        ``d[f, k, m] = exp(j 2 pi f (p_m - p_r) . u_k / c)``.
    """
    pos = as_positions_m(positions_m)
    if not 0 <= reference < pos.shape[0]:
        raise ValueError(f"reference microphone {reference} is not in 0..{pos.shape[0] - 1}")
    bearings = check_bearings_deg(bearings_deg)
    freqs = np.atleast_1d(np.asarray(frequencies_hz, dtype=float))
    theta = np.deg2rad(bearings)
    u = np.stack([np.cos(theta), np.sin(theta), np.zeros_like(theta)], axis=1)  # (K, 3)
    lead_s = (pos - pos[reference]) @ u.T / speed_of_sound_m_s  # (M, K)
    d = np.exp(2j * np.pi * freqs[:, None, None] * lead_s.T[None, :, :])
    if np.ndim(bearings_deg) == 0:
        d = d[:, 0, :]
    if np.ndim(frequencies_hz) == 0:
        d = d[0]
    return d
