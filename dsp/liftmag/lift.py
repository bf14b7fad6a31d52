"""The real lift of Hermitian matrices and the second-order statistics of lifted snapshots.

For a snapshot ``y`` in C^M the outer product ``Y = y y^H`` is Hermitian. Its *real lift* is

    rho(Y) = [Y_11, ..., Y_MM, sqrt2 Re Y_ij, sqrt2 Im Y_ij (i < j)]  in R^(M^2),

ordered as: the M diagonal entries, then for every pair i < j (row-major) the real part,
then for every pair the imaginary part. It is an isometry of the space of Hermitian
matrices with the Frobenius inner product onto R^(M^2):

    rho(H) . rho(Y) = trace(H Y)     for Hermitian H, Y,

so a quadratic form ``y^H H y`` is the real inner product ``rho(H) . rho(y y^H)``. Linearly,
``rho(Y) = T vec(Y)`` with ``vec`` stacking columns (``vec(y y^H) = conj(y) kron y``) and
``T`` the unitary matrix returned by :func:`lift_transform`.

All functions broadcast over leading axes (bins, frames, ...).
"""

from __future__ import annotations

from functools import cache

import numpy as np
from numpy.typing import ArrayLike, NDArray

SQRT2 = np.sqrt(2.0)


@cache
def _pairs(n_mics: int) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    i, j = np.triu_indices(n_mics, k=1)
    return i, j


def lift_dimension(n_mics: int) -> int:
    """Dimension M^2 of the real lift for M microphones."""
    return n_mics * n_mics


def n_mics_from_lift(dimension: int) -> int:
    """Inverse of :func:`lift_dimension`; raises ``ValueError`` if ``dimension`` is not a square."""
    m = round(np.sqrt(dimension))
    if m * m != dimension or m < 1:
        raise ValueError(f"a lifted vector has M^2 entries, got {dimension}")
    return m


def rho(h: ArrayLike) -> NDArray[np.float64]:
    """Real lift of Hermitian matrices ``(..., M, M)`` -> ``(..., M^2)``.

    Only the diagonal and the upper triangle are read; the input is assumed Hermitian.
    """
    h = np.asarray(h)
    if h.ndim < 2 or h.shape[-1] != h.shape[-2]:
        raise ValueError(f"expected square matrices (..., M, M), got shape {h.shape}")
    m = h.shape[-1]
    i, j = _pairs(m)
    diag = np.real(np.diagonal(h, axis1=-2, axis2=-1))
    upper = h[..., i, j]
    return np.concatenate([diag, SQRT2 * upper.real, SQRT2 * upper.imag], axis=-1)


def unrho(w: ArrayLike) -> NDArray[np.complex128]:
    """Inverse of :func:`rho`: ``(..., M^2)`` real vectors -> Hermitian ``(..., M, M)``."""
    w = np.asarray(w, dtype=float)
    m = n_mics_from_lift(w.shape[-1])
    i, j = _pairs(m)
    n_pairs = len(i)
    h = np.zeros((*w.shape[:-1], m, m), dtype=complex)
    k = np.arange(m)
    h[..., k, k] = w[..., :m]
    upper = (w[..., m : m + n_pairs] + 1j * w[..., m + n_pairs :]) / SQRT2
    h[..., i, j] = upper
    h[..., j, i] = np.conj(upper)
    return h


def lift_snapshots(y: ArrayLike) -> NDArray[np.float64]:
    """``rho(y y^H)`` for snapshots ``y`` of shape ``(..., M)``, without forming ``y y^H``.

    Entries: ``|y_i|^2``, then ``sqrt2 Re(y_i conj(y_j))`` and ``sqrt2 Im(y_i conj(y_j))``
    for i < j.
    """
    y = np.asarray(y)
    m = y.shape[-1]
    i, j = _pairs(m)
    n_pairs = len(i)
    # Written one lifted entry at a time into contiguous planes and returned as a view with
    # the entries last: writing the entries interleaved (stride M^2) cost 2.5-4x more at
    # M = 4. Gathering all pairs at once with fancy indexing costs a (..., pairs) complex
    # temporary and runs 1.4-1.5x slower (M = 2, 4).
    planes = np.empty((m * m, *y.shape[:-1]))
    for k in range(m):  # planes[k, ...]: a view even for one snapshot
        channel = y[..., k]
        np.multiply(channel.real, channel.real, out=planes[k, ...])
        planes[k, ...] += channel.imag**2
    for p, (a, b) in enumerate(zip(i, j, strict=True)):
        cross = y[..., a] * np.conj(y[..., b])
        np.multiply(cross.real, SQRT2, out=planes[m + p, ...])
        np.multiply(cross.imag, SQRT2, out=planes[m + n_pairs + p, ...])
    return np.moveaxis(planes, 0, -1)


@cache
def _lift_transform_cached(n_mics: int) -> NDArray[np.complex128]:
    m = n_mics
    i, j = _pairs(m)
    n_pairs = len(i)
    t = np.zeros((m * m, m * m), dtype=complex)
    k = np.arange(m)
    t[k, k + k * m] = 1.0  # column-major vec: Y_ij sits at i + j*M
    rows_re = m + np.arange(n_pairs)
    rows_im = m + n_pairs + np.arange(n_pairs)
    t[rows_re, i + j * m] = 1 / SQRT2
    t[rows_re, j + i * m] = 1 / SQRT2
    t[rows_im, i + j * m] = -1j / SQRT2
    t[rows_im, j + i * m] = 1j / SQRT2
    t.setflags(write=False)
    return t


def lift_transform(n_mics: int) -> NDArray[np.complex128]:
    """Unitary ``T`` (M^2 x M^2) with ``rho(Y) = T vec(Y)`` for Hermitian ``Y``.

    ``vec`` stacks columns, so ``vec(y y^H) = kron(conj(y), y)``.
    """
    return _lift_transform_cached(int(n_mics))


def lift_covariance(complex_cov: ArrayLike) -> NDArray[np.float64]:
    """Map a covariance of ``vec(Y)`` (..., M^2, M^2) to the covariance of ``rho(Y)``.

    ``Cov(rho) = T Cov(vec) T^H``, real for a Hermitian random matrix ``Y``.
    """
    c = np.asarray(complex_cov)
    t = lift_transform(n_mics_from_lift(c.shape[-1]))
    out = t @ c @ t.conj().T
    return np.real(out + np.swapaxes(out, -1, -2)) / 2


def _kron_last2(a: NDArray, b: NDArray) -> NDArray:
    """Kronecker product of the last two axes, broadcasting over leading axes."""
    m1, n1 = a.shape[-2:]
    m2, n2 = b.shape[-2:]
    k = a[..., :, None, :, None] * b[..., None, :, None, :]
    return k.reshape(*k.shape[:-4], m1 * m2, n1 * n2)


def gaussian_lift_covariance(phi: ArrayLike) -> NDArray[np.float64]:
    """Covariance of ``rho(v v^H)`` for circular complex Gaussian ``v ~ CN(0, Phi)``.

    By Isserlis' theorem ``Cov(vec(v v^H)) = Phi^T kron Phi``; lifted with :func:`lift_covariance`.
    In the whitened domain (``Phi = I``) this is the identity.
    """
    phi = np.asarray(phi)
    return lift_covariance(_kron_last2(np.swapaxes(phi, -1, -2), phi))


def crossterm_lift_covariance(g: ArrayLike, phi: ArrayLike) -> NDArray[np.float64]:
    """Covariance, per unit speech power, of the lifted cross terms ``S g v^H + S* v g^H``.

    For circular ``S`` (``E[S^2] = 0``), independent of ``v`` with ``E[v v^H] = Phi``:
    ``Cov(vec) = E|S|^2 (Phi^T kron g g^H + conj(g g^H) kron Phi)``. Returns the lifted form
    for ``E|S|^2 = 1``; multiply by the speech power.
    """
    g = np.asarray(g)
    phi = np.asarray(phi)
    ggh = g[..., :, None] * np.conj(g[..., None, :])
    c = _kron_last2(np.swapaxes(phi, -1, -2), ggh) + _kron_last2(np.conj(ggh), phi)
    return lift_covariance(c)


def crossterm_lift_factor(g: ArrayLike) -> NDArray[np.float64]:
    """Factor ``F`` (..., M^2, 2M) with ``F F^T = crossterm_lift_covariance(g, I)``.

    With white noise the cross terms are ``g u^H + u g^H`` for ``u ~ CN(0, I)``. Writing
    ``u = sum_m (x_m + i y_m) e_m`` with real parts of variance 1/2 gives the columns
    ``rho(g e_m^H + e_m g^H) / sqrt2`` and ``rho(i (e_m g^H - g e_m^H)) / sqrt2``. Their span
    has dimension 2M - 1 (the imaginary direction along ``g`` cancels), which is why a
    lifted estimator's speech-dependent noise term has rank 2M - 1 out of M^2.
    """
    g = np.asarray(g)
    m = g.shape[-1]
    eye = np.eye(m)
    # A[..., k, i, j] = g_i delta_jk, the (k-th) matrix g e_k^H.
    g_ek = g[..., None, :, None] * eye[:, None, :]
    ek_g = np.conj(np.swapaxes(g_ek, -1, -2))  # e_k g^H
    real_part = rho(g_ek + ek_g)
    imag_part = rho(1j * (ek_g - g_ek))
    return np.swapaxes(np.concatenate([real_part, imag_part], axis=-2), -1, -2) / SQRT2
