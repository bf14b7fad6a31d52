"""The real lift: isometry, the linear special case, and lifted second-order statistics.

Sources:
* Frobenius inner product of Hermitian matrices, <H, Y> = trace(H Y) (R. A. Horn and C. R.
  Johnson, Matrix Analysis, 2nd ed., 2013, section 5.2; recalled from memory).
* vec(a b^T) = b kron a, vec(A X B) = (B^T kron A) vec(X) (J. R. Magnus and H. Neudecker,
  Matrix Differential Calculus, 3rd ed., 2019, chapter 2; recalled from memory).
* Isserlis' theorem for circular complex Gaussian vectors, E[v_i v_j^* v_k^* v_l] =
  Phi_ij Phi_lk + Phi_ik Phi_lj (I. Reed, "On a moment theorem for complex Gaussian
  processes", IRE Trans. Inf. Theory 8(3), 1962; recalled from memory), checked here
  against Monte-Carlo sample covariances rather than trusted.
"""

from __future__ import annotations

import numpy as np
import pytest

from liftmag.estimators import linear_as_lifted, outer
from liftmag.lift import (
    crossterm_lift_covariance,
    crossterm_lift_factor,
    gaussian_lift_covariance,
    lift_snapshots,
    lift_transform,
    rho,
    unrho,
)

RNG = np.random.default_rng(20240517)


def random_hermitian(m: int, rng: np.random.Generator, n: int = 1) -> np.ndarray:
    a = rng.standard_normal((n, m, m)) + 1j * rng.standard_normal((n, m, m))
    return (a + np.conj(np.swapaxes(a, -1, -2))) / 2


@pytest.mark.parametrize("m", [1, 2, 3, 4, 6])
def test_rho_is_an_isometry_for_the_frobenius_inner_product(m: int) -> None:
    # Horn & Johnson: <H, Y>_F = trace(H^H Y) = trace(H Y) for Hermitian H.
    h = random_hermitian(m, RNG, 50)
    y = random_hermitian(m, RNG, 50)
    lhs = np.einsum("nd,nd->n", rho(h), rho(y))
    rhs = np.real(np.einsum("nij,nji->n", h, y))
    np.testing.assert_allclose(lhs, rhs, rtol=1e-13, atol=1e-12)
    np.testing.assert_allclose(unrho(rho(h)), h, rtol=0, atol=1e-14)
    assert rho(h).dtype == np.float64


@pytest.mark.parametrize("m", [2, 3, 4])
def test_linear_special_case_identity(m: int) -> None:
    # docs/estimators.md §2, check 2a: w . rho(y y^H) = |h^H y|^2 for w = rho(h h^H), since
    # y^H (h h^H) y = |h^H y|^2 (algebra: both sides are the same quadratic form).
    h = RNG.standard_normal((200, m)) + 1j * RNG.standard_normal((200, m))
    y = RNG.standard_normal((200, m)) + 1j * RNG.standard_normal((200, m))
    lifted = np.einsum("nd,nd->n", linear_as_lifted(h), lift_snapshots(y))
    direct = np.abs(np.einsum("nm,nm->n", np.conj(h), y)) ** 2
    np.testing.assert_allclose(lifted, direct, rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(lift_snapshots(y), rho(outer(y)), rtol=0, atol=1e-13)


@pytest.mark.parametrize("m", [2, 3, 4])
def test_lift_transform_is_unitary_and_maps_the_column_vec(m: int) -> None:
    # Magnus & Neudecker: vec(y y^H) = vec(y conj(y)^T) = conj(y) kron y (column stacking).
    t = lift_transform(m)
    np.testing.assert_allclose(t @ t.conj().T, np.eye(m * m), atol=1e-15)
    y = RNG.standard_normal(m) + 1j * RNG.standard_normal(m)
    vec = np.kron(np.conj(y), y)
    np.testing.assert_allclose(outer(y).reshape(-1, order="F"), vec, atol=1e-15)
    np.testing.assert_allclose(t @ vec, lift_snapshots(y), atol=1e-13)


def test_gaussian_lift_covariance_matches_monte_carlo_and_is_identity_when_white(
    random_covariance,
) -> None:
    # Isserlis (Reed 1962): Cov(vec(v v^H)) = Phi^T kron Phi, lifted by T. White, unit
    # power: identity (each lifted entry has unit variance and they are uncorrelated).
    m = 3
    np.testing.assert_allclose(gaussian_lift_covariance(np.eye(m)), np.eye(m * m), atol=1e-15)
    phi = random_covariance(m, RNG, loading=0.1)
    n = 400_000
    white = (RNG.standard_normal((n, m)) + 1j * RNG.standard_normal((n, m))) / np.sqrt(2)
    v = white @ np.linalg.cholesky(phi).T
    sample = np.cov(lift_snapshots(v), rowvar=False)
    model = gaussian_lift_covariance(phi)
    # Sampling error of a fourth-order moment from 4e5 draws: a few 1e-3 of the scale.
    assert np.max(np.abs(sample - model)) < 0.03 * np.max(np.abs(model))


def test_crossterm_lift_covariance_matches_monte_carlo() -> None:
    # docs/estimators.md §5, check 5a.
    # Closed form: Cov(vec(S g v^H + S^* v g^H)) = lambda (Phi^T kron g g^H +
    # conj(g g^H) kron Phi) for circular S independent of v. Here S has a uniform phase and
    # fixed magnitude (circular, E[S^2] = 0) and v is non-Gaussian: only second-order
    # statistics of v enter.
    m = 2
    n = 400_000
    g = np.array([1.0, np.exp(0.7j)])
    s = 1.3 * np.exp(2j * np.pi * RNG.random(n))
    raw = RNG.standard_exponential((n, m, 2)) - 1.0
    v = (raw[..., 0] + 1j * raw[..., 1]) / np.sqrt(2) @ np.array([[1.0, 0.4], [0.0, 0.8]])
    phi = v.T @ np.conj(v) / n  # E[v v^H] estimated, to leave only the fourth-order error
    cross = s[:, None, None] * g[None, :, None] * np.conj(v)[:, None, :]
    cross = cross + np.conj(np.swapaxes(cross, -1, -2))
    sample = np.cov(rho(cross), rowvar=False)
    model = 1.3**2 * crossterm_lift_covariance(g, phi)
    assert np.max(np.abs(sample - model)) < 0.02 * np.max(np.abs(model))


@pytest.mark.parametrize("m", [2, 3, 4])
def test_crossterm_factor_reproduces_the_closed_form_with_rank_2m_minus_1(m: int) -> None:
    # docs/estimators.md §5, check 5b.
    # The closed form with Phi = I (checked by Monte Carlo above) against the
    # factor the engine uses, and its rank: the Hermitian matrices g u^H + u g^H span a
    # (2M - 1)-dimensional real space (the tangent space of the rank-one Hermitian matrices at
    # g g^H: 2M real parameters of u minus the one, u = i g, that cancels; a standard fact,
    # recalled from memory and derived in crossterm_lift_factor's docstring).
    g = RNG.standard_normal((6, m)) + 1j * RNG.standard_normal((6, m))
    factor = crossterm_lift_factor(g)
    assert factor.shape == (6, m * m, 2 * m)
    np.testing.assert_allclose(
        factor @ np.swapaxes(factor, -1, -2), crossterm_lift_covariance(g, np.eye(m)), atol=1e-12
    )
    assert all(np.linalg.matrix_rank(f) == 2 * m - 1 for f in factor)
