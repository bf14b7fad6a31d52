"""The textbook offline chain liftmag is measured against: MVDR plus a Wiener post-filter.

Our own implementation of the published method, written for the quality benchmark
(``benchmarks/quality_varied.py``) and nothing else; liftmag does not import it.

Chain (every statistic from the whole take, non-causal where the method allows it):

1. **STFT**: 64 ms Hann frames (periodic window, length ``round(0.064 fs)``), hop a quarter
   frame (75 % overlap), one-sided spectrum; synthesis by ``scipy.signal.ShortTimeFFT``'s
   least-squares overlap-add, which inverts the analysis exactly.
2. **Noise covariance** ``Phi_v(f) = mean_t y(f,t) y(f,t)^H`` over the frames that lie wholly
   inside a given noise-only stretch (the take's lead-in) or over a separate room-tone
   recording.
3. **Talker RTF by covariance whitening** (Markovich-Golan & Gannot, "Performance analysis of
   the covariance subtraction method for relative transfer function estimation and comparison
   to the covariance whitening method", ICASSP 2015): with ``Phi_v = L L^H`` (Cholesky) and the
   noisy covariance ``Phi_y`` averaged over *all* frames of the take,
   ``u = principal eigenvector of L^-1 Phi_y L^-H``, ``g = L u / (e_r^T L u)``: the RTF
   relative to the reference microphone ``r``. For ``Phi_y = phi_s a a^H + Phi_v`` the
   whitened matrix is ``phi_s (L^-1 a)(L^-1 a)^H + I``, whose principal eigenvector is
   ``L^-1 a`` up to scale, so ``g = a / a_r`` exactly.
4. **MVDR** (Capon 1969; e.g. Van Trees, *Optimum Array Processing*, 2002, ch. 6):
   ``w = Phi_v^-1 g / (g^H Phi_v^-1 g)``, ``z = w^H y``. Distortionless: ``w^H g = 1``, so the
   talker's image at the reference microphone passes unchanged. Residual noise PSD of ``z``:
   ``phi_r = w^H Phi_v w = 1 / (g^H Phi_v^-1 g)``.
5. **Single-channel Wiener post-filter** on ``z`` with the decision-directed a-priori SNR
   (Ephraim & Malah, IEEE Trans. ASSP 32(6), 1984):
   ``gamma(t) = |z(t)|^2 / phi_r``,
   ``xi(t) = alpha |S(t-1)|^2 / phi_r + (1 - alpha) max(gamma(t) - 1, 0)``, ``alpha = 0.98``,
   ``xi >= xi_min = -25 dB`` (the floor Cappé 1994 recommends against musical noise),
   ``G = xi / (1 + xi)`` (Wiener), ``S(t) = G z(t)`` feeds the next frame's prior (the gain
   before the floor, so the floor does not inflate the SNR estimate). The applied gain is
   ``max(G, 10^(-18/20))``: a -18 dB gain floor.
6. **Phase**: the output is ``max(G, floor) z``, i.e. it keeps the **MVDR output's phase**
   (``phase="reference"`` uses the reference microphone's phase instead).

CLI (for trying it on a file; the benchmark imports the functions)::

    .venv/bin/python benchmarks/offline_baseline.py take.wav out.wav --noise-region 0:1.4
    .venv/bin/python benchmarks/offline_baseline.py take.wav out.wav --room-tone tone.wav
"""

from __future__ import annotations

import argparse
import sys
from dataclasses import dataclass

import numpy as np
import scipy.signal
from numpy.typing import NDArray

FRAME_S = 0.064
DD_ALPHA = 0.98
XI_MIN_DB = -25.0
GAIN_FLOOR_DB = -18.0
# Relative diagonal loading of Phi_v before the Cholesky factor: keeps a rank-deficient
# estimate (a short lead-in, digital silence in one channel) invertible; far below any noise
# eigenvalue of a real recording, and MVDR stays exactly distortionless for any loading.
LOADING = 1e-9


@dataclass(frozen=True)
class BaselineResult:
    """Output of :func:`enhance`: the cleaned reference channel and its intermediate parts."""

    output: NDArray[np.float64]  # (N,) cleaned signal, sample-aligned with the input
    mvdr: NDArray[np.float64]  # (N,) MVDR output before the post-filter
    rtf: NDArray[np.complex128]  # (F, M) RTF per bin, relative to the reference microphone
    gain: NDArray[np.float64]  # (F, T) applied post-filter gain (floor included)


def stft_transform(sample_rate_hz: float, frame_s: float = FRAME_S) -> scipy.signal.ShortTimeFFT:
    """Hann-windowed STFT of ``round(frame_s fs)`` samples, hop a quarter frame (75 % overlap)."""
    n = round(frame_s * sample_rate_hz)
    if n < 8:
        raise ValueError(f"frame of {n} samples is too short")
    window = scipy.signal.get_window("hann", n, fftbins=True)
    return scipy.signal.ShortTimeFFT(window, hop=n // 4, fs=sample_rate_hz, fft_mode="onesided")


def analyse(x: NDArray, sample_rate_hz: float) -> tuple[NDArray[np.complex128], object]:
    """STFT of ``x`` (M, N): spectra (F, T, M) and the transform (for synthesis)."""
    transform = stft_transform(sample_rate_hz)
    spec = transform.stft(np.asarray(x, dtype=float), axis=-1)  # (M, F, T)
    return np.ascontiguousarray(np.moveaxis(spec, 0, -1)), transform


def frames_within(transform, n_samples: int, start: int, stop: int) -> NDArray[np.intp]:
    """Indices of the frames of an ``n_samples`` signal lying wholly in ``[start, stop)``."""
    lo, hi = transform.p_min, transform.p_max(n_samples)
    p = np.arange(lo, hi)
    first = p * transform.hop - transform.m_num_mid
    inside = (first >= start) & (first + transform.m_num <= stop)
    return np.flatnonzero(inside)


def covariance(spectra: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """``mean_t y(f,t) y(f,t)^H`` of spectra (F, T, M): (F, M, M)."""
    if spectra.shape[1] == 0:
        raise ValueError("no frames to estimate a covariance from")
    return np.einsum("ftm,ftn->fmn", spectra, np.conj(spectra)) / spectra.shape[1]


def _loaded(phi: NDArray) -> NDArray:
    m = phi.shape[-1]
    scale = np.real(np.trace(phi, axis1=-2, axis2=-1)) / m
    scale = np.maximum(scale, np.finfo(float).tiny)
    return phi + (LOADING * scale)[:, None, None] * np.eye(m)


def rtf_covariance_whitening(
    phi_y: NDArray[np.complex128], phi_v: NDArray[np.complex128], reference: int = 0
) -> NDArray[np.complex128]:
    """RTF per bin by covariance whitening (Markovich-Golan & Gannot 2015).

    ``g = L u / (L u)_r`` with ``Phi_v = L L^H`` and ``u`` the principal eigenvector of
    ``L^-1 Phi_y L^-H``. Shapes: (F, M, M) in, (F, M) out.
    """
    chol = np.linalg.cholesky(_loaded(phi_v))
    inv = np.linalg.inv(chol)
    white = inv @ phi_y @ np.conj(np.swapaxes(inv, -1, -2))
    white = 0.5 * (white + np.conj(np.swapaxes(white, -1, -2)))
    _, vecs = np.linalg.eigh(white)
    g = np.einsum("fij,fj->fi", chol, vecs[..., -1])
    g_ref = g[:, reference : reference + 1]
    # A bin where the de-whitened vector vanishes at the reference (never in practice) would
    # divide by zero; it falls back to the reference microphone alone.
    bad = np.abs(g_ref[:, 0]) < 1e-300
    g = g / np.where(bad[:, None], 1.0, g_ref)
    g[bad] = 0.0
    g[bad, reference] = 1.0
    return g


def mvdr_weights(
    phi_v: NDArray[np.complex128], g: NDArray[np.complex128]
) -> tuple[NDArray[np.complex128], NDArray[np.float64]]:
    """MVDR weights ``w = Phi_v^-1 g / (g^H Phi_v^-1 g)`` (F, M) and residual PSD (F,).

    The residual noise PSD of ``z = w^H y`` is ``w^H Phi_v w = 1 / (g^H Phi_v^-1 g)``.
    """
    phi = _loaded(phi_v)
    p = np.linalg.solve(phi, g[..., None])[..., 0]
    denom = np.real(np.einsum("fm,fm->f", np.conj(g), p))
    w = p / denom[:, None]
    residual = np.real(np.einsum("fm,fmn,fn->f", np.conj(w), phi_v, w))
    return w, np.maximum(residual, np.finfo(float).tiny)


def wiener_dd_gain(
    z: NDArray[np.complex128],
    noise_psd: NDArray[np.float64],
    alpha: float = DD_ALPHA,
    xi_min_db: float = XI_MIN_DB,
) -> NDArray[np.float64]:
    """Wiener gain (F, T) from the decision-directed a-priori SNR (Ephraim & Malah 1984).

    ``z`` is (F, T); ``noise_psd`` (F,) or (F, T). No floor is applied here (see
    :func:`postfilter`). The first frame's prior uses ``max(gamma - 1, 0)`` alone.
    """
    z = np.asarray(z)
    noise = np.broadcast_to(np.asarray(noise_psd, dtype=float).reshape(z.shape[0], -1), z.shape)
    gamma = np.abs(z) ** 2 / noise
    xi_min = 10 ** (xi_min_db / 10)
    ml = np.maximum(gamma - 1.0, 0.0)
    gain = np.empty(z.shape)
    previous = ml[:, 0]  # |S(t-1)|^2 / phi_r; the first frame has only its own evidence
    for t in range(z.shape[1]):  # recursive in time: vectorised over bins only
        xi = np.maximum(alpha * previous + (1 - alpha) * ml[:, t], xi_min)
        g = xi / (1 + xi)
        gain[:, t] = g
        previous = g * g * gamma[:, t]
    return gain


def postfilter(
    z: NDArray[np.complex128],
    noise_psd: NDArray[np.float64],
    floor_db: float = GAIN_FLOOR_DB,
) -> NDArray[np.float64]:
    """The applied gain: :func:`wiener_dd_gain` limited below by ``floor_db``."""
    return np.maximum(wiener_dd_gain(z, noise_psd), 10 ** (floor_db / 20))


def enhance(
    x: NDArray,
    sample_rate_hz: float,
    noise: tuple[int, int] | NDArray,
    reference: int = 0,
    phase: str = "mvdr",
    floor_db: float = GAIN_FLOOR_DB,
) -> BaselineResult:
    """Run the offline chain on a take ``x`` (M, N).

    ``noise`` is either a sample range ``(start, stop)`` of the take that holds noise only
    (the lead-in), or a separate noise-only recording (M, K) (room tone). ``phase`` is
    ``"mvdr"`` (the MVDR output's phase, the default) or ``"reference"``.
    """
    x = np.asarray(x, dtype=float)
    if x.ndim != 2 or x.shape[0] < 2:
        raise ValueError(f"expected (channels >= 2, samples), got shape {x.shape}")
    if phase not in ("mvdr", "reference"):
        raise ValueError(f"phase must be 'mvdr' or 'reference', got {phase!r}")
    n = x.shape[1]
    y, transform = analyse(x, sample_rate_hz)
    if isinstance(noise, tuple):
        idx = frames_within(transform, n, *noise)
        if idx.size < x.shape[0]:
            raise ValueError(f"noise region {noise} holds only {idx.size} whole frames")
        phi_v = covariance(y[:, idx])
    else:
        tone, _ = analyse(noise, sample_rate_hz)
        if tone.shape[-1] != x.shape[0]:
            raise ValueError("room tone must have the take's channels")
        phi_v = covariance(tone)
    phi_y = covariance(y)
    g = rtf_covariance_whitening(phi_y, phi_v, reference)
    w, residual = mvdr_weights(phi_v, g)
    z = np.einsum("fm,ftm->ft", np.conj(w), y)
    gain = postfilter(z, residual, floor_db)
    out = gain * z
    if phase == "reference":
        out = np.abs(out) * np.exp(1j * np.angle(y[..., reference]))
    cleaned = transform.istft(out, k1=n)
    mvdr = transform.istft(z, k1=n)
    return BaselineResult(output=cleaned, mvdr=mvdr, rtf=g, gain=gain)


def _region(text: str) -> tuple[float, float]:
    a, b = text.split(":")
    return float(a), float(b)


def main(argv: list[str] | None = None) -> int:
    import soundfile

    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("input", help="multichannel take (any format soundfile reads)")
    parser.add_argument("output", help="mono cleaned reference channel (float WAV)")
    noise = parser.add_mutually_exclusive_group(required=True)
    noise.add_argument("--noise-region", type=_region, metavar="START:END",
                       help="noise-only stretch of the take, seconds")
    noise.add_argument("--room-tone", help="separate noise-only recording, same channels")
    parser.add_argument("--reference", type=int, default=0)
    parser.add_argument("--phase", choices=("mvdr", "reference"), default="mvdr")
    args = parser.parse_args(argv)
    x, fs = soundfile.read(args.input, always_2d=True)
    if args.room_tone:
        tone, fs_tone = soundfile.read(args.room_tone, always_2d=True)
        if fs_tone != fs:
            raise SystemExit("room tone and take must share a sample rate")
        noise_arg: tuple[int, int] | NDArray = tone.T
    else:
        noise_arg = (round(args.noise_region[0] * fs), round(args.noise_region[1] * fs))
    result = enhance(x.T, fs, noise_arg, args.reference, args.phase)
    soundfile.write(args.output, result.output, fs, subtype="FLOAT")
    return 0


if __name__ == "__main__":
    sys.exit(main())
