"""Time the estimators on a full STFT grid against a plain STFT round trip.

Grid: 1025 bins (2048-point frames) x 2000 frames, M = 2 and M = 4 microphones. For each
estimator we time (a) computing the per-bin weights from per-bin statistics, vectorised
over bins, and (b) applying them to every frame (for lifted estimators this includes
lifting the snapshots, rho(y y^H)). The reference is a forward and inverse
scipy.signal.ShortTimeFFT of the same M-channel signal (2048-sample Hann frames, hop 512).
Times are the best of ``--repeats`` runs, in seconds. The iterative estimators alternate
weights and application until the relative change of A^2 is below 1e-6 (at most 20
iterations); they are timed as a whole and their iteration count is printed.

Run: ``.venv/bin/python benchmarks/bench_estimators.py [--mics 2 4] [--repeats 3]``.
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable

import numpy as np
from scipy.signal import ShortTimeFFT
from scipy.signal.windows import hann

from liftmag import estimators as est
from liftmag.geometry import linear_array_m, steering_vectors
from liftmag.lift import crossterm_lift_covariance, gaussian_lift_covariance, lift_snapshots, rho

N_FFT = 2048
HOP = 512
N_BINS = N_FFT // 2 + 1
N_FRAMES = 2000
RATE_HZ = 48_000


def best_time_s(fn: Callable[[], object], repeats: int) -> float:
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def make_problem(m: int, rng: np.random.Generator) -> dict:
    freqs_hz = np.linspace(0, RATE_HZ / 2, N_BINS)
    freqs_hz[0] = freqs_hz[1] / 2  # keep the DC bin's steering vectors distinct
    pos = linear_array_m(m, 0.05)
    g = steering_vectors(pos, 80.0, freqs_hz)  # (F, M)
    d_null = steering_vectors(pos, [10.0, 170.0], freqs_hz)  # (F, 2, M)
    a = (rng.standard_normal((N_BINS, m, m)) + 1j * rng.standard_normal((N_BINS, m, m))) / 2
    phi = a @ np.conj(np.swapaxes(a, -1, -2)) / m + 0.1 * np.eye(m)
    # A fixed-magnitude target (A = 1, uniform phase) in noise with covariance phi, so the
    # iterative estimators see the problem they are made for.
    white = (rng.standard_normal((N_FRAMES, N_BINS, m))
             + 1j * rng.standard_normal((N_FRAMES, N_BINS, m))) / np.sqrt(2)
    noise = np.einsum("fij,nfj->nfi", np.linalg.cholesky(phi), white)
    phase = np.exp(2j * np.pi * rng.random((N_FRAMES, N_BINS, 1)))
    y = phase * g[None] + noise
    return {
        "g": g, "d_null": d_null, "phi": phi, "y": y, "power": np.ones(N_BINS),
        "rho_g": rho(est.outer(g)), "mu_v": rho(phi), "c_v": gaussian_lift_covariance(phi),
        "k": crossterm_lift_covariance(g, phi),
    }


def estimator_table(p: dict) -> dict[str, tuple[Callable, Callable]]:
    """``name -> (weights(), apply(weights))`` closures over the problem ``p``."""
    phi_y = p["power"][:, None, None] * est.outer(p["g"]) + p["phi"]

    def lin_apply(h):
        return np.abs(est.apply_linear(h, p["y"]))

    def lifted_apply(w):
        return np.sqrt(np.maximum(est.apply_lifted(w, lift_snapshots(p["y"])), 0.0))

    start = np.mean(np.abs(p["y"][..., 0]) ** 2, axis=0)
    return {
        "delay-sum": (lambda: est.delay_sum_weights(p["g"]), lin_apply),
        "mvdr": (lambda: est.mvdr_weights(p["g"], p["phi"]), lin_apply),
        "linear-wiener": (lambda: est.linear_wiener_weights(p["g"], phi_y, p["power"]),
                          lin_apply),
        "lifted-nulls": (lambda: est.lifted_nulls_weights(p["g"], p["d_null"]), lifted_apply),
        "lifted-mv": (lambda: est.lifted_mv_weights(p["rho_g"], p["c_v"], p["k"],
                                                    p["power"])[0], lifted_apply),
        "lifted-wiener": (lambda: est.lifted_wiener_weights(
            p["rho_g"], p["mu_v"], p["c_v"], p["k"], p["power"], 2 * p["power"]),
            lifted_apply),
        "lifted-affine": (lambda: est.lifted_affine_weights(
            p["rho_g"], p["c_v"] + p["k"], p["power"]), lifted_apply),
        # Iterative: weights and application alternate; timed as one step ("apply" = 0).
        "linear-wiener-fixed": (lambda: est.linear_wiener_fixed(
            p["y"], p["g"], p["phi"], start, max_iterations=20), lambda r: r),
        "lifted-wiener-fixed": (lambda: est.lifted_wiener_fixed(
            lift_snapshots(p["y"]), p["rho_g"], p["mu_v"], p["c_v"], p["k"], start,
            max_iterations=20), lambda r: r),
    }


def stft_round_trip_s(m: int, rng: np.random.Generator, repeats: int) -> float:
    # ShortTimeFFT pads both ends so every sample is covered: with hop = N/4 a signal of
    # n samples (a multiple of the hop) gives n/hop + 3 frames.
    n_samples = (N_FRAMES - 3) * HOP
    x = rng.standard_normal((m, n_samples))
    stft = ShortTimeFFT(hann(N_FFT, sym=False), hop=HOP, fs=RATE_HZ, mfft=N_FFT)

    def trip():
        s = stft.stft(x)
        return stft.istft(s, k1=n_samples)

    s = stft.stft(x)
    assert s.shape[-2:] == (N_BINS, N_FRAMES), s.shape
    return best_time_s(trip, repeats)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--mics", type=int, nargs="+", default=[2, 4])
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    print(f"grid: {N_BINS} bins x {N_FRAMES} frames; best of {args.repeats}; seconds")
    for m in args.mics:
        p = make_problem(m, rng)
        ref_s = stft_round_trip_s(m, rng, args.repeats)
        print(f"\nM = {m}: STFT round trip (ShortTimeFFT stft + istft, {m} channels): "
              f"{ref_s:.3f} s")
        print(f"{'estimator':22s} {'weights':>9s} {'apply':>9s} {'total':>9s} {'x STFT':>8s}"
              f" {'iterations':>10s}")
        for name, (weights, apply) in estimator_table(p).items():
            w_s = best_time_s(weights, args.repeats)
            w = weights()
            a_s = best_time_s(lambda apply=apply, w=w: apply(w), args.repeats)
            iters = getattr(w, "iterations", "")
            total = w_s + a_s
            print(f"{name:22s} {w_s:9.4f} {a_s:9.4f} {total:9.4f} {total / ref_s:8.2f}"
                  f" {iters!s:>10s}")
        lift_s = best_time_s(lambda y=p["y"]: lift_snapshots(y), args.repeats)
        print(f"{'(lift rho(yy^H) alone)':22s} {'':9s} {lift_s:9.4f}")


if __name__ == "__main__":
    main()
