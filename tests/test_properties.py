"""Property tests (hypothesis) of the estimators' array contract.

Sources: the contract stated in liftmag.estimators' module docstring (every function
broadcasts over leading axes; quadratic estimates are real) and the lift of docs/estimators.md §2
(w . rho(y y^H) = y^H H y is real for Hermitian H). Bins are independent problems, so
reordering them must reorder the outputs and nothing else. NaN input must be refused with
ValueError rather than spread silently through a solve.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from liftmag import estimators as est
from liftmag.lift import crossterm_lift_covariance, gaussian_lift_covariance, lift_snapshots, rho
from liftmag.lift import unrho as unrho_

SETTINGS = settings(max_examples=25, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow])

lead_shapes = st.lists(st.integers(1, 3), min_size=0, max_size=2).map(tuple)
mic_counts = st.sampled_from([2, 3])
seeds = st.integers(0, 2**31 - 1)


def problem(crandn, lead: tuple[int, ...], m: int, seed: int, n_frames: int = 5) -> dict:
    """A random, well-conditioned problem per bin with leading axes ``lead``."""
    rng = np.random.default_rng(seed)
    g = crandn(rng, *lead, m)
    g = g / g[..., :1]
    a = crandn(rng, *lead, m, m)
    phi = a @ np.conj(np.swapaxes(a, -1, -2)) / m + 0.2 * np.eye(m)
    power = rng.uniform(0.1, 3.0, lead)
    y = crandn(rng, n_frames, *lead, m) * 2
    null_steering = np.exp(1j * rng.uniform(0, 2 * np.pi, (*lead, 1, m)))
    null_steering[..., 0] = 1.0
    return {
        "g": g, "phi": phi, "power": power, "y": y, "null": null_steering,
        "rho_g": rho(est.outer(g)), "mu_v": rho(phi), "c_v": gaussian_lift_covariance(phi),
        "k": crossterm_lift_covariance(g, phi), "rho_y": lift_snapshots(y),
    }


def all_outputs(p: dict) -> dict[str, np.ndarray]:
    """Every estimator's output for problem ``p`` (bins on the leading axes)."""
    phi_y = p["power"][..., None, None] * est.outer(p["g"]) + p["phi"]
    h = est.mvdr_weights(p["g"], p["phi"])
    w_mv, var_mv = est.lifted_mv_weights(p["rho_g"], p["c_v"], p["k"], p["power"])
    w_q = est.quadratic_wiener_fixed_weights(p["power"], p["rho_g"], p["mu_v"], p["c_v"], p["k"])
    lin_fixed = est.linear_wiener_fixed(p["y"], p["g"], p["phi"], p["power"], max_iterations=5)
    lif_fixed = est.lifted_wiener_fixed(p["rho_y"], p["rho_g"], p["mu_v"], p["c_v"], p["k"],
                                        p["power"], max_iterations=5)
    return {
        "delay_sum": est.delay_sum_weights(p["g"]),
        "mvdr": h,
        "mvdr_residual": est.mvdr_residual_power(p["g"], p["phi"]),
        "linear_wiener": est.linear_wiener_weights(p["g"], phi_y, p["power"]),
        "apply_linear": est.apply_linear(h, p["y"]),
        "linear_as_lifted": est.linear_as_lifted(h),
        "apply_lifted": est.apply_lifted(w_q, p["rho_y"]),
        "lifted_nulls": est.lifted_nulls_weights(p["g"], p["null"]),
        "quadratic_wiener_fixed": w_q,
        "lifted_mv": w_mv,
        "lifted_mv_variance": var_mv,
        "lifted_wiener": est.lifted_wiener_weights(
            p["rho_g"], p["mu_v"], p["c_v"], p["k"], p["power"], 2 * p["power"] ** 2),
        "lifted_affine": est.lifted_affine_weights(
            p["rho_g"], p["c_v"] + p["power"][..., None, None] * p["k"], p["power"] ** 2),
        "linear_fixed_a2": lin_fixed.magnitude_sq,
        "linear_fixed_estimates": lin_fixed.estimates,
        "lifted_fixed_a2": lif_fixed.magnitude_sq,
        "lifted_fixed_estimates": lif_fixed.estimates,
        "power_pattern": est.power_pattern(w_q, p["null"]),
    }


# Expected trailing shape and whether a frames axis leads, per output.
TRAILING = {
    "delay_sum": ("m",), "mvdr": ("m",), "mvdr_residual": (), "linear_wiener": ("m",),
    "apply_linear": (), "linear_as_lifted": ("d",), "apply_lifted": (), "lifted_nulls": ("d",),
    "quadratic_wiener_fixed": ("d",), "lifted_mv": ("d",), "lifted_mv_variance": (),
    "lifted_wiener": ("d",), "lifted_affine": ("d",), "linear_fixed_a2": (),
    "linear_fixed_estimates": (), "lifted_fixed_a2": (), "lifted_fixed_estimates": (),
    "power_pattern": ("k",),
}
FRAMES_FIRST = {"apply_linear", "apply_lifted", "linear_fixed_estimates",
                "lifted_fixed_estimates"}
REAL_OUTPUTS = {"mvdr_residual", "apply_lifted", "linear_as_lifted", "lifted_nulls",
                "quadratic_wiener_fixed", "lifted_mv", "lifted_mv_variance", "lifted_wiener",
                "lifted_affine", "linear_fixed_a2", "linear_fixed_estimates", "lifted_fixed_a2",
                "lifted_fixed_estimates", "power_pattern"}


@SETTINGS
@given(lead=lead_shapes, m=mic_counts, seed=seeds)
def test_outputs_broadcast_over_leading_axes(
    crandn, lead: tuple[int, ...], m: int, seed: int
) -> None:
    n_frames = 5
    out = all_outputs(problem(crandn, lead, m, seed, n_frames))
    sizes = {"m": m, "d": m * m, "k": 1}
    for name, value in out.items():
        prefix = (n_frames, *lead) if name in FRAMES_FIRST else lead
        expected = prefix + tuple(sizes[s] for s in TRAILING[name])
        assert np.shape(value) == expected, name


@SETTINGS
@given(lead=lead_shapes, m=mic_counts, seed=seeds)
def test_quadratic_outputs_are_real_and_equal_the_hermitian_form(
    crandn, lead: tuple[int, ...], m: int, seed: int
) -> None:
    p = problem(crandn, lead, m, seed)
    out = all_outputs(p)
    for name in REAL_OUTPUTS:
        assert np.isrealobj(out[name]), name
        assert np.all(np.isfinite(out[name])), name
    # w . rho(y y^H) = y^H unrho(w) y, whose imaginary part vanishes for Hermitian unrho(w).
    w = out["quadratic_wiener_fixed"]
    form = np.einsum("...i,...ij,...j->...", np.conj(p["y"]), unrho_(w), p["y"])
    scale = np.max(np.abs(form))
    np.testing.assert_allclose(form.imag, 0.0, atol=1e-12 * scale)
    np.testing.assert_allclose(out["apply_lifted"], form.real, rtol=1e-10, atol=1e-12 * scale)


@SETTINGS
@given(n_bins=st.integers(2, 6), m=mic_counts, seed=seeds, data=st.data())
def test_reordering_bins_reorders_outputs(
    crandn, n_bins: int, m: int, seed: int, data
) -> None:
    p = problem(crandn, (n_bins,), m, seed)
    order = np.asarray(data.draw(st.permutations(list(range(n_bins)))))
    permuted = {}
    for key, value in p.items():
        # Frames lead y and rho_y; every other array has bins first.
        permuted[key] = value[:, order] if key in ("y", "rho_y") else value[order]
    before, after = all_outputs(p), all_outputs(permuted)
    for name, value in before.items():
        expected = value[:, order] if name in FRAMES_FIRST else value[order]
        np.testing.assert_allclose(after[name], expected, rtol=1e-12, atol=1e-12, err_msg=name)


# Each estimator with the problem keys it reads; a NaN in any of them must be refused.
NAN_TARGETS = [
    ("delay_sum_weights", lambda p: est.delay_sum_weights(p["g"]), ("g",)),
    ("mvdr_weights", lambda p: est.mvdr_weights(p["g"], p["phi"]), ("g", "phi")),
    ("mvdr_residual_power", lambda p: est.mvdr_residual_power(p["g"], p["phi"]), ("g", "phi")),
    ("linear_wiener_weights", lambda p: est.linear_wiener_weights(p["g"], p["phi"], p["power"]),
     ("g", "phi", "power")),
    ("apply_linear", lambda p: est.apply_linear(p["g"], p["y"]), ("g", "y")),
    ("linear_as_lifted", lambda p: est.linear_as_lifted(p["g"]), ("g",)),
    ("apply_lifted", lambda p: est.apply_lifted(p["rho_g"], p["rho_y"]), ("rho_g", "rho_y")),
    ("lifted_nulls_weights", lambda p: est.lifted_nulls_weights(p["g"], p["null"]),
     ("g", "null")),
    ("quadratic_wiener_fixed_weights", lambda p: est.quadratic_wiener_fixed_weights(
        p["power"], p["rho_g"], p["mu_v"], p["c_v"], p["k"]),
     ("power", "rho_g", "mu_v", "c_v", "k")),
    ("lifted_mv_weights", lambda p: est.lifted_mv_weights(
        p["rho_g"], p["c_v"], p["k"], p["power"]), ("rho_g", "c_v", "k", "power")),
    ("lifted_wiener_weights", lambda p: est.lifted_wiener_weights(
        p["rho_g"], p["mu_v"], p["c_v"], p["k"], p["power"], 2 * p["power"] ** 2),
     ("rho_g", "mu_v", "c_v", "k", "power")),
    ("lifted_affine_weights", lambda p: est.lifted_affine_weights(
        p["rho_g"], p["c_v"], p["power"]), ("rho_g", "c_v", "power")),
    ("linear_wiener_fixed", lambda p: est.linear_wiener_fixed(
        p["y"], p["g"], p["phi"], p["power"]), ("y", "g", "phi", "power")),
    ("lifted_wiener_fixed", lambda p: est.lifted_wiener_fixed(
        p["rho_y"], p["rho_g"], p["mu_v"], p["c_v"], p["k"], p["power"]),
     ("rho_y", "rho_g", "mu_v", "c_v", "k", "power")),
    ("power_pattern", lambda p: est.power_pattern(p["rho_g"], p["null"]), ("rho_g", "null")),
]


@pytest.mark.parametrize(("name", "call", "keys"), NAN_TARGETS, ids=[t[0] for t in NAN_TARGETS])
@settings(max_examples=12, deadline=None)
@given(m=mic_counts, seed=seeds, which=st.integers(0, 5),
       position=st.floats(0, 1, exclude_max=True))
def test_nan_input_is_refused(crandn, name, call, keys, m: int, seed: int, which: int,
                              position: float) -> None:
    p = problem(crandn, (3,), m, seed)
    key = keys[which % len(keys)]
    bad = np.array(p[key], dtype=complex if np.iscomplexobj(p[key]) else float)
    flat = bad.reshape(-1)
    flat[int(position * flat.size)] = np.nan
    p[key] = flat.reshape(bad.shape)
    with pytest.raises(ValueError, match="NaN"):
        call(p)
