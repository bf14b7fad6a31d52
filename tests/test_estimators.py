"""Linear and lifted estimators held to docs/estimators.md and to textbook facts.

Sources:
* Van Trees, Optimum Array Processing (Wiley 2002), ch. 6: delay-and-sum and MVDR are
  distortionless (h^H g = 1); MVDR minimises h^H Phi h under that constraint, with minimum
  1 / (g^H Phi^-1 g) (recalled from memory).
* docs/estimators.md (this repository, with the published references): each test below
  names the check it holds; the derivations are repeated in the comments.
* scipy.optimize as an independent optimiser for the "no linear h does better" claims.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize

from liftmag import estimators as est
from liftmag.geometry import SPEED_OF_SOUND_M_S, linear_array_m, steering_vectors
from liftmag.lift import (
    crossterm_lift_covariance,
    gaussian_lift_covariance,
    lift_snapshots,
    rho,
)
from liftmag.study import noise_field

RNG = np.random.default_rng(7)


def two_mic(frequency_hz: float, spacing_m: float = 0.08):
    pos = linear_array_m(2, spacing_m)
    g = steering_vectors(pos, 90.0, frequency_hz)
    d = steering_vectors(pos, [0.0, 180.0], frequency_hz)
    return pos, g, d


# --------------------------------------------------------------------------- linear


def test_delay_sum_and_mvdr_are_distortionless_and_mvdr_minimises_noise(
    crandn, random_covariance
) -> None:
    # Van Trees ch. 6: h^H g = 1; MVDR output noise h^H Phi h = 1/(g^H Phi^-1 g) is the
    # minimum over all distortionless h.
    m = 4
    g = np.exp(1j * RNG.uniform(0, 2 * np.pi, m))
    g[0] = 1.0
    phi = random_covariance(m, RNG, loading=0.05)
    for h in (est.delay_sum_weights(g), est.mvdr_weights(g, phi)):
        np.testing.assert_allclose(np.vdot(h, g), 1.0, atol=1e-13)
    h = est.mvdr_weights(g, phi)
    noise = np.real(np.vdot(h, phi @ h))
    np.testing.assert_allclose(noise, est.mvdr_residual_power(g, phi), rtol=1e-12)
    np.testing.assert_allclose(noise, 1 / np.real(np.vdot(g, np.linalg.solve(phi, g))),
                               rtol=1e-12)
    # Any other distortionless h = h_mvdr + u with u^H g = 0 has more output noise.
    u = crandn(RNG, 500, m)
    u = u - (np.einsum("nm,m->n", np.conj(u), g) / np.vdot(g, g)).conj()[:, None] * g
    others = h + u
    other_noise = np.real(np.einsum("nm,mk,nk->n", np.conj(others), phi, others))
    assert np.all(other_noise >= noise * (1 - 1e-12))


# ------------------------------------------------------------------------ lifted nulls


@pytest.mark.parametrize("frequency_hz", [300.0, 1000.0, 1071.875, 1800.0])
def test_two_mic_closed_form_power_nulls(frequency_hz: float) -> None:
    # docs/estimators.md §3, check 3b (derived).
    # With phi0 = 2 pi f delta / c, H = [[s/2, c], [c, s/2]],
    # c = 1/(2(1 - cos phi0)), s = -cos phi0/(1 - cos phi0) gives B(90) = 1 and
    # B(0) = B(180) = 0 (derived: B(theta) = s + 2c cos(phi0 cos theta)). It is also the
    # minimum-norm solution: the constraints leave only the direction rho([[1, 0], [0, -1]])
    # free, and H has equal diagonal entries, i.e. no component along it.
    _, g, d = two_mic(frequency_hz)
    phi0 = 2 * np.pi * frequency_hz * 0.08 / SPEED_OF_SOUND_M_S
    c = 1 / (2 * (1 - np.cos(phi0)))
    s = -np.cos(phi0) / (1 - np.cos(phi0))
    h_closed = np.array([[s / 2, c], [c, s / 2]], dtype=complex)
    w = est.lifted_nulls_weights(g, d)
    np.testing.assert_allclose(w, rho(h_closed), atol=1e-12 * np.max(np.abs(w)))
    pattern = est.power_pattern(w, np.concatenate([g[None], d]))
    np.testing.assert_allclose(pattern, [1.0, 0.0, 0.0], atol=1e-12 * np.max(np.abs(w)))


@pytest.mark.parametrize("m", [2, 3, 4])
def test_ula_allows_2m_minus_2_power_nulls_and_refuses_2m_minus_1(m: int) -> None:
    # docs/estimators.md §3, check 3a (derived): for a far-field ULA, d d^H is Hermitian Toeplitz
    # with unit diagonal, a (2M-1)-dimensional real family; target plus 2M-2 nulls fill it.
    pos = linear_array_m(m, 0.05)
    f_hz = 1500.0
    g = steering_vectors(pos, 90.0, f_hz)
    bearings = np.linspace(0.0, 180.0, 2 * m + 1)
    bearings = bearings[np.abs(bearings - 90.0) > 1.0]  # 2M distinct bearings beside 90
    feasible = bearings[: 2 * m - 2]
    w = est.lifted_nulls_weights(g, steering_vectors(pos, feasible, f_hz))
    b_target = est.power_pattern(w, g[None])[0]
    b_nulls = est.power_pattern(w, steering_vectors(pos, feasible, f_hz))
    np.testing.assert_allclose(b_target, 1.0, atol=1e-9)
    assert np.all(10 * np.log10(np.abs(b_nulls) + 1e-300) < -60.0)
    with pytest.raises(ValueError, match=f"at most 2M-2 = {2 * m - 2}"):
        est.lifted_nulls_weights(g, steering_vectors(pos, bearings[: 2 * m - 1], f_hz))


def test_no_linear_two_mic_beamformer_beats_cos_squared_at_its_worse_endfire_side() -> None:
    # docs/estimators.md §3, check 3c (derived).
    # With h^H g = 1 at 90 deg, min_h max(|h^H d(0)|^2, |h^H d(180)|^2) =
    # cos^2(phi0/2). Derived: write a = conj(h), a1 = 1 - a2; the responses are
    # r_pm = 1 + a2 (exp(+-j phi0) - 1). Conjugating a2 swaps |r_+| and |r_-|, and the worse
    # of the two is convex in a2, so a real a2 is optimal; minimising
    # |1 + a2 (exp(j phi0) - 1)|^2 over real a2 gives a2 = 1/2 (delay-and-sum) and the value
    # ((1 + cos phi0)/2)^2 + sin^2(phi0)/4 = cos^2(phi0/2).
    quarter_wave_hz = SPEED_OF_SOUND_M_S / (4 * 0.08)  # phi0 = pi/2
    best_by_f = {}
    for f_hz in (400.0, 1000.0, quarter_wave_hz, 1600.0):
        _, g, d = two_mic(f_hz)
        phi0 = 2 * np.pi * f_hz * 0.08 / SPEED_OF_SOUND_M_S

        def worse_side(x: np.ndarray, g=g, d=d) -> float:
            a2 = x[0] + 1j * x[1]
            h = np.conj(np.array([1.0 - a2, a2]))
            h = h / np.conj(np.vdot(h, g))  # g = [1, 1] up to rounding: make h^H g = 1 exact
            return float(np.max(np.abs(d.conj() @ h) ** 2))

        best = min(
            optimize.minimize(worse_side, x0, method="Nelder-Mead",
                              options={"xatol": 1e-10, "fatol": 1e-14, "maxiter": 4000}).fun
            for x0 in RNG.uniform(-2, 2, (8, 2))
        )
        best_by_f[f_hz] = best
        bound = np.cos(phi0 / 2) ** 2
        np.testing.assert_allclose(best, bound, rtol=1e-6)
        grid = RNG.uniform(-3, 3, (2000, 2))
        assert min(worse_side(x) for x in grid) >= bound * (1 - 1e-9)
    # phi0 = pi/2: cos^2(pi/4) = 1/2, i.e. 10 log10(1/2) = -3.0103 dB.
    assert round(10 * np.log10(np.cos(np.pi / 4) ** 2), 2) == -3.01
    np.testing.assert_allclose(10 * np.log10(best_by_f[quarter_wave_hz]), -3.0103, atol=1e-4)


def test_point_null_width_at_quarter_wave_endfire_phase() -> None:
    # docs/estimators.md §3, check 3b.
    # At phi0 = pi/2 the closed-form pattern is below -40 dB only within
    # about +-0.65 deg of each null. Derived: B(theta) = cos((pi/2) cos theta) ~ pi theta^2/4
    # near theta = 0, so B < 1e-4 for theta < sqrt(4e-4/pi) rad = 0.6466 deg. Measured here.
    f_hz = SPEED_OF_SOUND_M_S / (4 * 0.08)
    pos, g, d = two_mic(f_hz)
    w = est.lifted_nulls_weights(g, d)
    offsets_deg = np.arange(0.0, 3.0, 1e-4)
    widths = []
    for null_deg, sign in ((0.0, 1.0), (180.0, -1.0)):
        bearings = null_deg + sign * offsets_deg
        b = np.abs(est.power_pattern(w, steering_vectors(pos, bearings, f_hz)))
        below = b < 1e-4
        assert below[0]
        widths.append(offsets_deg[np.argmin(below)])  # first offset at or above -40 dB
    expected_deg = np.rad2deg(np.sqrt(4e-4 / np.pi))
    np.testing.assert_allclose(widths, expected_deg, atol=2e-3)
    assert all(0.6 < w_deg < 0.7 for w_deg in widths)


# ------------------------------------------------------------ lifted minimum variance


@pytest.mark.parametrize("m", [2, 3, 4])
def test_lifted_mv_equals_mvdr_power_minus_residual_in_gaussian_noise(
    m: int, crandn, random_covariance
) -> None:
    # docs/estimators.md §5, check 5c
    # (derived there: in the noise-whitened domain the Gaussian lifted noise
    # covariance is the identity and rho_g is an eigenvector of K, since
    # K(X) = g g^H X + X g g^H): P_mv = |h_mvdr^H y|^2 - 1/(g^H Phi^-1 g) for every prior.
    g = crandn(RNG, m)
    g = g / g[0]
    phi = random_covariance(m, RNG, loading=0.05)
    c_v = gaussian_lift_covariance(phi)
    k = crossterm_lift_covariance(g, phi)
    rho_g = rho(est.outer(g))
    y = crandn(RNG, 300, m) * 3
    h = est.mvdr_weights(g, phi)
    mvdr_power = np.abs(est.apply_linear(h, y)) ** 2 - est.mvdr_residual_power(g, phi)
    for prior in (1e-3, 0.3, 1.0, 17.0, 1e4):
        w, var = est.lifted_mv_weights(rho_g, c_v, k, prior)
        p_mv = est.apply_lifted(w, lift_snapshots(y) - rho(phi))
        np.testing.assert_allclose(p_mv, mvdr_power, rtol=1e-9, atol=1e-9 * np.max(mvdr_power))
        # Its variance at P = prior: Var(|S + n|^2 - r) = 2 P r + r^2 for n ~ CN(0, r).
        r = est.mvdr_residual_power(g, phi)
        np.testing.assert_allclose(var, 2 * prior * r + r**2, rtol=1e-9)


# --------------------------------------------- quadratic Wiener versus lifted linear


def _fixed_stats(kind: str, m: int, a2: float, noise_power: float):
    pos = linear_array_m(m, 0.08)
    field = noise_field(kind, pos, 1000.0)
    g = steering_vectors(pos, 90.0, 1000.0)
    phi = noise_power * field.phi_v
    c_v = noise_power**2 * field.c_v
    rho_g = rho(est.outer(g))
    mu_v = rho(phi)
    k = crossterm_lift_covariance(g, phi)
    mean = a2 * rho_g + mu_v
    second = c_v + a2 * k + np.outer(mean, mean)
    return pos, g, phi, c_v, rho_g, mu_v, k, mean, second


def _mse_a2(w: np.ndarray, a2: float, mean: np.ndarray, second: np.ndarray) -> float:
    # E|A^2 - w . rho|^2 = A^4 - 2 A^2 w . E[rho] + w^T E[rho rho^T] w.
    return float(a2**2 - 2 * a2 * w @ mean + w @ second @ w)


def _best_linear_h(loss, m: int, rng: np.random.Generator) -> float:
    def f(x: np.ndarray) -> float:
        return loss(rho(est.outer(x[:m] + 1j * x[m:])))

    return min(optimize.minimize(f, x0, method="BFGS").fun
               for x0 in rng.standard_normal((6, 2 * m)) * 0.5)


@pytest.mark.parametrize(("kind", "m", "snr_db"), [
    ("gaussian", 2, 0.0), ("exponential", 2, -5.0), ("exponential", 3, 5.0),
    ("two-interferers", 2, 0.0), ("laplace", 2, 10.0),
])
def test_quadratic_wiener_beats_every_lifted_linear_estimator_on_a_squared(
    kind: str, m: int, snr_db: float, crandn,
) -> None:
    # docs/estimators.md §2 and §6, check 6b.
    # Linear estimators are the rank-one subset H = h h^H of the quadratic
    # ones, so the MSE-optimal quadratic form (normal equations w = A^2 R^-1 E[rho]) cannot
    # do worse on A^2. Analytic MSE from the exact second-moment matrix R.
    a2 = 1.0
    noise_power = 10 ** (-snr_db / 10)
    _, g, phi, c_v, rho_g, mu_v, k, mean, second = _fixed_stats(kind, m, a2, noise_power)
    w_q = est.quadratic_wiener_fixed_weights(a2, rho_g, mu_v, c_v, k)
    mse_q = _mse_a2(w_q, a2, mean, second)
    np.testing.assert_allclose(second @ w_q, a2 * mean, rtol=1e-9)  # normal equations
    phi_y = a2 * est.outer(g) + phi
    named = {
        "delay-sum": est.delay_sum_weights(g),
        "mvdr": est.mvdr_weights(g, phi),
        "linear-wiener": est.linear_wiener_weights(g, phi_y, a2),
    }
    for name, h in named.items():
        assert mse_q <= _mse_a2(est.linear_as_lifted(h), a2, mean, second), name
    random_h = crandn(RNG, 400, m) * RNG.uniform(0.05, 2.0, (400, 1))
    mse_random = [_mse_a2(w, a2, mean, second) for w in est.linear_as_lifted(random_h)]
    assert mse_q <= min(mse_random)
    best = _best_linear_h(lambda w: _mse_a2(w, a2, mean, second), m, RNG)
    assert mse_q <= best + 1e-12


def test_quadratic_wiener_in_sample_and_with_true_statistics_on_samples() -> None:
    # In-sample: with R and E[rho] replaced by sample moments of the same realisations the
    # normal equations give the least-squares w, whose in-sample error on A^2 is at most that
    # of any lifted linear w (least squares is a projection). With the true statistics, the
    # Monte-Carlo error of the quadratic Wiener is at most that of the linear ones up to
    # sampling error (3 standard errors of the paired difference).
    m, a2, snr_db, n = 2, 1.0, 0.0, 60_000
    noise_power = 10 ** (-snr_db / 10)
    _, g, phi, c_v, rho_g, mu_v, k, _, _ = _fixed_stats("exponential", m, a2, noise_power)
    raw = RNG.standard_exponential((n, m, 2)) - 1.0
    v = np.sqrt(noise_power / 2) * (raw[..., 0] + 1j * raw[..., 1])
    s = np.sqrt(a2) * np.exp(2j * np.pi * RNG.random(n))
    r = lift_snapshots(s[:, None] * g + v)
    m_hat = r.mean(axis=0)
    r_hat = r.T @ r / n
    # Feed the sample moments through the core: E[rho] = m_hat, R = r_hat.
    w_ls = est.quadratic_wiener_fixed_weights(
        a2, rho_g, m_hat - a2 * rho_g, r_hat - np.outer(m_hat, m_hat), np.zeros_like(k)
    )

    def sample_mse(w: np.ndarray) -> np.ndarray:
        return (a2 - r @ w) ** 2

    lin = {
        "delay-sum": est.delay_sum_weights(g),
        "mvdr": est.mvdr_weights(g, phi),
        "linear-wiener": est.linear_wiener_weights(g, a2 * est.outer(g) + phi, a2),
    }
    for name, h in lin.items():
        assert sample_mse(w_ls).mean() <= sample_mse(est.linear_as_lifted(h)).mean(), name
    best_in_sample = _best_linear_h(lambda w: float(sample_mse(w).mean()), m, RNG)
    assert sample_mse(w_ls).mean() <= best_in_sample + 1e-12
    w_true = est.quadratic_wiener_fixed_weights(a2, rho_g, mu_v, c_v, k)
    for name, h in lin.items():
        diff = sample_mse(w_true) - sample_mse(est.linear_as_lifted(h))
        assert diff.mean() <= 3 * diff.std(ddof=1) / np.sqrt(n), name


# ------------------------------------------------------- random power: affine vs MVDR


@pytest.mark.parametrize("kind", ["gaussian", "exponential", "two-interferers"])
def test_affine_lifted_beats_mvdr_power_minus_noise_for_random_power(kind: str, crandn) -> None:
    # docs/estimators.md §5 and §6, check 6b.
    # Complex Gaussian S: P = |S|^2 is exponential, E[P^2] = 2 lambda^2,
    # Var(P) = lambda^2 (handbook: exponential distribution). Both estimators are unbiased
    # affine functions of rho, so MSE = Var(P) - 2 w . Cov(rho, P) + w^T C_rho w with
    # Cov(rho, P) = Var(P) rho_g and C_rho = Var(P) rho_g rho_g^T + C_v + lambda K (derived:
    # rho = P rho_g + cross terms + noise lift, mutually uncorrelated for circular S).
    m, lam, noise_power, n = 2, 1.0, 10 ** (-3 / 10), 200_000
    pos = linear_array_m(m, 0.08)
    field = noise_field(kind, pos, 1000.0)
    g = steering_vectors(pos, 90.0, 1000.0)
    phi = noise_power * field.phi_v
    c_v = noise_power**2 * field.c_v
    rho_g, mu_v = rho(est.outer(g)), rho(phi)
    k = crossterm_lift_covariance(g, phi)
    var_p = lam**2
    c_n = c_v + lam * k
    c_rho = var_p * np.outer(rho_g, rho_g) + c_n
    w_aff = est.lifted_affine_weights(rho_g, c_n, var_p)
    np.testing.assert_allclose(w_aff, var_p * np.linalg.solve(c_rho, rho_g), rtol=1e-10)
    h = est.mvdr_weights(g, phi)
    w_mvdr = est.linear_as_lifted(h)

    def mse(w: np.ndarray) -> float:
        return float(var_p - 2 * var_p * w @ rho_g + w @ c_rho @ w)

    assert mse(w_aff) <= mse(w_mvdr)
    # Monte-Carlo with the same statistics.
    from liftmag.study import draw_noise

    s = np.sqrt(lam) * crandn(RNG, n)
    v = np.sqrt(noise_power) * draw_noise(kind, n, pos, 1000.0, RNG)
    r = lift_snapshots(s[:, None] * g + v)
    p = np.abs(s) ** 2
    p_aff = lam + (r - (lam * rho_g + mu_v)) @ w_aff
    p_mvdr = r @ w_mvdr - est.mvdr_residual_power(g, phi)
    diff = (p_aff - p) ** 2 - (p_mvdr - p) ** 2
    assert diff.mean() <= 3 * diff.std(ddof=1) / np.sqrt(n)
    np.testing.assert_allclose(np.mean((p_mvdr - p) ** 2), mse(w_mvdr), rtol=0.05)
    np.testing.assert_allclose(np.mean((p_aff - p) ** 2), mse(w_aff), rtol=0.05)


def test_random_power_wiener_reduces_to_fixed_magnitude_wiener_when_power_is_fixed() -> None:
    # Derived: with Var(P) = 0 (E[P^2] = lambda^2) the random-power normal equations are those
    # of the fixed-magnitude quadratic Wiener with A^2 = lambda.
    *_, c_v, rho_g, mu_v, k, _, _ = _fixed_stats("exponential", 3, 0.7, 0.4)
    w_fixed = est.quadratic_wiener_fixed_weights(0.7, rho_g, mu_v, c_v, k)
    w_random = est.lifted_wiener_weights(rho_g, mu_v, c_v, k, 0.7, 0.49)
    np.testing.assert_allclose(w_random, w_fixed, rtol=1e-10)


# ----------------------------------------------------------- iterative fixed magnitude


def _fixed_magnitude_data(snr_db: float, n: int, rng: np.random.Generator, crandn):
    m, a2 = 2, 1.0
    noise_power = 10 ** (-snr_db / 10)
    _, g, phi, c_v, rho_g, mu_v, k, _, _ = _fixed_stats("gaussian", m, a2, noise_power)
    y = np.sqrt(a2) * np.exp(2j * np.pi * rng.random(n))[:, None] * g + np.sqrt(
        noise_power
    ) * crandn(rng, n, m)
    return y, g, phi, c_v, rho_g, mu_v, k


@pytest.mark.parametrize("snr_db", [-10.0, 10.0])
def test_iterative_fixed_magnitude_unbiased_converges_and_naive_is_biased_low(
    snr_db: float, crandn,
) -> None:
    # docs/estimators.md §6, check 6d.
    # The unbiased update converges in a few steps; the naive update (mean
    # of the per-sample estimates) is biased low and collapses towards zero at low SNR.
    y, g, phi, c_v, rho_g, mu_v, k = _fixed_magnitude_data(snr_db, 20_000, RNG, crandn)
    r = lift_snapshots(y)
    start = float(np.mean(np.abs(y[:, 0]) ** 2))  # A^2 + noise power: a high guess
    lin = est.linear_wiener_fixed(y, g, phi, start)
    lif = est.lifted_wiener_fixed(r, rho_g, mu_v, c_v, k, start)
    for res in (lin, lif):
        assert bool(res.converged) and res.iterations <= 10
        assert res.history.shape[0] == res.iterations + 1
    # The unbiased fixed point is a sample mean of per-sample unbiased estimates u_n of A^2;
    # hold it to 5 of its own standard errors around the truth.
    h = lin.weights
    u_lin = (np.abs(est.apply_linear(h, y)) ** 2 - np.real(np.vdot(h, phi @ h))) / np.abs(
        np.vdot(h, g)
    ) ** 2
    u_lif = (r @ lif.weights - lif.weights @ mu_v) / (lif.weights @ rho_g)
    for res, u in ((lin, u_lin), (lif, u_lif)):
        np.testing.assert_allclose(float(res.magnitude_sq), u.mean(), rtol=1e-5)
        assert abs(float(res.magnitude_sq) - 1.0) < 5 * u.std() / np.sqrt(len(u))
    naive_lin = est.linear_wiener_fixed(y, g, phi, start, update="naive", max_iterations=300)
    naive_lif = est.lifted_wiener_fixed(r, rho_g, mu_v, c_v, k, start, update="naive",
                                        max_iterations=300)
    for naive, good in ((naive_lin, lin), (naive_lif, lif)):
        assert float(naive.magnitude_sq) < float(good.magnitude_sq) - 0.05
        if snr_db <= -10:
            assert float(naive.magnitude_sq) < 0.05  # collapsed (measured: to the floor)


def test_diagonal_loading_shifts_every_eigenvalue_by_a_share_of_the_mean(random_covariance):
    # Adding c I to a Hermitian matrix shifts each eigenvalue by c and keeps the eigenvectors
    # (a standard fact of linear algebra, e.g. Horn & Johnson, Matrix Analysis, chapter 1;
    # recalled from memory); trace / dim is the mean eigenvalue. The engine loads its lifted
    # covariance with this same helper.
    rng = np.random.default_rng(7)
    stack = np.stack([random_covariance(3, rng, loading=0.01) for _ in range(4)])
    loaded = est.diagonally_loaded(stack, 0.1)
    before, after = np.linalg.eigvalsh(stack), np.linalg.eigvalsh(loaded)
    mean = np.real(np.trace(stack, axis1=-2, axis2=-1)) / 3
    np.testing.assert_allclose(after - before, 0.1 * mean[:, None] * np.ones(3), rtol=1e-10)
    assert est.diagonally_loaded(stack, 0.0) is stack
    with pytest.raises(ValueError, match="diagonal loading"):
        est.diagonally_loaded(stack, -0.1)
