"""Simulated multichannel scenes for a linear microphone array (demo and tests).

Everything here is free-field physics plus a simple reverberation model, in numpy/scipy:

* **Propagation.** Microphones lie on the x axis at ``mic_positions_m``. Bearings follow
  ``liftmag.geometry``: degrees in the horizontal plane from the +x axis, 90 deg broadside, a
  source at 0 deg lies on the +x side. A far-field source reaches microphone m
  ``(x_m - x_r) cos(theta) / c`` seconds *earlier* than the reference microphone r; a point
  source at distance ``distance_m`` from the origin uses the exact path lengths and 1/r
  spreading. Delays are Kaiser-windowed sinc fractional-delay filters, relative to the
  reference microphone's direct path, so the reference image of an anechoic source is the
  source signal itself.
  c = 343 m/s, dry air at 20 degC (handbook value, e.g. Kinsler et al., *Fundamentals of
  Acoustics*; recalled from memory).
* **Reverberation** (``Reverb``): a few discrete early reflections (plane waves from random
  directions, 1/r spreading over the extra path) plus a late tail of noise with an exponential
  envelope ``exp(-3 ln(10) t / RT60)`` (energy down 60 dB after RT60, as RT60 is defined),
  spatially diffuse between microphones, scaled to a direct-to-reverberant energy ratio at the
  reference microphone. One broadband RT60; real rooms decay faster at high frequencies.
* **Diffuse noise** with the spherically isotropic coherence ``sinc(2 pi f d / c)`` between
  microphones d metres apart (Cook et al., J. Acoust. Soc. Am. 27, 1072, 1955), made by mixing
  independent white noises per frequency bin with a Cholesky factor of the coherence matrix.
* Noise generators draw random numbers in time order and filter causally or with fixed FIRs,
  so rendering room tone after a take leaves the take unchanged (to rounding).
* **Sensor noise** (independent per microphone), **mains hum** (50 Hz and harmonics),
  **fan / engine noise** (low-passed broadband noise plus blade-pass or firing-rate tones).

``Scene`` bundles a rendered take: ``mixture = target_images + noise_image`` exactly. The
signal-to-noise ratio is set at the reference microphone over the *speech-active* samples
(``speech_activity``: 20 ms frames of the reference target image within 40 dB of its loudest
frame), so pauses do not dilute it.

Simulated scenes are a test bench, not a recording: estimator scores on them say how methods
compare under known conditions. Rendered levels can peak near 0 dBFS; turn monitoring down
before listening.
"""

from __future__ import annotations

import importlib.resources
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import scipy.fft
import scipy.signal
from numpy.typing import ArrayLike, NDArray

# One value for the whole package: dry air at 20 degC (handbook value; see liftmag.geometry).
from liftmag.geometry import SPEED_OF_SOUND_M_S

SPEECH_NAMES = ("talker_a", "talker_b")

_ACTIVITY_FRAME_S = 0.02
_ACTIVITY_THRESHOLD_DB = -40.0
# Keeps the Cholesky factor defined where the coherence matrix is singular (all ones at DC);
# changes the coherence by about 1e-10, far below any estimate's resolution.
_CHOLESKY_LOADING = 1e-10


# ----------------------------------------------------------------------------- data types


@dataclass(frozen=True)
class Reverb:
    """Parameters of the simple reverberation model.

    Attributes
    ----------
    rt60_s : float
        Reverberation time of the late tail: energy decays 60 dB in ``rt60_s`` seconds.
    drr_db : float
        Direct-to-reverberant energy ratio at the reference microphone, dB: direct-path energy
        over the energy of early reflections plus tail.
    n_early : int
        Number of discrete early reflections.
    early_span_s : tuple[float, float]
        Extra delays of the early reflections after the direct sound (uniform in this range);
        the tail starts at the upper end.
    early_fraction : float
        Share of the reverberant energy carried by the early reflections (0..1); the rest is
        in the tail. Physically the DRR falls with source distance: give each source its own
        ``Reverb`` (``dataclasses.replace``) when that matters.
    """

    rt60_s: float = 0.3
    drr_db: float = 6.0
    n_early: int = 6
    early_span_s: tuple[float, float] = (0.002, 0.025)
    early_fraction: float = 0.4

    def __post_init__(self) -> None:
        if not (np.isfinite(self.rt60_s) and 0.02 <= self.rt60_s <= 5.0):
            raise ValueError(f"rt60_s must lie in [0.02, 5] s, got {self.rt60_s}")
        if not np.isfinite(self.drr_db):
            raise ValueError(f"drr_db must be finite, got {self.drr_db}")
        if int(self.n_early) != self.n_early or self.n_early < 0:
            raise ValueError(f"n_early must be a non-negative integer, got {self.n_early}")
        lo, hi = self.early_span_s
        if not (0.0 < lo <= hi <= 0.2):
            raise ValueError(f"early_span_s must satisfy 0 < lo <= hi <= 0.2 s, got {(lo, hi)}")
        if not 0.0 <= self.early_fraction < 1.0:
            raise ValueError(f"early_fraction must lie in [0, 1), got {self.early_fraction}")

    @property
    def length_s(self) -> float:
        """Impulse-response length: early span plus the tail down to -72 dB (1.2 RT60)."""
        return self.early_span_s[1] + 1.2 * self.rt60_s


@dataclass(frozen=True, eq=False)
class Scene:
    """A rendered multichannel take with its parts kept apart.

    Attributes
    ----------
    mixture : (M, N) float64
        What the microphones record: ``target_images + noise_image`` (exactly, element-wise).
    target_image : (N,) float64
        The target talker as received at the reference microphone (direct sound plus its
        reverberation): what an estimator aims for. Equal to ``target_images[reference_mic]``.
    target_images : (M, N) float64
        The target talker as received at every microphone.
    noise_image : (M, N) float64
        Everything else at every microphone (interferers, diffuse, hum, fan, sensor noise).
    fs_hz : int
        Sample rate.
    mic_positions_m : (M,) float64
        Microphone positions along x, metres.
    target_deg : float
        Target bearing, degrees (90 = broadside).
    noise_only_range : tuple[int, int]
        Sample range ``[start, stop)`` of the noise-only lead-in (the talker is silent there).
    metadata : dict
        Scenario description: components, levels, geometry, reverberation, seed, SNR definition.
    reference_mic : int
        Index of the reference microphone.
    room_tone : (M, K) float64 or None
        A separate noise-only recording of the same noise sources, continuing after the take
        (as a location recordist records room tone), or None.
    noise_parts : dict[str, (M, N) float64]
        Each noise component as scaled into the take (for per-component checks and oracle
        statistics); they sum to ``noise_image`` to rounding (not bit-exactly).

    Arrays are stored read-only so the identity ``mixture == target_images + noise_image``
    cannot be broken by accident; copy them to modify.
    """

    mixture: NDArray[np.float64]
    target_image: NDArray[np.float64]
    target_images: NDArray[np.float64]
    noise_image: NDArray[np.float64]
    fs_hz: int
    mic_positions_m: NDArray[np.float64]
    target_deg: float
    noise_only_range: tuple[int, int]
    metadata: dict[str, Any] = field(default_factory=dict)
    reference_mic: int = 0
    room_tone: NDArray[np.float64] | None = None
    noise_parts: dict[str, NDArray[np.float64]] = field(default_factory=dict)

    def __post_init__(self) -> None:
        for name in ("mixture", "target_image", "target_images", "noise_image", "mic_positions_m"):
            arr = np.array(getattr(self, name), dtype=np.float64)
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)
        if self.room_tone is not None:
            tone = np.array(self.room_tone, dtype=np.float64)
            tone.setflags(write=False)
            object.__setattr__(self, "room_tone", tone)
        parts = {}
        for name, part in self.noise_parts.items():
            part = np.array(part, dtype=np.float64)
            part.setflags(write=False)
            parts[name] = part
        object.__setattr__(self, "noise_parts", parts)
        m, n = self.mixture.shape if self.mixture.ndim == 2 else (0, 0)
        if self.mixture.ndim != 2 or m < 2:
            raise ValueError(f"mixture must be (channels >= 2, samples), got {self.mixture.shape}")
        for name in ("target_images", "noise_image"):
            if getattr(self, name).shape != (m, n):
                raise ValueError(f"{name} must have the mixture's shape {(m, n)}")
        if self.mic_positions_m.shape != (m,):
            raise ValueError(f"mic_positions_m must have shape ({m},)")
        if not 0 <= self.reference_mic < m:
            raise ValueError(f"reference_mic {self.reference_mic} is not in 0..{m - 1}")
        if self.target_image.shape != (n,):
            raise ValueError(f"target_image must have shape ({n},)")
        start, stop = self.noise_only_range
        if not 0 <= start <= stop <= n:
            raise ValueError(f"noise_only_range {self.noise_only_range} is outside 0..{n}")
        tone = self.room_tone
        if tone is not None and (tone.ndim != 2 or tone.shape[0] != m):
            raise ValueError(f"room_tone must be ({m}, samples), got {self.room_tone.shape}")
        if any(p.shape != (m, n) for p in self.noise_parts.values()):
            raise ValueError(f"noise_parts must have the mixture's shape {(m, n)}")
        if int(self.fs_hz) != self.fs_hz or self.fs_hz <= 0:
            raise ValueError(f"fs_hz must be a positive integer, got {self.fs_hz}")

    @property
    def n_mics(self) -> int:
        """Number of microphones M."""
        return int(self.mixture.shape[0])

    @property
    def duration_s(self) -> float:
        """Length of the take in seconds."""
        return self.mixture.shape[1] / self.fs_hz

    @property
    def noise_only(self) -> slice:
        """The noise-only lead-in as a slice over samples."""
        return slice(*self.noise_only_range)


# ----------------------------------------------------------------------------- validation


def _check_positions_m(mic_positions_m: ArrayLike) -> NDArray[np.float64]:
    pos = np.asarray(mic_positions_m, dtype=float)
    if pos.ndim != 1 or pos.size < 2:
        raise ValueError(f"mic_positions_m must be 1-D with >= 2 x positions, got {pos.shape}")
    if not np.all(np.isfinite(pos)):
        raise ValueError("mic_positions_m must be finite")
    if np.min(np.abs(np.subtract.outer(pos, pos)) + np.eye(pos.size)) <= 0:
        raise ValueError("two microphones share a position")
    return pos


def _check_fs(fs_hz: float) -> int:
    if int(fs_hz) != fs_hz or fs_hz < 1000:
        raise ValueError(f"fs_hz must be an integer sample rate >= 1000 Hz, got {fs_hz}")
    return int(fs_hz)


def _check_n(n_samples: int) -> int:
    if int(n_samples) != n_samples or n_samples < 1:
        raise ValueError(f"n_samples must be a positive integer, got {n_samples}")
    return int(n_samples)


def _rng(rng: np.random.Generator | int | None) -> np.random.Generator:
    if isinstance(rng, np.random.Generator):
        return rng
    if rng is None:
        raise ValueError("a seed or numpy Generator is required (scenes are reproducible)")
    return np.random.default_rng(rng)


# ----------------------------------------------------------------------------- speech


def load_speech(name: str) -> tuple[NDArray[np.float64], int]:
    """Load one of the packaged synthetic speech recordings.

    Parameters
    ----------
    name : {"talker_a", "talker_b"}
        ``talker_a``: target talker, about 10.5 s; ``talker_b``: competing talker, about 46 s.
        Both are the project's own sentences synthesised with espeak-ng (see ``data/README.md``).

    Returns
    -------
    signal : (N,) float64 in [-1, 1], peak about -3 dBFS
    fs_hz : int (16000)
    """
    import soundfile  # the one file read in this module; kept local so the core imports light

    if name not in SPEECH_NAMES:
        raise ValueError(f"unknown speech {name!r}; choose one of {SPEECH_NAMES}")
    resource = importlib.resources.files("liftmag") / "data" / f"{name}.flac"
    with importlib.resources.as_file(resource) as path:
        signal, fs_hz = soundfile.read(path, dtype="float64", always_2d=False)
    return np.asarray(signal, dtype=np.float64), int(fs_hz)


def speech_activity(
    signal: ArrayLike,
    fs_hz: int,
    frame_s: float = _ACTIVITY_FRAME_S,
    threshold_db: float = _ACTIVITY_THRESHOLD_DB,
) -> NDArray[np.bool_]:
    """Per-sample speech-activity mask from frame energies.

    Non-overlapping frames of ``frame_s`` seconds (the last one may be short) are active when
    their mean-square level is within ``threshold_db`` of the loudest frame. A plain energy
    gate, adequate for clean synthetic speech; not a voice-activity detector for noisy input.

    Returns
    -------
    mask : (N,) bool
    """
    x = np.asarray(signal, dtype=float)
    if x.ndim != 1 or x.size == 0:
        raise ValueError("signal must be a non-empty 1-D array")
    if not threshold_db < 0:
        raise ValueError(f"threshold_db must be negative, got {threshold_db}")
    frame = max(1, round(frame_s * _check_fs(fs_hz)))
    n_frames = -(-x.size // frame)
    padded = np.zeros(n_frames * frame)
    padded[: x.size] = x**2
    counts = np.full(n_frames, frame, dtype=float)
    counts[-1] = x.size - (n_frames - 1) * frame
    energy = padded.reshape(n_frames, frame).sum(axis=1) / counts
    peak = energy.max()
    if peak <= 0:
        return np.zeros(x.size, dtype=bool)
    active = energy >= peak * 10 ** (threshold_db / 10)
    return np.repeat(active, frame)[: x.size]


# ----------------------------------------------------------------------------- noise sources
#
# Every generator below draws its random numbers in time order and filters causally (or with
# a fixed FIR), so a longer render begins with exactly the samples of a shorter one (up to FFT
# rounding): asking for room tone after a take does not change the take.


def _tilt_gain(freqs_hz: NDArray, tilt_db_per_octave: float, corner_hz: float) -> NDArray:
    if not np.isfinite(tilt_db_per_octave) or not corner_hz > 0:
        raise ValueError("tilt_db_per_octave must be finite and corner_hz positive")
    exponent = tilt_db_per_octave / (20 * np.log10(2))  # amplitude exponent
    return (np.maximum(freqs_hz, corner_hz) / 1000.0) ** exponent


def _fir_from_response(response: NDArray, n_taps: int) -> NDArray:
    """Linear-phase FIR taps (..., n_taps) from a real zero-phase response on the rfft grid."""
    taps = np.fft.irfft(response, n_taps, axis=0)  # (n_taps, ...) zero-phase, circular
    taps = np.roll(taps, n_taps // 2, axis=0) * np.hanning(n_taps).reshape(
        (n_taps,) + (1,) * (taps.ndim - 1)
    )
    return np.moveaxis(taps, 0, -1)


def _filtered_white(
    n: int, taps: NDArray, rng: np.random.Generator
) -> NDArray[np.float64]:
    """``out_i = sum_j taps_ij * z_j`` for white unit-variance ``z`` drawn in time order.

    ``taps`` is (M, M, K); each output channel is normalised to unit expected variance.
    """
    m, _, k = taps.shape
    white = rng.standard_normal((n + k - 1, m)).T  # time-major draw: prefix-stable
    out = np.empty((m, n))
    for i in range(m):  # M rows, each a batched convolution over the M inputs
        rows = scipy.signal.oaconvolve(white, taps[i], mode="valid", axes=-1)
        out[i] = rows.sum(axis=0) / np.sqrt(np.sum(taps[i] ** 2))
    return out


_NOISE_TAPS = 2048  # 7.8 Hz resolution at 16 kHz, fine against sinc(2 pi f d / c) features


def coloured_noise(
    n_samples: int,
    fs_hz: int,
    rng: np.random.Generator | int,
    tilt_db_per_octave: float = -3.0,
    corner_hz: float = 50.0,
) -> NDArray[np.float64]:
    """Gaussian noise with a power spectrum falling ``tilt_db_per_octave`` per octave.

    Power spectral density ``S(f) ∝ (max(f, corner_hz) / 1 kHz) ** (tilt / (10 log10 2))``:
    0 dB/oct is white, -3 pink, -6 brown; flat below ``corner_hz`` so the power stays finite.
    Made by a 2048-tap linear-phase FIR on white noise. Unit expected mean square.
    """
    n = _check_n(n_samples)
    fs = _check_fs(fs_hz)
    freqs = np.fft.rfftfreq(_NOISE_TAPS, 1 / fs)
    taps = _fir_from_response(_tilt_gain(freqs, tilt_db_per_octave, corner_hz), _NOISE_TAPS)
    return _filtered_white(n, taps[None, None, :], _rng(rng))[0]


def diffuse_coherence(
    mic_positions_m: ArrayLike,
    frequencies_hz: ArrayLike,
    speed_of_sound_m_s: float = SPEED_OF_SOUND_M_S,
) -> NDArray[np.float64]:
    """Coherence matrices of a spherically isotropic (diffuse) noise field.

    ``Gamma_ij(f) = sin(2 pi f d_ij / c) / (2 pi f d_ij / c)`` with ``d_ij`` the distance between
    microphones i and j (Cook et al., J. Acoust. Soc. Am. 27, 1072, 1955).

    Returns
    -------
    gamma : (F, M, M) float64, real symmetric, unit diagonal
    """
    pos = _check_positions_m(mic_positions_m)
    f = np.atleast_1d(np.asarray(frequencies_hz, dtype=float))
    dist_m = np.abs(np.subtract.outer(pos, pos))
    return np.sinc(2.0 * f[:, None, None] * dist_m[None] / speed_of_sound_m_s)


def diffuse_noise(
    n_samples: int,
    fs_hz: int,
    mic_positions_m: ArrayLike,
    rng: np.random.Generator | int,
    tilt_db_per_octave: float = 0.0,
    speed_of_sound_m_s: float = SPEED_OF_SOUND_M_S,
) -> NDArray[np.float64]:
    """Spatially diffuse Gaussian noise at a linear array.

    Independent white noises ``z`` (one per microphone) are mixed per frequency by the lower
    Cholesky factor ``L(f)`` of the diffuse coherence matrix (``diffuse_coherence``), so the
    cross-spectral matrix of the output is ``S(f) L L^T = S(f) Gamma(f)``, ``S`` the common
    power spectrum (white, or tilted by ``tilt_db_per_octave`` as in ``coloured_noise``).
    ``L(f)`` is sampled every ``fs / 2048`` Hz and applied as a 2048-tap linear-phase FIR
    matrix (Hann-windowed), which smooths the coherence over about 16 Hz.

    Returns
    -------
    noise : (M, n_samples) float64, unit expected mean square per microphone
    """
    n = _check_n(n_samples)
    fs = _check_fs(fs_hz)
    pos = _check_positions_m(mic_positions_m)
    freqs = np.fft.rfftfreq(_NOISE_TAPS, 1 / fs)
    gamma = diffuse_coherence(pos, freqs, speed_of_sound_m_s)
    chol = np.linalg.cholesky(gamma + _CHOLESKY_LOADING * np.eye(pos.size))  # real: Gamma real
    response = chol * _tilt_gain(freqs, tilt_db_per_octave, 50.0)[:, None, None]
    return _filtered_white(n, _fir_from_response(response, _NOISE_TAPS), _rng(rng))


def sensor_noise(
    n_samples: int, n_mics: int, rng: np.random.Generator | int
) -> NDArray[np.float64]:
    """Self-noise of the microphones and preamplifiers: white Gaussian, independent per channel.

    Returns
    -------
    noise : (n_mics, n_samples) float64, unit variance
    """
    if int(n_mics) != n_mics or n_mics < 1:
        raise ValueError(f"n_mics must be a positive integer, got {n_mics}")
    return _rng(rng).standard_normal((_check_n(n_samples), int(n_mics))).T.copy()


def mains_hum(
    n_samples: int,
    fs_hz: int,
    rng: np.random.Generator | int,
    mains_hz: float = 50.0,
    harmonic_levels_db: ArrayLike = (0.0, -8.0, -4.0, -14.0, -10.0, -20.0, -16.0, -26.0),
) -> NDArray[np.float64]:
    """Mains hum: the mains frequency and its harmonics with random phases.

    ``h(t) = sum_k a_k cos(2 pi k f0 t + phi_k)``, ``a_k = 10 ** (level_k / 20)``. The default
    levels (odd harmonics stronger, as from a saturating transformer core) are an invented
    spectrum, not a measurement. Harmonics at or above Nyquist are dropped. Unit mean square.
    """
    n = _check_n(n_samples)
    fs = _check_fs(fs_hz)
    levels_db = np.atleast_1d(np.asarray(harmonic_levels_db, dtype=float))
    if not (np.isfinite(mains_hz) and 0 < mains_hz < fs / 2):
        raise ValueError(f"mains_hz must lie in (0, fs/2), got {mains_hz}")
    if levels_db.ndim != 1 or levels_db.size == 0 or not np.all(np.isfinite(levels_db)):
        raise ValueError("harmonic_levels_db must be a non-empty 1-D array of finite dB values")
    freqs_hz = mains_hz * np.arange(1, levels_db.size + 1)
    keep = freqs_hz < fs / 2
    amps = 10 ** (levels_db[keep] / 20)
    phases = _rng(rng).uniform(0, 2 * np.pi, size=levels_db.size)[keep]
    t_s = np.arange(n) / fs
    hum = amps @ np.cos(2 * np.pi * freqs_hz[keep, None] * t_s[None, :] + phases[:, None])
    return hum / np.sqrt(np.sum(amps**2) / 2)


def _impulse_energy(sos: NDArray, n: int) -> float:
    impulse = np.zeros(n)
    impulse[0] = 1.0
    return float(np.sum(scipy.signal.sosfilt(sos, impulse) ** 2))


def fan_noise(
    n_samples: int,
    fs_hz: int,
    rng: np.random.Generator | int,
    blade_pass_hz: float = 120.0,
    n_harmonics: int = 5,
    tones_db: float = -3.0,
    lowpass_hz: float = 800.0,
    speed_wobble: float = 0.004,
) -> NDArray[np.float64]:
    """Noise of a rotating machine: low-passed broadband noise plus harmonic tones.

    Broadband part: white Gaussian noise through a 2nd-order Butterworth low-pass at
    ``lowpass_hz`` (air turbulence). Tonal part: the blade-pass frequency (blades x rev/s; for
    an engine, the firing rate) and its harmonics with amplitudes 1/k, whose common speed
    wanders by a relative standard deviation ``speed_wobble`` (white noise low-passed at 2 Hz),
    as real machines do. ``tones_db`` is the tonal power relative to the broadband power.
    Unit expected mean square.
    """
    n = _check_n(n_samples)
    fs = _check_fs(fs_hz)
    if not 0 < blade_pass_hz < fs / 2:
        raise ValueError(f"blade_pass_hz must lie in (0, fs/2), got {blade_pass_hz}")
    if int(n_harmonics) != n_harmonics or n_harmonics < 0:
        raise ValueError(f"n_harmonics must be a non-negative integer, got {n_harmonics}")
    if not 0 < lowpass_hz < fs / 2:
        raise ValueError(f"lowpass_hz must lie in (0, fs/2), got {lowpass_hz}")
    if not (np.isfinite(speed_wobble) and 0 <= speed_wobble < 0.2):
        raise ValueError(f"speed_wobble must lie in [0, 0.2), got {speed_wobble}")
    if not np.isfinite(tones_db):
        raise ValueError(f"tones_db must be finite, got {tones_db}")
    gen = _rng(rng)
    # Separate streams per part keep every part prefix-stable; one second of warm-up lets the
    # filters reach their stationary state before sample 0.
    broad_rng, wander_rng = (np.random.default_rng(s) for s in gen.integers(0, 2**63, size=2))
    start_phase = gen.uniform(0, 2 * np.pi, size=int(n_harmonics))
    warm = fs
    sos = scipy.signal.butter(2, lowpass_hz, btype="low", fs=fs, output="sos")
    broadband = scipy.signal.sosfilt(sos, broad_rng.standard_normal(n + warm))[warm:]
    broadband /= np.sqrt(_impulse_energy(sos, 4 * fs))
    if n_harmonics == 0:
        return broadband
    sos_w = scipy.signal.butter(1, 2.0, btype="low", fs=fs, output="sos")
    wander = scipy.signal.sosfilt(sos_w, wander_rng.standard_normal(n + 4 * warm))[4 * warm :]
    wander *= speed_wobble / np.sqrt(_impulse_energy(sos_w, 8 * fs))
    phase = 2 * np.pi * blade_pass_hz * np.cumsum(1.0 + wander) / fs
    k = np.arange(1, int(n_harmonics) + 1)
    keep = k * blade_pass_hz * (1 + 4 * speed_wobble) < fs / 2
    k, start_phase = k[keep], start_phase[keep]
    tones = (1.0 / k) @ np.cos(k[:, None] * phase[None, :] + start_phase[:, None])
    tone_power = 10 ** (tones_db / 10)
    tones *= np.sqrt(tone_power / (np.sum(1.0 / k**2) / 2))
    return (broadband + tones) / np.sqrt(1.0 + tone_power)


def bandpass(signal: ArrayLike, fs_hz: int, low_hz: float, high_hz: float) -> NDArray[np.float64]:
    """4th-order Butterworth band-pass (causal), e.g. a small loudspeaker's response."""
    fs = _check_fs(fs_hz)
    if not 0 < low_hz < high_hz < fs / 2:
        raise ValueError(f"need 0 < low_hz < high_hz < fs/2, got {low_hz}, {high_hz}")
    sos = scipy.signal.butter(2, [low_hz, high_hz], btype="band", fs=fs, output="sos")
    return scipy.signal.sosfilt(sos, np.asarray(signal, dtype=float), axis=-1)


# ----------------------------------------------------------------------------- propagation

# Fractional delays are Kaiser-windowed sinc kernels (Laakso et al., "Splitting the unit
# delay", IEEE Signal Processing Magazine 13(1), 1996): 2 x 32 taps, beta 8. Measured on these
# settings: magnitude within 0.002 dB and phase within 1e-4 rad of the ideal delay up to
# 0.9 Nyquist, -0.13 dB at 0.94 Nyquist. An integer delay is an exact unit impulse, so the
# reference microphone's direct sound is the source itself.
_FD_HALF_WIDTH = 32
_FD_KAISER_BETA = 8.0


def _delay_kernels(positions: NDArray, n_taps: int) -> NDArray:
    """Windowed-sinc kernels centred at the (fractional) sample ``positions``: (..., n_taps)."""
    x = np.arange(n_taps) - positions[..., None]
    inside = np.abs(x) <= _FD_HALF_WIDTH
    arg = np.sqrt(np.clip(1.0 - (x / _FD_HALF_WIDTH) ** 2, 0.0, None))
    window = np.i0(_FD_KAISER_BETA * arg) / np.i0(_FD_KAISER_BETA)
    return np.where(inside, np.sinc(x) * window, 0.0)


def _direct_path(
    pos_m: NDArray, bearing_deg: float, distance_m: float | None, reference_mic: int, c: float
) -> tuple[NDArray, NDArray]:
    """Per-mic delays (s, relative to the reference mic) and gains of the direct sound."""
    theta = np.deg2rad(bearing_deg)
    if distance_m is None:
        lead_s = (pos_m - pos_m[reference_mic]) * np.cos(theta) / c
        return -lead_s, np.ones_like(pos_m)
    src = distance_m * np.array([np.cos(theta), np.sin(theta)])
    path_m = np.hypot(src[0] - pos_m, src[1])
    if np.min(path_m) < 0.01:
        raise ValueError("a point source must be at least 1 cm from every microphone")
    return (path_m - path_m[reference_mic]) / c, path_m[reference_mic] / path_m


def impulse_responses(
    fs_hz: int,
    mic_positions_m: ArrayLike,
    bearing_deg: float,
    distance_m: float | None = None,
    reverb: Reverb | None = None,
    rng: np.random.Generator | int | None = None,
    reference_mic: int = 0,
    speed_of_sound_m_s: float = SPEED_OF_SOUND_M_S,
) -> tuple[NDArray[np.float64], int]:
    """Source-to-microphone impulse responses of one source.

    ``h_m(t) = g_m delta(t - tau_m) + sum_k a_k delta(t - t_k - tau_km) + tail_m(t - t_e)``
    (delays as windowed-sinc fractional delays): the direct sound (delay ``tau_m`` relative to
    the reference microphone's direct path, which has ``tau = 0`` and gain 1; point sources add
    1/r spreading), early reflections (extra delay ``t_k`` uniform in ``early_span_s``,
    plane-wave arrival from a random direction, amplitudes ``∝ r / (r + c t_k)``: spherical
    spreading over the extra path, ``r`` the source distance, 3 m for a far-field source) and
    a diffuse tail (``diffuse_noise`` under an envelope decaying 60 dB in RT60, starting at
    ``t_e``, the end of the early span). Early and tail energies at the reference microphone
    are ``early_fraction`` and ``1 - early_fraction`` of ``10 ** (-drr_db / 10)``.

    Parameters
    ----------
    distance_m : float or None
        Distance of a point source from the array origin; None for a far-field plane wave.
    reverb : Reverb or None
        None for free field (anechoic).
    rng : Generator or int
        Needed with ``reverb`` (random reflection directions and tail).

    Returns
    -------
    irs : (M, L) float64
        Impulse responses.
    offset : int
        Sample of ``irs`` at which the reference microphone's direct sound arrives (a bulk
        delay that keeps earlier arrivals at other microphones causal); drop it to align.
    """
    fs = _check_fs(fs_hz)
    pos = _check_positions_m(mic_positions_m)
    if not np.isfinite(bearing_deg):
        raise ValueError(f"bearing_deg must be finite, got {bearing_deg}")
    if distance_m is not None and not (np.isfinite(distance_m) and distance_m > 0):
        raise ValueError(f"distance_m must be positive or None, got {distance_m}")
    if not 0 <= reference_mic < pos.size:
        raise ValueError(f"reference_mic {reference_mic} is not in 0..{pos.size - 1}")
    c = float(speed_of_sound_m_s)
    delay_s, gain = _direct_path(pos, bearing_deg, distance_m, reference_mic, c)
    delays_s = [delay_s[:, None]]
    amps = [gain[:, None]]
    tail = None
    if reverb is not None:
        gen = _rng(rng)
        r_m = 3.0 if distance_m is None else float(distance_m)
        extra_s = np.sort(gen.uniform(*reverb.early_span_s, size=reverb.n_early))
        cos_arrival = gen.uniform(-1.0, 1.0, size=reverb.n_early)  # isotropic in 3-D
        reverberant_energy = 10 ** (-reverb.drr_db / 10)
        a_k = r_m / (r_m + c * extra_s)
        if a_k.size:
            a_k *= np.sqrt(reverb.early_fraction * reverberant_energy / np.sum(a_k**2))
        rel_x = pos - pos[reference_mic]
        delays_s.append(extra_s[None, :] - rel_x[:, None] * cos_arrival[None, :] / c)
        amps.append(np.broadcast_to(a_k, (pos.size, a_k.size)))
        n_tail = round(1.2 * reverb.rt60_s * fs)
        t_s = np.arange(n_tail) / fs
        envelope = np.exp(-3 * np.log(10) * t_s / reverb.rt60_s)
        ramp = min(n_tail, round(0.005 * fs))  # 5 ms fade-in: no click at the tail onset
        envelope[:ramp] *= 0.5 - 0.5 * np.cos(np.pi * np.arange(ramp) / ramp)
        tail = diffuse_noise(n_tail, fs, pos, gen, speed_of_sound_m_s=c) * envelope
        tail_energy = reverberant_energy - float(np.sum(a_k**2))
        tail *= np.sqrt(tail_energy / np.sum(tail[reference_mic] ** 2))
    all_delays = np.concatenate(delays_s, axis=1) * fs  # (M, paths) in samples
    all_amps = np.concatenate(amps, axis=1)
    offset = _FD_HALF_WIDTH + 1 + int(np.ceil(max(0.0, -all_delays.min())))
    n_taps = offset + int(np.ceil(all_delays.max())) + _FD_HALF_WIDTH + 2
    tail_start = 0
    if tail is not None:
        tail_start = offset + round(reverb.early_span_s[1] * fs)
        n_taps = max(n_taps, tail_start + tail.shape[1])
    kernels = _delay_kernels(offset + all_delays, n_taps)  # (M, paths, L)
    irs = np.einsum("mp,mpl->ml", all_amps, kernels)
    if tail is not None:
        irs[:, tail_start : tail_start + tail.shape[1]] += tail
    return irs, offset


def source_image(
    signal: ArrayLike,
    fs_hz: int,
    mic_positions_m: ArrayLike,
    bearing_deg: float,
    distance_m: float | None = None,
    reverb: Reverb | None = None,
    rng: np.random.Generator | int | None = None,
    reference_mic: int = 0,
    speed_of_sound_m_s: float = SPEED_OF_SOUND_M_S,
) -> NDArray[np.float64]:
    """Render one source at every microphone: linear convolution with ``impulse_responses``.

    The output is aligned to the reference microphone's direct sound (the bulk ``offset`` is
    removed) and cropped to the input length, so microphones reached earlier than the
    reference lose their first few samples of lead. Pad the signal to taste.

    Returns
    -------
    images : (M, N) float64
    """
    x = np.asarray(signal, dtype=float)
    if x.ndim != 1 or x.size == 0:
        raise ValueError("signal must be a non-empty 1-D array")
    irs, offset = impulse_responses(
        fs_hz, mic_positions_m, bearing_deg, distance_m, reverb, rng, reference_mic,
        speed_of_sound_m_s,
    )
    full = scipy.signal.oaconvolve(x[None, :], irs, axes=-1)
    return full[:, offset : offset + x.size]


# ----------------------------------------------------------------------------- assembly


def assemble_scene(
    target_images: NDArray[np.float64],
    noise_components: Mapping[str, NDArray[np.float64]],
    levels_db: Mapping[str, float],
    snr_db: float,
    fs_hz: int,
    mic_positions_m: ArrayLike,
    target_deg: float,
    lead_in_samples: int,
    n_take: int,
    reference_mic: int = 0,
    metadata: Mapping[str, Any] | None = None,
) -> Scene:
    """Scale and sum rendered parts into a ``Scene``.

    Each noise component (``(M, n_take + K)``, K >= 0 samples of room tone after the take) is
    normalised to unit mean square at the reference microphone over the take, weighted by
    ``10 ** (levels_db[name] / 20)``, and summed. The sum is then scaled so that

        SNR = 10 log10( sum_A s_r[n]^2 / sum_A v_r[n]^2 ) = snr_db,

    with ``s_r`` the target image and ``v_r`` the noise at the reference microphone and A the
    speech-active samples of ``s_r`` (``speech_activity``). The same gains apply to the room
    tone, which is returned when K > 0. Levels are not normalised to full scale: at low SNR
    peaks can exceed 1.0, so write float files or scale down before writing fixed-point PCM
    (clipping would change the noise statistics the scene promises).
    """
    t_img = np.asarray(target_images, dtype=float)
    if t_img.ndim != 2 or t_img.shape[1] < n_take:
        raise ValueError(f"target_images must be (M, >= n_take) samples, got {t_img.shape}")
    if not np.isfinite(snr_db):
        raise ValueError(f"snr_db must be finite, got {snr_db}")
    if not noise_components:
        raise ValueError("at least one noise component is needed")
    if set(levels_db) != set(noise_components):
        raise ValueError("levels_db must name exactly the noise components")
    if not 0 <= lead_in_samples < n_take:
        raise ValueError(f"lead_in_samples must lie in [0, n_take), got {lead_in_samples}")
    m = t_img.shape[0]
    total = None
    weights = {}
    for name, comp in noise_components.items():
        comp = np.asarray(comp, dtype=float)
        if comp.ndim != 2 or comp.shape[0] != m or comp.shape[1] < n_take:
            raise ValueError(f"noise {name!r} must be ({m}, >= {n_take}), got {comp.shape}")
        if total is not None and comp.shape[1] != total.shape[1]:
            raise ValueError("noise components must share one length")
        power = np.mean(comp[reference_mic, :n_take] ** 2)
        if power <= 0:
            raise ValueError(f"noise component {name!r} is silent at the reference microphone")
        weights[name] = 10 ** (levels_db[name] / 20) / np.sqrt(power)
        weighted = comp * weights[name]
        total = weighted if total is None else total + weighted
    target = t_img[:, :n_take]
    active = speech_activity(target[reference_mic], fs_hz)
    if not active.any():
        raise ValueError("the target image is silent")
    signal_energy = np.sum(target[reference_mic, active] ** 2)
    noise_energy = np.sum(total[reference_mic, :n_take][active] ** 2)
    scale = np.sqrt(signal_energy / noise_energy * 10 ** (-snr_db / 10))
    total = total * scale
    parts = {
        name: np.asarray(comp, dtype=float)[:, :n_take] * (weights[name] * scale)
        for name, comp in noise_components.items()
    }
    noise = total[:, :n_take]
    room_tone = total[:, n_take:] if total.shape[1] > n_take else None
    meta = dict(metadata or {})
    meta.update(
        snr_db=float(snr_db),
        snr_definition=(
            "energy ratio at the reference microphone over speech-active samples of the target "
            f"image ({_ACTIVITY_FRAME_S * 1000:.0f} ms frames within "
            f"{-_ACTIVITY_THRESHOLD_DB:.0f} dB of the loudest)"
        ),
        speech_active_fraction=float(active.mean()),
        levels_db={k: float(v) for k, v in levels_db.items()},
    )
    return Scene(
        mixture=target + noise,
        target_image=target[reference_mic],
        target_images=target,
        noise_image=noise,
        fs_hz=int(fs_hz),
        mic_positions_m=np.asarray(mic_positions_m, dtype=float),
        target_deg=float(target_deg),
        noise_only_range=(0, int(lead_in_samples)),
        metadata=meta,
        reference_mic=reference_mic,
        room_tone=room_tone,
        noise_parts=parts,
    )


def _looped(signal: NDArray, n: int, offset: int = 0) -> NDArray:
    idx = (offset + np.arange(n)) % signal.size
    return signal[idx]


def demo_scene(seed: int = 0, snr_db: float = 0.0, room_tone_s: float = 0.0) -> Scene:
    """The built-in demo: an outdoor interview on a two-capsule field recorder.

    Invented scenario. Capsules 8 cm apart on the x axis (reference: capsule 0 at x = -4 cm).
    The guest (``talker_a``) stands 0.7 m away at broadside (90 deg). A petrol generator drones
    12 m away near one end of the axis (15 deg): engine firing rate 25 Hz (3000 rpm, four-stroke
    single cylinder) with harmonics, over low-passed broadband noise. A small radio 2.5 m away on
    the other side (140 deg) plays a presenter (``talker_b``, band-limited 200 Hz - 5 kHz like a
    small loudspeaker) throughout. A faint diffuse ambience (wind in leaves, -6 dB/oct) and
    capsule self-noise complete it. Light reverberation from a nearby wall and the ground
    (RT60 0.25 s; direct-to-reverberant ratio 12 dB for the guest, 4 dB for the radio, 0 dB
    for the generator). Noise levels at the reference capsule: generator 0 dB, radio
    -3 dB, ambience -10 dB, sensor -30 dB; overall SNR ``snr_db`` over speech-active samples.
    1.5 s noise-only lead-in; 16 kHz; about 12 s.

    Parameters
    ----------
    seed : int
        Seeds every random part (reflections, noises, phases); same seed, same scene.
    room_tone_s : float
        If > 0, also render that much room tone: the same noise sources continuing after the
        take (the radio keeps talking), returned as ``Scene.room_tone``.
    """
    if not np.isfinite(room_tone_s) or room_tone_s < 0:
        raise ValueError(f"room_tone_s must be >= 0, got {room_tone_s}")
    speech, fs = load_speech("talker_a")
    radio_speech, fs_b = load_speech("talker_b")
    if fs_b != fs:
        raise ValueError("packaged speech files disagree on sample rate")
    pos_m = np.array([-0.04, 0.04])
    lead_in = round(1.5 * fs)
    n_take = lead_in + speech.size
    n_tone = round(room_tone_s * fs)
    # Sources play before the take starts so reverberation has built up by sample 0.
    pre = round(0.5 * fs)
    post = round(0.05 * fs)
    n_total = pre + n_take + n_tone + post
    crop = slice(pre, pre + n_take + n_tone)
    # Outdoors: one wall and the ground. The direct sound dominates less with distance.
    reverb = Reverb(rt60_s=0.25, drr_db=12.0, n_early=4, early_span_s=(0.003, 0.02))
    drr_db = {"target": 12.0, "generator": 0.0, "radio": 4.0}
    seeds = np.random.SeedSequence(seed).spawn(8)
    rngs = [np.random.default_rng(s) for s in seeds]

    dry = np.zeros(n_total)
    dry[pre + lead_in : pre + n_take] = speech
    target = source_image(dry, fs, pos_m, 90.0, 0.7, reverb, rngs[0])[:, crop]
    far_reverb = replace(reverb, drr_db=drr_db["generator"])
    radio_reverb = replace(reverb, drr_db=drr_db["radio"])

    drone = fan_noise(n_total, fs, rngs[1], blade_pass_hz=25.0, n_harmonics=16, tones_db=0.0,
                      lowpass_hz=500.0, speed_wobble=0.002)
    radio = bandpass(_looped(radio_speech, n_total), fs, 200.0, 5000.0)
    components = {
        "generator": source_image(drone, fs, pos_m, 15.0, 12.0, far_reverb, rngs[2])[:, crop],
        "radio": source_image(radio, fs, pos_m, 140.0, 2.5, radio_reverb, rngs[3])[:, crop],
        "ambience": diffuse_noise(n_take + n_tone, fs, pos_m, rngs[4], tilt_db_per_octave=-6.0),
        "sensor": sensor_noise(n_take + n_tone, pos_m.size, rngs[5]),
    }
    levels_db = {"generator": 0.0, "radio": -3.0, "ambience": -10.0, "sensor": -30.0}
    metadata = {
        "scenario": "outdoor interview, two-capsule field recorder",
        "seed": int(seed),
        "target": {"speech": "talker_a", "bearing_deg": 90.0, "distance_m": 0.7},
        "components": {
            "generator": {"kind": "engine drone (fan_noise, 25 Hz)", "bearing_deg": 15.0,
                          "distance_m": 12.0},
            "radio": {"kind": "talker_b through a small loudspeaker", "bearing_deg": 140.0,
                      "distance_m": 2.5},
            "ambience": {"kind": "diffuse, -6 dB/oct"},
            "sensor": {"kind": "independent white"},
        },
        "reverb": {"rt60_s": reverb.rt60_s, "drr_db": drr_db, "n_early": reverb.n_early},
        "speed_of_sound_m_s": SPEED_OF_SOUND_M_S,
        "room_tone_s": n_tone / fs,
    }
    return assemble_scene(
        target, components, levels_db, snr_db, fs, pos_m, 90.0, lead_in, n_take,
        reference_mic=0, metadata=metadata,
    )
