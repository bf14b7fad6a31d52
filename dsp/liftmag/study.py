"""Monte-Carlo study of magnitude estimation, and the model noise fields it shares with patterns.

Set-up (one narrowband STFT bin, the deterministic-magnitude experiment): an array of M
microphones observes ``y = g S + v`` with ``S = A exp(j phi)``, ``A = 1`` fixed and ``phi``
uniform on [0, 2 pi), ``g`` the far-field steering vector of the talker (reference
microphone 0, so ``g_0 = 1``) and ``v`` noise of one of the kinds in :data:`NOISE_KINDS`. The
input SNR is ``A^2 / E|v_0|^2``, the power ratio at the reference microphone. Each estimator
turns every realisation into a magnitude estimate ``A^``; the figure of merit is the RMSE of
``A^ - A`` as a fraction of ``A``.

Statistics given to the estimators (the published set-up assumes them known):

* second-order ``Phi_v`` and ``mu_v = rho(Phi_v)``: exact, from the noise model;
* fourth-order ``C_v`` (covariance of the noise lift): the sample covariance of
  ``stats_samples`` noise-only snapshots drawn from the same noise process, independent of
  the test realisations (so no in-sample optimism); ``stats_samples = 0`` gives the exact
  ``C_v`` (:func:`noise_field`);
* cross-term covariance ``K``: the closed form from ``g`` and ``Phi_v``
  (:func:`liftmag.lift.crossterm_lift_covariance`);
* the estimators named ``linear-wiener``, ``lifted-wiener`` and ``lifted-mv`` are told the
  true ``A^2`` (oracle); ``linear-wiener-fixed`` and ``lifted-wiener-fixed`` learn it from the
  realisations, starting from :data:`START_GUESS` (the reference microphone's mean power,
  ``A^2 + E|v_0|^2``: a high guess that needs no statistics).

Everything here is pure: arrays and frozen dataclasses in, arrays and frozen dataclasses
out; randomness comes from ``numpy.random.Generator`` objects seeded from the config.

References
----------
* H. L. Van Trees, *Optimum Array Processing*, Wiley 2002 (delay-and-sum, MVDR, Wiener).
* S. O. Rice, "Mathematical analysis of random noise", Bell Syst. Tech. J. 24, 1945
  (the Rician distribution of a sinusoid's magnitude in Gaussian noise).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray

from liftmag import estimators as est
from liftmag.geometry import as_positions_m, check_bearings_deg, steering_vectors
from liftmag.lift import crossterm_lift_covariance, gaussian_lift_covariance, lift_snapshots, rho

NOISE_KINDS: tuple[str, ...] = ("gaussian", "exponential", "laplace", "two-interferers")
NOISE_HELP: dict[str, str] = {
    "gaussian": "white circular complex Gaussian sensor noise",
    "exponential": "white noise with zero-mean exponential real and imaginary parts (skewed)",
    "laplace": "white noise with Laplace real and imaginary parts (heavy-tailed, symmetric)",
    "two-interferers": "directional Gaussian sources at the interferer bearings plus weak "
    "white self-noise",
}

# Var(|v|^2) / (E|v|^2)^2 for white noise whose real and imaginary parts are independent,
# zero-mean and identically distributed with kurtosis beta2 = mu4 / sigma^4:
# |v|^2 = x^2 + y^2 with Var(x^2) = (beta2 - 1) (E|v|^2 / 2)^2, so the ratio is
# (beta2 - 1) / 2. Derived; beta2 is 3 (Gaussian), 9 (exponential: central moments of
# Exp(1) are 1, 2, 9) and 6 (Laplace). The tests check these against scipy.stats.
WHITE_POWER_VARIANCE_RATIO: dict[str, float] = {
    "gaussian": 1.0,
    "exponential": 4.0,
    "laplace": 2.5,
}

STUDY_ESTIMATORS: tuple[str, ...] = (
    "delay-sum",
    "mvdr",
    "linear-wiener",
    "linear-wiener-fixed",
    "lifted-nulls",
    "lifted-mv",
    "lifted-wiener",
    "lifted-wiener-fixed",
)
STUDY_ESTIMATOR_HELP: dict[str, str] = {
    "delay-sum": "|h^H y| with h = g / (g^H g)",
    "mvdr": "|h^H y| with the MVDR beamformer",
    "linear-wiener": "|h^H y| with h = A^2 Phi_y^-1 g, told the true A (oracle)",
    "linear-wiener-fixed": "the same filter, A learnt iteratively from the realisations",
    "lifted-nulls": "sqrt of the closed-form power-null estimate (nulls at the interferer "
    "bearings)",
    "lifted-mv": "sqrt of the lifted minimum-variance unbiased power, prior = true A^2",
    "lifted-wiener": "quadratic Wiener for a fixed magnitude, told the true A (oracle)",
    "lifted-wiener-fixed": "the same quadratic Wiener, A learnt iteratively",
}
ITERATIVE_ESTIMATORS: tuple[str, ...] = ("linear-wiener-fixed", "lifted-wiener-fixed")
START_GUESS = "reference-microphone mean power, mean |y_0|^2 (= A^2 + noise power on average)"

PATTERN_ESTIMATORS: tuple[str, ...] = (
    "delay-sum",
    "mvdr",
    "linear-wiener",
    "lifted-nulls",
    "lifted-mv",
    "lifted-wiener",
    "lifted-affine",
    "lifted-wiener-fixed",
)


# ------------------------------------------------------------------------- noise models


@dataclass(frozen=True)
class NoiseField:
    """Second- and fourth-order statistics of a noise kind with unit power at microphone 0.

    Attributes
    ----------
    kind : one of :data:`NOISE_KINDS`.
    phi_v : (M, M) complex, ``E[v v^H]``.
    c_v : (M^2, M^2) real, the exact covariance of ``rho(v v^H)``.
    """

    kind: str
    phi_v: NDArray[np.complex128]
    c_v: NDArray[np.float64]


def _check_kind(kind: str) -> None:
    if kind not in NOISE_KINDS:
        raise ValueError(f"unknown noise kind {kind!r}; choose from {', '.join(NOISE_KINDS)}")


def _interferer_powers(self_noise_db: float, n_interferers: int) -> tuple[float, float]:
    """Per-interferer and self-noise powers that add up to 1 at the reference microphone."""
    ratio = 10.0 ** (self_noise_db / 10.0)  # self-noise power / one interferer's power
    p_interferer = 1.0 / (n_interferers + ratio)
    return p_interferer, ratio * p_interferer


def noise_field(
    kind: str,
    positions_m: ArrayLike,
    frequency_hz: float,
    interferer_deg: Sequence[float] = (0.0, 180.0),
    self_noise_db: float = -20.0,
) -> NoiseField:
    """Exact statistics of the noise kind, scaled to unit power at microphone 0.

    White kinds: ``Phi_v = I``; ``C_v`` is diagonal, 1 on the cross entries of the lift and
    :data:`WHITE_POWER_VARIANCE_RATIO` on the power entries (derived in that constant's
    comment; Gaussian gives the identity, Isserlis). ``two-interferers``: one circular
    Gaussian plane wave per bearing in ``interferer_deg``, each of equal power, plus white
    Gaussian self-noise ``self_noise_db`` below one interferer, so that
    ``Phi_v = p sum_k d_k d_k^H + q I`` with ``K p + q = 1``, and ``C_v`` from Isserlis'
    theorem (:func:`liftmag.lift.gaussian_lift_covariance`).
    """
    _check_kind(kind)
    pos = as_positions_m(positions_m)
    m = pos.shape[0]
    if kind == "two-interferers":
        bearings = check_bearings_deg(interferer_deg)
        p_int, p_self = _interferer_powers(self_noise_db, len(bearings))
        d = np.atleast_2d(steering_vectors(pos, bearings, frequency_hz))
        phi = p_int * np.einsum("km,kn->mn", d, np.conj(d)) + p_self * np.eye(m)
        return NoiseField(kind, phi, gaussian_lift_covariance(phi))
    c_v = np.eye(m * m)
    c_v[np.arange(m), np.arange(m)] = WHITE_POWER_VARIANCE_RATIO[kind]
    return NoiseField(kind, np.eye(m, dtype=complex), c_v)


def draw_noise(
    kind: str,
    n_samples: int,
    positions_m: ArrayLike,
    frequency_hz: float,
    rng: np.random.Generator,
    interferer_deg: Sequence[float] = (0.0, 180.0),
    self_noise_db: float = -20.0,
) -> NDArray[np.complex128]:
    """``n_samples`` noise snapshots ``(n_samples, M)`` with unit power at microphone 0.

    Statistics as in :func:`noise_field`. The exponential kind uses ``(e - 1) / sqrt 2`` with
    ``e ~ Exp(1)`` for each real and imaginary part (zero mean, skewness 2); the Laplace kind
    uses scale ``1/2`` (variance ``1/2`` per part).
    """
    _check_kind(kind)
    pos = as_positions_m(positions_m)
    m = pos.shape[0]
    shape = (n_samples, m)
    if kind == "gaussian":
        return (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)) / np.sqrt(2)
    if kind == "exponential":
        re = rng.standard_exponential(shape) - 1.0
        im = rng.standard_exponential(shape) - 1.0
        return (re + 1j * im) / np.sqrt(2)
    if kind == "laplace":
        return rng.laplace(0.0, 0.5, shape) + 1j * rng.laplace(0.0, 0.5, shape)
    bearings = check_bearings_deg(interferer_deg)
    p_int, p_self = _interferer_powers(self_noise_db, len(bearings))
    d = np.atleast_2d(steering_vectors(pos, bearings, frequency_hz))  # (K, M)
    k = len(bearings)
    src = (rng.standard_normal((n_samples, k)) + 1j * rng.standard_normal((n_samples, k)))
    sensor = rng.standard_normal(shape) + 1j * rng.standard_normal(shape)
    return np.sqrt(p_int / 2) * (src @ d) + np.sqrt(p_self / 2) * sensor


def sample_lift_covariance(v: ArrayLike) -> NDArray[np.float64]:
    """Sample covariance ``(M^2, M^2)`` of ``rho(v v^H)`` over the snapshots ``v`` (N, M)."""
    r = lift_snapshots(np.asarray(v))
    centred = r - r.mean(axis=0)
    return centred.T @ centred / (r.shape[0] - 1)


# ---------------------------------------------------------------------- model weights


@dataclass(frozen=True)
class ModelStatistics:
    """Everything the estimators may use for one target and noise field (one bin).

    ``speech_power`` is ``E[P]`` (``A^2`` for a fixed magnitude); ``speech_power_sq`` is
    ``E[P^2]`` (``A^4`` for a fixed magnitude, ``2 lambda^2`` for complex Gaussian speech).
    """

    g: NDArray[np.complex128]
    phi_v: NDArray[np.complex128]
    c_v: NDArray[np.float64]
    speech_power: float
    speech_power_sq: float
    null_steering: NDArray[np.complex128] | None = None
    loading: float = 0.0
    rho_g: NDArray[np.float64] = field(init=False, repr=False)
    mu_v: NDArray[np.float64] = field(init=False, repr=False)
    k_cross: NDArray[np.float64] = field(init=False, repr=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "rho_g", rho(est.outer(self.g)))
        object.__setattr__(self, "mu_v", rho(self.phi_v))
        object.__setattr__(self, "k_cross", crossterm_lift_covariance(self.g, self.phi_v))


def linear_weights(name: str, stats: ModelStatistics) -> NDArray[np.complex128]:
    """Beamformer ``h`` of a linear estimator (``delay-sum``, ``mvdr``, ``linear-wiener``)."""
    if name == "delay-sum":
        return est.delay_sum_weights(stats.g)
    if name == "mvdr":
        return est.mvdr_weights(stats.g, stats.phi_v, stats.loading)
    if name in ("linear-wiener", "linear-wiener-fixed"):
        phi_y = stats.speech_power * est.outer(stats.g) + stats.phi_v
        return est.linear_wiener_weights(stats.g, phi_y, stats.speech_power, stats.loading)
    raise ValueError(f"{name!r} is not a linear estimator")


def lifted_weights(name: str, stats: ModelStatistics) -> NDArray[np.float64]:
    """Lifted weights ``w`` (so ``B(theta) = w . rho(d d^H)``) of any pattern estimator.

    Linear estimators give ``rho(h h^H)``. ``lifted-mv`` uses the prior ``speech_power``;
    ``lifted-wiener`` the random-power moments; ``lifted-wiener-fixed`` the fixed-magnitude
    quadratic Wiener at ``A^2 = speech_power``; ``lifted-affine`` the centred LMMSE weights
    with ``Var(P) = speech_power_sq - speech_power^2`` and ``C_n = C_v + E[P] K``.
    """
    if name in ("delay-sum", "mvdr", "linear-wiener"):
        return est.linear_as_lifted(linear_weights(name, stats))
    if name == "lifted-nulls":
        if stats.null_steering is None or len(stats.null_steering) == 0:
            raise ValueError("lifted-nulls needs at least one null bearing")
        return est.lifted_nulls_weights(stats.g, stats.null_steering)
    if name == "lifted-mv":
        w, _ = est.lifted_mv_weights(
            stats.rho_g, stats.c_v, stats.k_cross, stats.speech_power, stats.loading
        )
        return w
    if name == "lifted-wiener":
        return est.lifted_wiener_weights(
            stats.rho_g, stats.mu_v, stats.c_v, stats.k_cross, stats.speech_power,
            stats.speech_power_sq, stats.loading,
        )
    if name == "lifted-wiener-fixed":
        return est.quadratic_wiener_fixed_weights(
            stats.speech_power, stats.rho_g, stats.mu_v, stats.c_v, stats.k_cross, stats.loading
        )
    if name == "lifted-affine":
        var_p = stats.speech_power_sq - stats.speech_power**2
        c_noise = stats.c_v + stats.speech_power * stats.k_cross
        return est.lifted_affine_weights(stats.rho_g, c_noise, var_p, stats.loading)
    raise ValueError(f"unknown estimator {name!r}")


# --------------------------------------------------------------------------- the study


@dataclass(frozen=True)
class StudyConfig:
    """Parameters of :func:`run_study` (see the module docstring for the set-up)."""

    snr_db: tuple[float, ...] = (-10.0, -5.0, 0.0, 5.0, 10.0, 15.0, 20.0)
    noise: str = "gaussian"
    estimators: tuple[str, ...] = STUDY_ESTIMATORS
    n_mics: int = 2
    mic_spacing_m: float = 0.08
    frequency_hz: float = 1000.0
    target_deg: float = 90.0
    interferer_deg: tuple[float, ...] = (0.0, 180.0)
    self_noise_db: float = -20.0
    realisations: int = 10_000
    stats_samples: int = 2_000
    seed: int = 0
    magnitude: float = 1.0
    tolerance: float = 1e-6
    max_iterations: int = 100
    loading: float = 0.0

    def __post_init__(self) -> None:
        _check_kind(self.noise)
        unknown = [e for e in self.estimators if e not in STUDY_ESTIMATORS]
        if unknown or not self.estimators:
            raise ValueError(
                f"unknown study estimator(s) {unknown}; choose from {', '.join(STUDY_ESTIMATORS)}"
            )
        if int(self.n_mics) != self.n_mics or self.n_mics < 2:
            raise ValueError(f"the study needs at least 2 microphones, got {self.n_mics}")
        if self.realisations < 100:
            raise ValueError(f"need at least 100 realisations, got {self.realisations}")
        if self.stats_samples != 0 and self.stats_samples < 2 * self.n_mics**2:
            raise ValueError(
                f"stats_samples must be 0 (exact statistics) or at least 2 M^2 = "
                f"{2 * self.n_mics**2}, got {self.stats_samples}"
            )
        if not self.snr_db or not np.all(np.isfinite(self.snr_db)):
            raise ValueError("snr_db must be a non-empty list of finite values")
        if not (np.isfinite(self.magnitude) and self.magnitude > 0):
            raise ValueError(f"magnitude must be positive, got {self.magnitude}")
        check_bearings_deg([self.target_deg, *self.interferer_deg])

    @property
    def positions_m(self) -> NDArray[np.float64]:
        from liftmag.geometry import linear_array_m

        return linear_array_m(self.n_mics, self.mic_spacing_m)


@dataclass(frozen=True)
class IterationReport:
    """Convergence of an iterative estimator at one SNR."""

    iterations: int
    converged: bool
    magnitude_sq: float


@dataclass(frozen=True)
class SnrResult:
    """Per-SNR outcome: ``rmse``, its standard error ``rmse_se`` and ``bias`` (all fractions
    of ``A``) per estimator, plus convergence of the iterative ones."""

    snr_db: float
    rmse: dict[str, float]
    rmse_se: dict[str, float]
    bias: dict[str, float]
    iterations: dict[str, IterationReport]


@dataclass(frozen=True)
class StudyResult:
    config: StudyConfig
    points: tuple[SnrResult, ...]

    def rmse_table(self) -> dict[str, list[float]]:
        """``{estimator: [rmse at each SNR]}``."""
        return {e: [p.rmse[e] for p in self.points] for e in self.config.estimators}


def _rng_for(seed: int, snr_db: float) -> np.random.Generator:
    # Keyed by the SNR value, so a point's numbers do not depend on which other SNRs run.
    key = round((float(snr_db) + 1000.0) * 1000.0)
    return np.random.default_rng(np.random.SeedSequence([int(seed), key]))


def rmse_with_se(estimates: NDArray, truth: float) -> tuple[float, float, float]:
    """RMSE, its delta-method standard error, and the bias of ``estimates`` (axis 0).

    ``SE(RMSE) ~= std(e^2) / (2 RMSE sqrt N)`` for squared errors ``e^2``.
    """
    err = np.asarray(estimates) - truth
    sq = err**2
    mse = float(np.mean(sq))
    rmse = float(np.sqrt(mse))
    se = float(np.std(sq, ddof=1) / (2.0 * max(rmse, 1e-300) * np.sqrt(len(sq))))
    return rmse, se, float(np.mean(err))


@dataclass(frozen=True)
class Realisations:
    """The simulated data of one SNR point (exposed for tests)."""

    y: NDArray[np.complex128]  # (N, M)
    stats: ModelStatistics
    noise_power: float


def simulate(config: StudyConfig, snr_db: float) -> Realisations:
    """Draw the realisations and the estimator statistics of one SNR point."""
    rng = _rng_for(config.seed, snr_db)
    pos = config.positions_m
    a = config.magnitude
    noise_power = a**2 * 10.0 ** (-snr_db / 10.0)
    scale = np.sqrt(noise_power)
    g = steering_vectors(pos, config.target_deg, config.frequency_hz)
    field_ = noise_field(
        config.noise, pos, config.frequency_hz, config.interferer_deg, config.self_noise_db
    )
    phase = rng.uniform(0.0, 2.0 * np.pi, config.realisations)
    noise_kw = {"interferer_deg": config.interferer_deg, "self_noise_db": config.self_noise_db}
    v = scale * draw_noise(
        config.noise, config.realisations, pos, config.frequency_hz, rng, **noise_kw
    )
    y = a * np.exp(1j * phase)[:, None] * g[None, :] + v
    if config.stats_samples:
        noise_only = scale * draw_noise(
            config.noise, config.stats_samples, pos, config.frequency_hz, rng, **noise_kw
        )
        c_v = sample_lift_covariance(noise_only)
    else:
        c_v = noise_power**2 * field_.c_v
    null_steering = np.atleast_2d(
        steering_vectors(pos, np.asarray(config.interferer_deg), config.frequency_hz)
    )
    stats = ModelStatistics(
        g=g,
        phi_v=noise_power * field_.phi_v,
        c_v=c_v,
        speech_power=a**2,
        speech_power_sq=a**4,
        null_steering=null_steering,
        loading=config.loading,
    )
    return Realisations(y, stats, noise_power)


def magnitude_estimates(
    name: str, data: Realisations, config: StudyConfig
) -> tuple[NDArray[np.float64], IterationReport | None]:
    """Per-realisation magnitude estimates ``(N,)`` of one estimator, plus convergence."""
    y, s = data.y, data.stats
    if name in ("delay-sum", "mvdr", "linear-wiener"):
        return np.abs(est.apply_linear(linear_weights(name, s), y)), None
    if name == "linear-wiener-fixed":
        res = est.linear_wiener_fixed(
            y, s.g, s.phi_v, np.mean(np.abs(y[:, 0]) ** 2), config.tolerance,
            config.max_iterations,
        )
        report = IterationReport(res.iterations, bool(res.converged), float(res.magnitude_sq))
        return res.estimates, report
    rho_y = lift_snapshots(y)
    if name == "lifted-wiener-fixed":
        res = est.lifted_wiener_fixed(
            rho_y, s.rho_g, s.mu_v, s.c_v, s.k_cross, np.mean(np.abs(y[:, 0]) ** 2),
            config.tolerance, config.max_iterations, loading=config.loading,
        )
        report = IterationReport(res.iterations, bool(res.converged), float(res.magnitude_sq))
        return res.estimates, report
    w = lifted_weights(name, s)
    power = est.apply_lifted(w, rho_y)
    if name == "lifted-mv":
        power = power - est.apply_lifted(w, s.mu_v)
    return np.sqrt(np.maximum(power, 0.0)), None


def simulate_snr(config: StudyConfig, snr_db: float) -> SnrResult:
    """RMSE (fraction of ``A``) of every configured estimator at one input SNR."""
    data = simulate(config, snr_db)
    rmse, se, bias, iters = {}, {}, {}, {}
    for name in config.estimators:
        a_hat, report = magnitude_estimates(name, data, config)
        rmse[name], se[name], bias[name] = (
            x / config.magnitude for x in rmse_with_se(a_hat, config.magnitude)
        )
        if report is not None:
            iters[name] = report
    return SnrResult(float(snr_db), rmse, se, bias, iters)


def run_study(
    config: StudyConfig, progress: Callable[[int, int], None] | None = None
) -> StudyResult:
    """Run every SNR point of ``config``; ``progress(done, total)`` is called after each."""
    points = []
    for i, snr in enumerate(config.snr_db):
        points.append(simulate_snr(config, snr))
        if progress is not None:
            progress(i + 1, len(config.snr_db))
    return StudyResult(config, tuple(points))
