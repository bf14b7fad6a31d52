"""A/B comparison core: alignment, loudness matching, regions, scores, blind key.

Pure functions on 1-D float64 arrays and frozen dataclasses; no file access
and no printing (``liftmag.commands.compare`` is the thin edge that reads,
writes and talks to the user). Every version is compared with the *original*
take: it is aligned to it, measured over the original's noise-only and
speech-active samples, and matched to its loudness for listening.
"""

from __future__ import annotations

import json
import math
import random
import re
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import TypeVar

import numpy as np

from liftmag import metrics

T = TypeVar("T")
Progress = Callable[[Iterable[T], str], Iterable[T]]

MAX_DELAY_S = 0.5
# Sample-peak ceiling for the listening files. 1 dB of headroom below full
# scale is common practice; it leaves room for inter-sample peaks on playback.
PEAK_CEILING_DBFS = -1.0
LEVEL_FRAME_S = 0.020
# A frame counts as noise-only when it is within this many dB of the quietest
# frames, and as speech-active when it is this far above the noise floor.
NOISE_MARGIN_DB = 3.0
SPEECH_MARGIN_DB = 6.0
MIN_SPEECH_S = 0.5
# Keep the noise-only region this far from any louder frame, so speech onsets
# and decaying tails do not leak into it: the kurtosis ratio reacts strongly to
# even a trace of speech there (measured on our synthetic scenes: speech 26 dB
# below the noise in the region still gave ratios far above 1 for a version
# that only scaled the noise down; 120 ms kept the leak near -40 dB or below).
NOISE_GUARD_S = 0.120
# Quiet stretches shorter than this (after the guard) are left out of the
# automatic noise-only region: inside words they are mostly weak consonants
# and stop closures, not pauses.
MIN_NOISE_RUN_S = 0.100
# A normalised cross-correlation peak below this makes the delay doubtful.
WEAK_CORRELATION = 0.3
ORIGINAL = "original"


def _identity_progress(items: Iterable[T], _desc: str) -> Iterable[T]:
    return items


# --------------------------------------------------------------------------- alignment


@dataclass(frozen=True)
class Alignment:
    """Constant delay of a version relative to the original.

    ``delay_samples > 0`` means the version is late: its sample ``n + delay``
    lines up with the original's sample ``n``. ``polarity`` is -1 when the
    version is inverted. ``peak_correlation`` is the normalised
    cross-correlation at the chosen lag (1 = identical shape).
    """

    delay_samples: int
    delay_ms: float
    polarity: int
    peak_correlation: float


def estimate_delay(
    reference: np.ndarray, version: np.ndarray, fs_hz: float, max_delay_s: float = MAX_DELAY_S
) -> Alignment:
    """Constant delay of ``version`` against ``reference`` by cross-correlation.

    ``c[k] = Σ_n version[n + k] · reference[n]`` is computed for all lags at
    once as ``IFFT(V · conj(R))`` (zero-padded to avoid circular wrap), and
    the lag ``|k| ≤ max_delay_s · fs_hz`` with the largest ``|c[k]|`` is
    chosen, to the sample. A negative peak means inverted polarity.

    Parameters
    ----------
    reference, version : ndarray, shape (n,), (m,)
    fs_hz : float
    max_delay_s : float
        Largest delay searched either way, in seconds.
    """
    from scipy import fft as sfft

    r = np.asarray(reference, dtype=np.float64)
    v = np.asarray(version, dtype=np.float64)
    n_fft = sfft.next_fast_len(r.size + v.size - 1, real=True)
    c = sfft.irfft(sfft.rfft(v, n_fft) * np.conj(sfft.rfft(r, n_fft)), n_fft)
    max_lag = min(round(max_delay_s * fs_hz), v.size - 1, r.size - 1)
    lags = np.arange(-max_lag, max_lag + 1)
    values = c[lags % n_fft]
    best = int(np.argmax(np.abs(values)))
    delay = int(lags[best])
    peak = float(values[best])
    norm = math.sqrt(float(r @ r) * float(v @ v))
    corr = abs(peak) / norm if norm > 0 else 0.0
    return Alignment(
        delay_samples=delay,
        delay_ms=1e3 * delay / fs_hz,
        polarity=-1 if peak < 0 else 1,
        peak_correlation=corr,
    )


def apply_alignment(version: np.ndarray, alignment: Alignment, n_samples: int) -> np.ndarray:
    """Shift ``version`` by the alignment's delay, undo inverted polarity, and
    trim or zero-pad to ``n_samples``: ``out[n] = polarity · version[n + delay]``."""
    v = np.asarray(version, dtype=np.float64)
    out = np.zeros(n_samples)
    d = alignment.delay_samples
    src_start, dst_start = (d, 0) if d >= 0 else (0, -d)
    count = max(0, min(v.size - src_start, n_samples - dst_start))
    out[dst_start : dst_start + count] = v[src_start : src_start + count]
    return alignment.polarity * out


# --------------------------------------------------------------------------- regions


@dataclass(frozen=True)
class Regions:
    """Sample masks over the original take, and how they were found."""

    noise: np.ndarray
    speech: np.ndarray
    noise_found_automatically: bool
    noise_floor_db: float
    notes: tuple[str, ...] = ()

    def noise_intervals_s(self, fs_hz: float) -> list[tuple[float, float]]:
        return mask_to_intervals_s(self.noise, fs_hz)


def mask_to_intervals_s(mask: np.ndarray, fs_hz: float) -> list[tuple[float, float]]:
    """``[start_s, end_s)`` intervals of the ``True`` runs of a sample mask."""
    m = np.concatenate(([False], np.asarray(mask, dtype=bool), [False]))
    edges = np.flatnonzero(np.diff(m.astype(np.int8)))
    return [(a / fs_hz, b / fs_hz) for a, b in zip(edges[::2], edges[1::2], strict=True)]


def _frames_to_samples(frame_mask: np.ndarray, frame_len: int, n_samples: int) -> np.ndarray:
    mask = np.zeros(n_samples, dtype=bool)
    mask[: frame_mask.size * frame_len] = np.repeat(frame_mask, frame_len)
    return mask


def _runs_at_least(frame_mask: np.ndarray, min_len: int) -> np.ndarray:
    """Keep only runs of ``True`` at least ``min_len`` frames long."""
    m = np.concatenate(([False], frame_mask, [False]))
    edges = np.flatnonzero(np.diff(m.astype(np.int8)))
    out = np.zeros_like(frame_mask)
    for a, b in zip(edges[::2], edges[1::2], strict=True):
        if b - a >= min_len:
            out[a:b] = True
    return out


def _erode(frame_mask: np.ndarray, radius: int) -> np.ndarray:
    """Keep a frame only if every frame within ``radius`` is also set."""
    if radius <= 0:
        return frame_mask
    padded = np.pad(frame_mask, radius, constant_values=False)
    windows = np.lib.stride_tricks.sliding_window_view(padded, 2 * radius + 1)
    return windows.all(axis=1)


def find_regions(
    original: np.ndarray,
    fs_hz: float,
    noise_intervals_s: Sequence[tuple[float, float]] | None = None,
) -> Regions:
    """Noise-only and speech-active sample masks of the original take.

    Levels are measured in 20 ms frames (:func:`liftmag.metrics.frame_levels_db`).
    Without ``noise_intervals_s`` the noise-only region is found from the
    quiet frames: the noise floor is the 5th percentile of the frame levels,
    and frames within 3 dB of it that are at least 120 ms away from any
    louder frame, in runs of at least 100 ms, form the region (shorter runs,
    then a smaller guard, are used only if nothing qualifies). With
    intervals, the floor is the median frame level inside them.
    Speech-active frames are those more than 6 dB above the floor and
    outside the noise region; if that leaves less than 0.5 s, every frame
    outside the noise region counts, with a note.

    Raises
    ------
    ValueError
        When the take is silent, too short, or no region can be found.
    """
    x = np.asarray(original, dtype=np.float64)
    frame_len = max(1, round(LEVEL_FRAME_S * fs_hz))
    levels_db = metrics.frame_levels_db(x, frame_len)
    finite = np.isfinite(levels_db)
    if not finite.any():
        raise ValueError("the original take is digital silence")
    notes: list[str] = []
    if noise_intervals_s:
        noise = metrics.mask_from_intervals(noise_intervals_s, fs_hz, x.size)
        if not noise.any():
            raise ValueError("the noise regions lie outside the original take")
        frame_in_noise = noise[: levels_db.size * frame_len].reshape(-1, frame_len).all(axis=1)
        inside = levels_db[frame_in_noise & finite]
        if inside.size == 0:
            raise ValueError(
                "the noise regions hold no whole 20 ms frame with signal; give longer regions"
            )
        floor_db = float(np.median(inside))
        automatic = False
    else:
        floor_db = float(np.percentile(levels_db[finite], 5.0))
        quiet = levels_db <= floor_db + NOISE_MARGIN_DB
        guarded = _erode(quiet, round(NOISE_GUARD_S / LEVEL_FRAME_S))
        frame_in_noise = _runs_at_least(guarded, round(MIN_NOISE_RUN_S / LEVEL_FRAME_S))
        # Short takes may have no pause that long: relax step by step.
        for fallback in (lambda: guarded, lambda: _erode(quiet, 1), lambda: quiet):
            if frame_in_noise.any():
                break
            frame_in_noise = fallback()
        noise = _frames_to_samples(frame_in_noise, frame_len, x.size)
        automatic = True
        notes.append(
            "no --noise-region given: the noise-only region was taken from the quietest "
            f"20 ms frames (within {NOISE_MARGIN_DB:g} dB of the 5th-percentile level, "
            f"{NOISE_GUARD_S:g} s away from louder frames), {noise.sum() / fs_hz:.2f} s in "
            "all; check it on the level plot. The kurtosis ratio needs a region free of "
            "speech: for a dependable value, give --noise-region over room tone"
        )
    speech_frames = (levels_db > floor_db + SPEECH_MARGIN_DB) & ~frame_in_noise
    speech = _frames_to_samples(speech_frames, frame_len, x.size) & ~noise
    if speech.sum() < MIN_SPEECH_S * fs_hz:
        speech = _frames_to_samples(~frame_in_noise & finite, frame_len, x.size) & ~noise
        notes.append(
            f"fewer than {MIN_SPEECH_S:g} s of frames stand {SPEECH_MARGIN_DB:g} dB above the "
            "noise floor; every frame outside the noise region was treated as speech-active"
        )
    if speech.sum() < 0.4 * fs_hz + 1:
        raise ValueError(
            "less than 0.4 s of speech-active audio outside the noise region; "
            "the loudness cannot be measured"
        )
    return Regions(
        noise=noise,
        speech=speech,
        noise_found_automatically=automatic,
        noise_floor_db=floor_db,
        notes=tuple(notes),
    )


# --------------------------------------------------------------------------- loudness


@dataclass(frozen=True)
class LoudnessMatch:
    """Loudness of each signal over the speech-active samples and the gains
    (dB) that bring each to the original's loudness, after a common reduction
    (dB, <= 0) that keeps every sample peak at or below the ceiling."""

    loudness_lufs: dict[str, float]
    gain_db: dict[str, float]
    common_reduction_db: float
    peak_dbfs_after: dict[str, float]


def speech_loudness_lufs(x: np.ndarray, speech: np.ndarray, fs_hz: float) -> float:
    """ITU-R BS.1770 integrated loudness of the speech-active samples, joined
    end to end (the measurement's own gating then applies on top)."""
    return metrics.integrated_loudness_lufs(np.asarray(x)[speech], fs_hz)


def _peak_dbfs(x: np.ndarray) -> float:
    peak = float(np.max(np.abs(x))) if x.size else 0.0
    return 20.0 * math.log10(peak) if peak > 0 else float("-inf")


def match_loudness(
    aligned: Mapping[str, np.ndarray],
    speech: np.ndarray,
    fs_hz: float,
    ceiling_dbfs: float = PEAK_CEILING_DBFS,
) -> LoudnessMatch:
    """Gains that give every signal the original's speech loudness.

    ``gain_db[name] = L[original] - L[name] + common_reduction_db`` where ``L``
    is :func:`speech_loudness_lufs`. If any matched signal would peak above
    ``ceiling_dbfs``, every gain, the original's included, is lowered by the
    same amount so nothing clips and the loudness match holds.

    ``aligned`` must contain the key ``"original"``.

    Raises
    ------
    ValueError
        If a signal is too quiet for BS.1770 (below its -70 LUFS gate).
    """
    loudness = {name: speech_loudness_lufs(x, speech, fs_hz) for name, x in aligned.items()}
    for name, value in loudness.items():
        if not math.isfinite(value):
            raise ValueError(
                f"{name} is too quiet in the speech-active part to measure its loudness "
                "(below the -70 LUFS gate of ITU-R BS.1770)"
            )
    target = loudness[ORIGINAL]
    raw_gain = {name: target - value for name, value in loudness.items()}
    peaks = {name: _peak_dbfs(aligned[name]) + g for name, g in raw_gain.items()}
    highest = max(peaks.values())
    reduction = min(0.0, ceiling_dbfs - highest)
    return LoudnessMatch(
        loudness_lufs=loudness,
        gain_db={name: g + reduction for name, g in raw_gain.items()},
        common_reduction_db=reduction,
        peak_dbfs_after={name: p + reduction for name, p in peaks.items()},
    )


def apply_gain_db(x: np.ndarray, gain_db: float) -> np.ndarray:
    """``x · 10^(gain_db / 20)``."""
    return np.asarray(x, dtype=np.float64) * 10.0 ** (gain_db / 20.0)


# --------------------------------------------------------------------------- scores


@dataclass(frozen=True)
class Scores:
    """Scores of one signal against the original (and the clean reference).

    Level changes are of the aligned signal as delivered; the "matched"
    noise-floor change adds the loudness-matching gain, i.e. the noise
    reduction heard when speech plays at equal loudness. Clean-reference
    scores are ``None`` without ``--clean``; a score that could not be
    computed is NaN with an entry in ``notes``.
    """

    noise_floor_change_db: float
    noise_floor_change_matched_db: float
    speech_level_change_db: float
    wada_snr_db: float
    kurtosis_ratio: float
    si_sdr_db: float | None = None
    stoi: float | None = None
    estoi: float | None = None
    pesq_wb: float | None = None
    notes: tuple[str, ...] = ()


def _guarded(name: str, what: str, fn: Callable[[], float], notes: list[str]) -> float:
    try:
        return float(fn())
    except ValueError as exc:
        notes.append(f"{name}: {what} not computed: {exc}")
        return float("nan")


def score_signal(
    name: str,
    original: np.ndarray,
    aligned: np.ndarray,
    regions: Regions,
    fs_hz: float,
    match_gain_db: float,
    clean: np.ndarray | None = None,
) -> Scores:
    """All scores of one aligned signal (see :class:`Scores`)."""
    notes: list[str] = []
    nf = _guarded(
        name,
        "noise-floor change",
        lambda: metrics.noise_floor_change_db(original, aligned, regions.noise),
        notes,
    )
    sl = _guarded(
        name,
        "speech level change",
        lambda: metrics.speech_level_change_db(original, aligned, regions.speech),
        notes,
    )
    wada = _guarded(name, "WADA SNR", lambda: metrics.wada_snr_db(aligned), notes)
    kr = _guarded(
        name,
        "kurtosis ratio",
        lambda: metrics.kurtosis_ratio(original, aligned, regions.noise, fs_hz),
        notes,
    )
    extra: dict[str, float] = {}
    if clean is not None:
        extra["si_sdr_db"] = _guarded(
            name, "SI-SDR", lambda: metrics.si_sdr_db(aligned, clean), notes
        )
        extra["stoi"] = _guarded(name, "STOI", lambda: metrics.stoi(clean, aligned, fs_hz), notes)
        extra["estoi"] = _guarded(
            name, "ESTOI", lambda: metrics.stoi(clean, aligned, fs_hz, extended=True), notes
        )
        pesq = metrics.pesq_wb(clean, aligned, fs_hz)
        if pesq.reason:
            notes.append(f"{name}: PESQ-WB not computed: {pesq.reason}")
        extra["pesq_wb"] = pesq.mos_lqo
    return Scores(
        noise_floor_change_db=nf,
        noise_floor_change_matched_db=nf + match_gain_db,
        speech_level_change_db=sl,
        wada_snr_db=wada,
        kurtosis_ratio=kr,
        notes=tuple(notes),
        **extra,
    )


# --------------------------------------------------------------------------- whole comparison


@dataclass(frozen=True)
class Comparison:
    """Everything ``liftmag compare`` reports, in memory.

    ``names`` lists the original first, then the versions in the order given.
    ``aligned`` holds the signals aligned to the original (as delivered);
    ``matched`` the same after the loudness-matching gains.
    """

    fs_hz: float
    names: tuple[str, ...]
    alignments: dict[str, Alignment]
    aligned: dict[str, np.ndarray]
    matched: dict[str, np.ndarray]
    loudness: LoudnessMatch
    regions: Regions
    scores: dict[str, Scores]
    clean_alignment: Alignment | None = None
    notes: tuple[str, ...] = field(default=())


def compare_takes(
    original: np.ndarray,
    versions: Mapping[str, np.ndarray],
    fs_hz: float,
    clean: np.ndarray | None = None,
    noise_intervals_s: Sequence[tuple[float, float]] | None = None,
    progress: Progress = _identity_progress,
) -> Comparison:
    """Align, loudness-match and score every version against the original.

    All signals are 1-D at ``fs_hz``. ``versions`` must not contain the key
    ``"original"``. ``clean``, if given, is aligned to the original like a
    version and used as the reference of SI-SDR, STOI, ESTOI and PESQ-WB.
    ``progress(iterable, description)`` may wrap the loops (e.g. with tqdm).

    Raises
    ------
    ValueError
        With a one-line message for input that cannot be compared.
    """
    if ORIGINAL in versions:
        raise ValueError(f'"{ORIGINAL}" is reserved for the original take')
    x = np.asarray(original, dtype=np.float64)
    n = x.size
    if not x.any():
        raise ValueError("the original take is digital silence")
    for name, v in versions.items():
        if not np.any(v):
            raise ValueError(f"version {name} is digital silence; nothing to compare")
    notes: list[str] = []
    regions = find_regions(x, fs_hz, noise_intervals_s)
    notes.extend(regions.notes)

    alignments: dict[str, Alignment] = {}
    aligned: dict[str, np.ndarray] = {ORIGINAL: x}
    for name, v in progress(list(versions.items()), "aligning"):
        a = estimate_delay(x, v, fs_hz)
        alignments[name] = a
        aligned[name] = apply_alignment(v, a, n)
        if a.polarity < 0:
            notes.append(f"{name} has inverted polarity; it was turned back for the comparison")
        if a.peak_correlation < WEAK_CORRELATION:
            notes.append(
                f"{name}: weak correlation with the original ({a.peak_correlation:.2f}); "
                "the delay may be wrong"
            )
        covered = min(np.asarray(v).size - a.delay_samples, n) - max(0, -a.delay_samples)
        if covered < n - round(0.010 * fs_hz):
            notes.append(
                f"{name} covers {max(covered, 0) / fs_hz:.2f} s of the original's "
                f"{n / fs_hz:.2f} s; the rest was padded with silence"
            )
    clean_aligned = None
    clean_alignment = None
    if clean is not None:
        if not np.any(clean):
            raise ValueError("the clean reference is digital silence")
        clean_alignment = estimate_delay(x, clean, fs_hz)
        clean_aligned = apply_alignment(clean, clean_alignment, n)

    loud = match_loudness(aligned, regions.speech, fs_hz)
    if loud.common_reduction_db < 0:
        notes.append(
            f"all listening files were lowered together by {-loud.common_reduction_db:.1f} dB "
            f"so that no sample peak exceeds {PEAK_CEILING_DBFS:g} dBFS (no clipping)"
        )
    matched = {name: apply_gain_db(sig, loud.gain_db[name]) for name, sig in aligned.items()}

    scores: dict[str, Scores] = {}
    for name in progress([ORIGINAL, *versions], "scoring"):
        s = score_signal(
            name,
            x,
            aligned[name],
            regions,
            fs_hz,
            loud.gain_db[name] - loud.gain_db[ORIGINAL],
            clean_aligned,
        )
        scores[name] = s
        notes.extend(s.notes)
    return Comparison(
        fs_hz=fs_hz,
        names=(ORIGINAL, *versions),
        alignments=alignments,
        aligned=aligned,
        matched=matched,
        loudness=loud,
        regions=regions,
        scores=scores,
        clean_alignment=clean_alignment,
        notes=tuple(notes),
    )


# --------------------------------------------------------------------------- blind listening


BLIND_PREFIX = "take-"


def blind_labels(names: Sequence[str], rng: random.Random | None = None) -> dict[str, str]:
    """Shuffle ``names`` onto neutral labels ``take-1``, ``take-2``, ...

    Returns ``{label: name}``. The default generator is
    :class:`random.SystemRandom` (operating-system entropy), so the
    assignment cannot be reproduced from a time stamp or a known seed.
    """
    gen = rng if rng is not None else random.SystemRandom()
    order = list(names)
    gen.shuffle(order)
    return {f"{BLIND_PREFIX}{i + 1}": name for i, name in enumerate(order)}


# The blind key: which neutral file is which version. A JSON object kept beside the blind
# folder; ``liftmag compare --reveal`` reads it back.
KEY_FORMAT = "liftmag-blind-key"
KEY_FORMAT_VERSION = 1


@dataclass(frozen=True)
class BlindTake:
    """One blind file as the key records it (``sha256`` of the file as written)."""

    file: str  # e.g. "take-2.wav", inside the key's blind folder
    name: str  # the version behind it ("original", "liftmag", or a NAME given by the user)
    source: str  # the file the version was read from (absolute)
    gain_db: float = 0.0  # listening gain applied to it
    sha256: str | None = None


def blind_label_order(labels: Iterable[str]) -> list[str]:
    """Labels in their number order (``take-2`` before ``take-10``)."""
    return sorted(labels, key=lambda t: int(t.removeprefix(BLIND_PREFIX)))


def blind_key_json(blind_folder: str, takes: Sequence[BlindTake]) -> str:
    """The key as JSON text, takes in the order given (gains to 0.001 dB)."""
    key = {
        "format": KEY_FORMAT,
        "format_version": KEY_FORMAT_VERSION,
        "blind_folder": blind_folder,
        "takes": {
            t.file: {
                "name": t.name,
                "source": t.source,
                "gain_db": round(t.gain_db, 3),
                "sha256": t.sha256,
            }
            for t in takes
        },
    }
    return json.dumps(key, indent=2) + "\n"


def parse_blind_key(text: str) -> tuple[str, list[BlindTake]]:
    """``(blind_folder, takes)`` from a key's JSON text, takes in file-number order.

    Raises ``ValueError`` if the text is not a liftmag blind key.
    """
    try:
        key = json.loads(text)
        if key.get("format") != KEY_FORMAT:
            raise ValueError
        folder = str(key["blind_folder"])
        takes = key["takes"]
        order = sorted(takes, key=lambda t: int(re.sub(r"\D", "", t) or 0))
        return folder, [
            BlindTake(
                file=label,
                name=str(takes[label]["name"]),
                source=str(takes[label]["source"]),
                gain_db=float(takes[label].get("gain_db", 0.0)),
                sha256=takes[label].get("sha256"),
            )
            for label in order
        ]
    except (ValueError, KeyError, TypeError, AttributeError):
        raise ValueError("not a liftmag blind key") from None
