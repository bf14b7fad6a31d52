"""Varied image-source room scenes for the quality benchmark (``quality_varied.py``).

``tests/rooms.py`` renders one fixed room (RT60 0.3 s, talker at broadside, 16 kHz, one take
length) per noise type; this module varies what that one scene per type does not, with the
same noise types and the same signal makers (pink/brown noise, desk fan, mains hum, diffuse
and sensor noise from ``liftmag.scenes``; the competing talker ``talker_b``):

* SNR at the reference microphone (speech-active samples, ``liftmag.scenes.assemble_scene``),
* talker bearing (90 = broadside, 60, 30 deg) at 1.2 m; the interfering sources' bearings are
  drawn per scene at least ``MIN_SEPARATION_DEG`` away from the talker (a fixed noise layout
  would put some interferer on top of a talker at 30 deg, which no beamformer can separate),
* RT60 from Sabine's formula (``pyroomacoustics.inverse_sabine``) in the 6 x 5 x 3 m room,
* the array: 2 microphones 4, 8 or 15 cm apart, or 4 microphones 5 cm apart (linear, x axis),
* take length: short takes (6-10 s including a 1.5 s noise-only lead-in; ``talker_a`` cut
  to fit with a 50 ms fade-out) and long ones (60 s: ``talker_a`` repeated with pauses),
* sample rate 16 or 48 kHz (the packaged speech is 16 kHz; at 48 kHz it is resampled by
  ``scipy.signal.resample_poly``, so the talker has no energy above 8 kHz, the noise does).

Every scene also renders 30 s of room tone: the same noise sources continuing after the take.
All images are advanced by the target's bulk delay so the target image lines up with the
dry speech (as in ``tests/rooms.py``). Scenes are cached on disk by ``quality_varied.py``.
"""

from __future__ import annotations

import sys
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import pyroomacoustics as pra
import scipy.signal
from numpy.typing import NDArray

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

import rooms  # tests/rooms.py: room geometry and signal makers

from liftmag import scenes

KINDS = rooms.KINDS
LEAD_IN_S = 1.5
ROOM_TONE_S = 30.0
TALKER_DISTANCE_M = 1.2
MIN_SEPARATION_DEG = 45.0
# (name, distance from the array centre in metres) of the directional sources per kind; the
# hum ballast keeps its fixed place near the ceiling (from tests/rooms.py).
_DIRECTIONAL = {
    "competing-talker": (("talker_b", 2.0), ("air-handler", 2.3)),
    "two-interferers-diffuse": (("interferer-left", 1.8), ("interferer-right", 2.0)),
    "directional-diffuse": (("directional", 2.0),),
    "sensor": (),
    "hum-fan": (("fan", 2.5),),
}
DESIGN_VERSION = 1  # bump when rendering changes, so cached scenes are rebuilt


@dataclass(frozen=True)
class SceneSpec:
    """One scene of the grid."""

    kind: str
    snr_db: float
    bearing_deg: float
    rt60_s: float
    n_mics: int
    spacing_m: float
    take_s: float
    fs_hz: int
    seed: int

    @property
    def name(self) -> str:
        return (f"{self.kind}_snr{self.snr_db:+g}_b{self.bearing_deg:g}_rt{self.rt60_s:g}_"
                f"{self.n_mics}x{self.spacing_m * 100:g}cm_{self.take_s:g}s_"
                f"{self.fs_hz // 1000}k_s{self.seed}")

    @property
    def array(self) -> str:
        return f"{self.n_mics} mics {self.spacing_m * 100:g} cm"

    @property
    def length(self) -> str:
        return "long" if self.take_s >= 30 else "short"

    def to_dict(self) -> dict:
        return asdict(self)


ARRAYS = ((2, 0.04), (2, 0.08), (2, 0.15), (4, 0.05))
SNRS_DB = (-5.0, 0.0, 5.0, 10.0)
BEARINGS_DEG = (90.0, 60.0, 30.0)
RT60S_S = (0.15, 0.3, 0.45, 0.6)
SHORT_TAKES_S = (6.0, 7.0, 8.0, 9.0, 10.0)


def _balanced(levels, n: int, rng: np.random.Generator) -> list:
    """``n`` values cycling through ``levels`` (each as often as ``n`` allows), shuffled.

    The cycle starts at a random level, so the levels left over when ``len(levels)`` does
    not divide ``n`` differ from call to call.
    """
    start = int(rng.integers(len(levels)))
    values = [levels[(start + i) % len(levels)] for i in range(n)]
    order = rng.permutation(n)
    return [values[i] for i in order]


def design(per_kind: int = 8, seed: int = 20261203, n_long: int = 1, n_48k: int = 2,
           kinds: tuple[str, ...] = KINDS) -> list[SceneSpec]:
    """A balanced random design: per kind, every level of every factor appears equally often.

    Not a full factorial: within each kind, each factor's levels are spread evenly over the
    ``per_kind`` scenes and paired across factors by independent shuffles drawn from ``seed``.
    SNR and array are paired as a Latin design (each SNR meets each array once per four
    scenes, the array shifted by a different step in each block of four) so neither is
    confounded with the other. ``n_long`` of each kind's scenes are
    60 s takes and ``n_48k`` are at 48 kHz.
    """
    rng = np.random.default_rng(seed)
    specs = []
    for k, kind in enumerate(kinds):
        # Latin pairing in blocks of four scenes: each block holds every SNR once, and the
        # array is ARRAYS[(SNR index + the block's shift) mod 4] with distinct shifts per block,
        # so each block also holds every array once and no (SNR, array) pair repeats.
        n_blocks = -(-per_kind // len(SNRS_DB))
        shifts = [int(s) for s in rng.permutation(max(n_blocks, len(ARRAYS)))[:n_blocks]]
        snr, arrays = [], []
        for b in range(n_blocks):
            for i in rng.permutation(len(SNRS_DB)):
                snr.append(SNRS_DB[i])
                arrays.append(ARRAYS[(int(i) + shifts[b]) % len(ARRAYS)])
        snr, arrays = snr[:per_kind], arrays[:per_kind]
        bearing = _balanced(BEARINGS_DEG, per_kind, rng)
        rt60 = _balanced(RT60S_S, per_kind, rng)
        shorts = _balanced(SHORT_TAKES_S, per_kind, rng)
        longs = set(rng.choice(per_kind, size=n_long, replace=False).tolist())
        fast = set(rng.choice(per_kind, size=n_48k, replace=False).tolist())
        for i in range(per_kind):
            specs.append(SceneSpec(
                kind=kind, snr_db=snr[i], bearing_deg=bearing[i], rt60_s=rt60[i],
                n_mics=arrays[i][0], spacing_m=arrays[i][1],
                take_s=60.0 if i in longs else shorts[i],
                fs_hz=48000 if i in fast else 16000, seed=1000 * k + i,
            ))
    return specs


# ----------------------------------------------------------------------------- rendering


def _speech(name: str, fs_hz: int) -> NDArray[np.float64]:
    signal, fs = scenes.load_speech(name)
    if fs_hz != fs:
        signal = scipy.signal.resample_poly(signal, fs_hz // fs, 1)
    return signal


def _fade_out(x: NDArray, n_fade: int) -> NDArray:
    x = x.copy()
    n_fade = min(n_fade, x.size)
    x[x.size - n_fade :] *= 0.5 * (1 + np.cos(np.linspace(0, np.pi, n_fade)))
    return x


def target_speech(n: int, fs_hz: int, rng: np.random.Generator) -> NDArray[np.float64]:
    """``n`` samples of the target talker: ``talker_a`` cut to fit, or repeated with pauses.

    Repeats are separated by pauses of 0.5-2 s drawn from ``rng``; the last piece ends with
    a 50 ms raised-cosine fade-out, as an edit would.
    """
    speech = _speech("talker_a", fs_hz)
    pieces: list[NDArray] = []
    total = 0
    while total < n:
        pieces.append(speech)
        pieces.append(np.zeros(round(rng.uniform(0.5, 2.0) * fs_hz)))
        total += speech.size + pieces[-1].size
    out = np.concatenate(pieces)[:n]
    return _fade_out(out, round(0.05 * fs_hz)) if n < speech.size else out


def _talker_b(n: int, fs: int, rng: np.random.Generator) -> NDArray[np.float64]:
    speech = _speech("talker_b", fs)
    return speech[np.arange(n) % speech.size]


def _makers(kind: str) -> tuple[dict, dict, dict]:
    """Signal makers and levels of ``kind``, from ``tests/rooms.py`` (talker_b at any rate)."""
    spec = rooms._KIND_SPECS[kind]
    sources = {name: maker for name, (_, maker) in spec["sources"].items()}
    if "talker_b" in sources:
        sources["talker_b"] = _talker_b
    fixed = {name: pos for name, (pos, _) in spec["sources"].items()
             if name not in dict(_DIRECTIONAL[kind])}
    return sources, fixed, (spec["added"], spec["levels_db"])


def _interferer_bearings(n: int, talker_deg: float, rng: np.random.Generator) -> list[float]:
    """``n`` bearings in 10..170 deg, each ``MIN_SEPARATION_DEG`` from the talker and 30 deg
    from each other."""
    chosen: list[float] = []
    while len(chosen) < n:
        b = float(rng.uniform(10.0, 170.0))
        if abs(b - talker_deg) >= MIN_SEPARATION_DEG and all(abs(b - c) >= 30 for c in chosen):
            chosen.append(round(b, 1))
    return chosen


def render(spec: SceneSpec) -> scenes.Scene:
    """Render ``spec`` into a ``liftmag.scenes.Scene`` with 30 s of room tone."""
    if spec.kind not in KINDS:
        raise ValueError(f"unknown kind {spec.kind!r}")
    fs = spec.fs_hz
    rng = np.random.default_rng(np.random.SeedSequence([spec.seed, DESIGN_VERSION]))
    sources, fixed, (added, levels_db) = _makers(spec.kind)
    directional = _DIRECTIONAL[spec.kind]
    bearings = _interferer_bearings(len(directional), spec.bearing_deg, rng)
    positions = {name: rooms.position_at(b, dist)
                 for (name, dist), b in zip(directional, bearings, strict=True)}
    positions.update(fixed)
    names = list(sources)

    pos_m = (np.arange(spec.n_mics) - (spec.n_mics - 1) / 2) * spec.spacing_m
    mics_m = rooms.ARRAY_CENTRE_M[:, None] + np.outer([1.0, 0.0, 0.0], pos_m)
    target_pos = rooms.position_at(spec.bearing_deg, TALKER_DISTANCE_M)
    absorption, max_order = pra.inverse_sabine(spec.rt60_s, list(rooms.ROOM_DIM_M))
    room = pra.ShoeBox(list(rooms.ROOM_DIM_M), fs=fs, materials=pra.Material(absorption),
                       max_order=max_order)
    room.add_microphone_array(mics_m)
    for pos in [target_pos] + [positions[k] for k in names]:
        room.add_source(pos)
    room.compute_rir()

    lead_in = round(LEAD_IN_S * fs)
    n_take = round(spec.take_s * fs)
    n_tone = round(ROOM_TONE_S * fs)
    pre = round(0.5 * fs)  # noise sources start early so their reverberation has built up
    n_total = pre + n_take + n_tone
    direct_s = np.linalg.norm(target_pos - mics_m[:, 0]) / pra.constants.get("c")
    bulk = int(np.floor(direct_s * fs)) + pra.constants.get("frac_delay_length") // 2
    crop = slice(pre + bulk, pre + bulk + n_take + n_tone)

    def image(src_index: int, signal: NDArray) -> NDArray:
        irs = [np.asarray(room.rir[m][src_index]) for m in range(spec.n_mics)]
        length = max(len(h) for h in irs)
        irs_arr = np.stack([np.pad(h, (0, length - len(h))) for h in irs])
        full = scipy.signal.oaconvolve(signal[None, :], irs_arr, axes=-1)
        out = np.zeros((spec.n_mics, crop.stop - crop.start))
        part = full[:, crop]
        out[:, : part.shape[1]] = part
        return out

    dry = np.zeros(n_total + bulk)
    speech_n = n_take - lead_in
    dry[pre + lead_in : pre + n_take] = target_speech(speech_n, fs, rng)
    target = image(0, dry)
    components = {}
    for i, name in enumerate(names):
        components[name] = image(1 + i, sources[name](n_total + bulk, fs, rng))
    for name, maker in added.items():
        components[name] = maker(n_take + n_tone, fs, pos_m, rng)
    metadata = {
        "scenario": f"varied room scene: {spec.kind}",
        "spec": spec.to_dict(),
        "interferer_bearings_deg": dict(zip([n for n, _ in directional], bearings, strict=True)),
        "max_order": int(max_order),
        "bulk_delay_samples": bulk,
    }
    return scenes.assemble_scene(
        target, components, levels_db, spec.snr_db, fs, pos_m, spec.bearing_deg, lead_in,
        n_take, reference_mic=0, metadata=metadata,
    )
