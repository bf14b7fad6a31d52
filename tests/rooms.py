"""Test helper: reverberant room scenes from pyroomacoustics' image-source method.

The image-source method (Allen & Berkley, J. Acoust. Soc. Am. 65, 943, 1979) as implemented
by pyroomacoustics gives room impulse responses from a geometry that this project did not
write, so scenes built here are an outside check on the estimators (and on ``liftmag.scenes``).

Room: a 6 x 5 x 3 m shoebox, wall absorption from Sabine's formula for RT60 = 0.3 s
(``pyroomacoustics.inverse_sabine``) with the image order it suggests; pyroomacoustics' own
Schroeder-decay measure gives about 0.35 s on these RIRs. All sources and microphones lie in
the horizontal plane z = 1.45 m except the hum source (a ballast near the ceiling), so the
bearings of directional sources are exact in the array's plane. Array: linear along x,
centred at (2.8, 2.1, 1.45) m; 2 microphones 8 cm apart or a 4-microphone ULA with 5 cm
spacing (15 cm aperture). Reference microphone: index 0 (smallest x).

Bearings follow ``liftmag.geometry``: degrees from the +x axis, 90 = broadside. Diffuse noise
and sensor noise are added at the microphones (``liftmag.scenes``), not through the room.
The geometry is fixed; the seed changes every noise signal. Nothing is cached on disk.

Also here: the measurements tests use to check scenes against physics (GCC-PHAT delay,
complex coherence).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pyroomacoustics as pra
import scipy.fft
import scipy.signal
from numpy.typing import NDArray

from liftmag import scenes

KINDS = ("competing-talker", "two-interferers-diffuse", "directional-diffuse", "sensor", "hum-fan")
ROOM_DIM_M = (6.0, 5.0, 3.0)
DESIGN_RT60_S = 0.3
ARRAY_CENTRE_M = np.array([2.8, 2.1, 1.45])
SPACING_M = {2: 0.08, 4: 0.05}
TARGET_DEG = 90.0
TARGET_DISTANCE_M = 1.2
SENSOR_FLOOR_DB = -40.0  # every kind has some self-noise, as every real microphone does


def array_positions_m(n_mics: int) -> NDArray[np.float64]:
    """x positions (relative to the array centre) of the 2- or 4-microphone array."""
    if n_mics not in SPACING_M:
        raise ValueError(f"n_mics must be 2 or 4, got {n_mics}")
    return (np.arange(n_mics) - (n_mics - 1) / 2) * SPACING_M[n_mics]


def position_at(bearing_deg: float, distance_m: float) -> NDArray[np.float64]:
    """Room coordinates of a point at a bearing and distance from the array centre."""
    theta = np.deg2rad(bearing_deg)
    return ARRAY_CENTRE_M + distance_m * np.array([np.cos(theta), np.sin(theta), 0.0])


# Per kind: room sources (name -> (position, signal maker)), added noises (name -> maker), levels.
# A signal maker gets (n_samples, fs_hz, rng); an added-noise maker gets (n, fs, pos_m, rng).
_Signal = Callable[[int, int, np.random.Generator], NDArray[np.float64]]
_Added = Callable[[int, int, NDArray[np.float64], np.random.Generator], NDArray[np.float64]]


def _talker_b(n: int, fs: int, rng: np.random.Generator) -> NDArray[np.float64]:
    speech, fs_b = scenes.load_speech("talker_b")
    if fs_b != fs:
        raise ValueError(f"talker_b is at {fs_b} Hz; room scenes need fs_hz={fs_b}")
    return speech[np.arange(n) % speech.size]  # loops if the request outlasts the file


def _pink(n: int, fs: int, rng: np.random.Generator) -> NDArray[np.float64]:
    return scenes.coloured_noise(n, fs, rng, tilt_db_per_octave=-3.0)


def _brown(n: int, fs: int, rng: np.random.Generator) -> NDArray[np.float64]:
    return scenes.coloured_noise(n, fs, rng, tilt_db_per_octave=-6.0)


def _fan(n: int, fs: int, rng: np.random.Generator) -> NDArray[np.float64]:
    # A desk fan: 5 blades at 1440 rpm -> 120 Hz blade-pass.
    return scenes.fan_noise(n, fs, rng, blade_pass_hz=120.0, n_harmonics=5, tones_db=-3.0)


def _hum(n: int, fs: int, rng: np.random.Generator) -> NDArray[np.float64]:
    return scenes.mains_hum(n, fs, rng, mains_hz=50.0)


def _diffuse(n: int, fs: int, pos_m: NDArray, rng: np.random.Generator) -> NDArray[np.float64]:
    return scenes.diffuse_noise(n, fs, pos_m, rng, tilt_db_per_octave=-3.0)


def _sensor(n: int, fs: int, pos_m: NDArray, rng: np.random.Generator) -> NDArray[np.float64]:
    return scenes.sensor_noise(n, pos_m.size, rng)


_KIND_SPECS: dict[str, dict] = {
    "competing-talker": {
        "sources": {
            "talker_b": (position_at(40.0, 2.0), _talker_b),
            "air-handler": (position_at(150.0, 2.3), _pink),
        },
        "added": {"sensor": _sensor},
        "levels_db": {"talker_b": 0.0, "air-handler": -6.0, "sensor": SENSOR_FLOOR_DB},
    },
    "two-interferers-diffuse": {
        "sources": {
            "interferer-left": (position_at(30.0, 1.8), _pink),
            "interferer-right": (position_at(155.0, 2.0), _brown),
        },
        "added": {"diffuse": _diffuse, "sensor": _sensor},
        "levels_db": {
            "interferer-left": 0.0, "interferer-right": -2.0, "diffuse": -4.0,
            "sensor": SENSOR_FLOOR_DB,
        },
    },
    "directional-diffuse": {
        "sources": {"directional": (position_at(50.0, 2.0), _pink)},
        "added": {"diffuse": _diffuse, "sensor": _sensor},
        "levels_db": {"directional": 0.0, "diffuse": 0.0, "sensor": SENSOR_FLOOR_DB},
    },
    "sensor": {
        "sources": {},
        "added": {"sensor": _sensor},
        "levels_db": {"sensor": 0.0},
    },
    "hum-fan": {
        "sources": {
            "fan": (position_at(20.0, 2.5), _fan),
            "hum": (np.array([1.0, 4.2, 2.7]), _hum),
        },
        "added": {"sensor": _sensor},
        "levels_db": {"fan": 0.0, "hum": -3.0, "sensor": SENSOR_FLOOR_DB},
    },
}


def build_room(sources_m: list[NDArray], mics_m: NDArray, fs_hz: int) -> pra.ShoeBox:
    """The shoebox with its RIRs computed; ``mics_m`` is (3, M) room coordinates."""
    absorption, max_order = pra.inverse_sabine(DESIGN_RT60_S, list(ROOM_DIM_M))
    room = pra.ShoeBox(
        list(ROOM_DIM_M), fs=fs_hz, materials=pra.Material(absorption), max_order=max_order
    )
    room.add_microphone_array(mics_m)
    for pos in sources_m:
        room.add_source(pos)
    room.compute_rir()
    return room


def source_images(room: pra.ShoeBox, src_index: int, signal: NDArray, crop: slice) -> NDArray:
    """``signal`` played by source ``src_index`` of ``room`` at every microphone, cropped.

    Each microphone's RIR (zero-padded to the longest) is convolved with ``signal``; samples
    ``crop`` of the result are returned as (M, crop length), zero where the convolution ends.
    """
    n_mics = len(room.rir)
    irs = [np.asarray(room.rir[m][src_index]) for m in range(n_mics)]
    length = max(len(h) for h in irs)
    irs_arr = np.stack([np.pad(h, (0, length - len(h))) for h in irs])
    full = scipy.signal.oaconvolve(signal[None, :], irs_arr, axes=-1)
    out = np.zeros((n_mics, crop.stop - crop.start))
    part = full[:, crop]
    out[:, : part.shape[1]] = part
    return out


def make_room_scene(
    kind: str,
    n_mics: int,
    snr_db: float,
    seed: int,
    fs_hz: int = 16000,
    lead_in_s: float = 1.5,
    room_tone_s: float = 0.0,
) -> scenes.Scene:
    """Render one room scene: ``talker_a`` at broadside, 1.2 m, plus the noises of ``kind``.

    Kinds: ``competing-talker`` (``talker_b`` talking throughout at 40 deg plus pink noise from
    an air handler at 150 deg), ``two-interferers-diffuse`` (pink and brown noise sources at 30
    and 155 deg plus diffuse pink noise), ``directional-diffuse`` (pink noise at 50 deg plus
    equally loud diffuse pink noise), ``sensor`` (independent white self-noise only),
    ``hum-fan`` (a desk fan at 20 deg and 50 Hz mains hum from a ballast near the ceiling).
    All but ``sensor`` add self-noise 40 dB below the other noise.

    The take is ``lead_in_s`` of noise only, then ``talker_a`` (10.5 s). Noise sources start
    0.5 s before the take so their reverberation has built up. SNR as in
    ``liftmag.scenes.assemble_scene`` (reference microphone, speech-active samples). All images
    are advanced by one integer bulk delay (the target's direct path to the reference
    microphone, rounded down, plus pyroomacoustics' fractional-delay centre) so the target
    image lines up with the dry speech; ``metadata["bulk_delay_samples"]``.

    With ``room_tone_s > 0`` the same noise sources keep playing after the take and that
    stretch is returned as ``Scene.room_tone`` (noise only, continuing, not a copy); the take
    itself does not depend on ``room_tone_s``.
    """
    if kind not in _KIND_SPECS:
        raise ValueError(f"unknown kind {kind!r}; choose one of {KINDS}")
    if not (np.isfinite(lead_in_s) and 0 < lead_in_s <= 10):
        raise ValueError(f"lead_in_s must lie in (0, 10] s, got {lead_in_s}")
    if not (np.isfinite(room_tone_s) and room_tone_s >= 0):
        raise ValueError(f"room_tone_s must be >= 0, got {room_tone_s}")
    spec = _KIND_SPECS[kind]
    pos_m = array_positions_m(n_mics)
    speech, fs_a = scenes.load_speech("talker_a")
    if fs_a != fs_hz:
        raise ValueError(f"the packaged speech is at {fs_a} Hz; use fs_hz={fs_a}")
    lead_in = round(lead_in_s * fs_hz)
    n_take = lead_in + speech.size
    n_tone = round(room_tone_s * fs_hz)
    pre = round(0.5 * fs_hz)
    n_total = pre + n_take + n_tone

    mics_m = ARRAY_CENTRE_M[:, None] + np.outer([1.0, 0.0, 0.0], pos_m)
    target_pos = position_at(TARGET_DEG, TARGET_DISTANCE_M)
    names = list(spec["sources"])
    room = build_room([target_pos] + [spec["sources"][k][0] for k in names], mics_m, fs_hz)
    direct_s = np.linalg.norm(target_pos - mics_m[:, 0]) / pra.constants.get("c")
    bulk = int(np.floor(direct_s * fs_hz)) + pra.constants.get("frac_delay_length") // 2
    crop = slice(pre + bulk, pre + bulk + n_take + n_tone)

    def image(src_index: int, signal: NDArray) -> NDArray:
        return source_images(room, src_index, signal, crop)

    n_streams = 2 + len(names) + len(spec["added"])
    seeds = np.random.SeedSequence([seed, KINDS.index(kind)]).spawn(n_streams)
    rngs = [np.random.default_rng(s) for s in seeds]
    dry = np.zeros(n_total + bulk)
    dry[pre + lead_in : pre + n_take] = speech
    target = image(0, dry)
    components: dict[str, NDArray] = {}
    for i, name in enumerate(names):
        signal = spec["sources"][name][1](n_total + bulk, fs_hz, rngs[2 + i])
        components[name] = image(1 + i, signal)
    for j, (name, maker) in enumerate(spec["added"].items()):
        components[name] = maker(n_take + n_tone, fs_hz, pos_m, rngs[2 + len(names) + j])
    metadata = {
        "scenario": f"room scene: {kind}",
        "kind": kind,
        "seed": int(seed),
        "room_dim_m": ROOM_DIM_M,
        "design_rt60_s": DESIGN_RT60_S,
        "max_order": int(room.max_order),
        "array_centre_m": ARRAY_CENTRE_M.tolist(),
        "target": {"speech": "talker_a", "bearing_deg": TARGET_DEG,
                   "distance_m": TARGET_DISTANCE_M},
        "sources_m": {k: spec["sources"][k][0].tolist() for k in names},
        "added": list(spec["added"]),
        "bulk_delay_samples": bulk,
        "speed_of_sound_m_s": float(pra.constants.get("c")),
        "room_tone_s": n_tone / fs_hz,
    }
    return scenes.assemble_scene(
        target, components, spec["levels_db"], snr_db, fs_hz, pos_m, TARGET_DEG, lead_in,
        n_take, reference_mic=0, metadata=metadata,
    )


# ----------------------------------------------------------------------------- measurements


def gcc_phat_lag_s(
    x: NDArray, y: NDArray, fs_hz: int, max_lag_s: float, upsample: int = 32
) -> float:
    """Delay of ``y`` relative to ``x`` (seconds, positive: ``y`` later) by GCC-PHAT.

    Generalised cross-correlation with the phase transform (Knapp & Carter, IEEE Trans. ASSP
    24(4), 320, 1976): ``r(t) = IFFT( X* Y / |X* Y| )``, peak searched within ``max_lag_s``,
    sub-sample resolution by zero-padding the cross-spectrum ``upsample`` times.
    """
    n = scipy.fft.next_fast_len(x.size + y.size, real=True)
    cross = np.conj(np.fft.rfft(x, n)) * np.fft.rfft(y, n)
    cross /= np.maximum(np.abs(cross), 1e-12 * np.abs(cross).max())
    r = np.fft.irfft(cross, n * upsample)
    max_lag = int(np.ceil(max_lag_s * fs_hz * upsample))
    lags = np.arange(-max_lag, max_lag + 1)
    k = lags[np.argmax(r[lags % r.size])]
    return float(k / (fs_hz * upsample))


def complex_coherence(
    x: NDArray, y: NDArray, fs_hz: int, n_fft: int = 512
) -> tuple[NDArray, NDArray, int]:
    """Complex coherence ``S_xy / sqrt(S_xx S_yy)`` from non-overlapping Hann-windowed frames.

    Returns ``(frequencies_hz, coherence, n_frames)``; frames do not overlap so they are close
    to independent, and ``n_frames`` sets the estimate's spread.
    """
    n_frames = min(x.size, y.size) // n_fft
    window = np.hanning(n_fft)
    fx = np.fft.rfft(x[: n_frames * n_fft].reshape(n_frames, n_fft) * window, axis=1)
    fy = np.fft.rfft(y[: n_frames * n_fft].reshape(n_frames, n_fft) * window, axis=1)
    sxy = np.mean(np.conj(fx) * fy, axis=0)
    sxx = np.mean(np.abs(fx) ** 2, axis=0)
    syy = np.mean(np.abs(fy) ** 2, axis=0)
    return np.fft.rfftfreq(n_fft, 1 / fs_hz), sxy / np.sqrt(sxx * syy), n_frames
