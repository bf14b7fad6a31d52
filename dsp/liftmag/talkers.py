"""Who talks from where: the directional sources of a take and the choice of the wanted talker.

A take recorded with several microphones tells *where* each voice comes from. Over a whole
take the wanted talker keeps a steady position relative to the array; a competing voice
(a radio, a television, a second person) has another one. This module finds those positions
from the take itself and says, per time-frequency bin, how likely the wanted talker is to
dominate it, so the engine can learn every other voice as noise.

Method
------
* **Frame features.** For every feature frame (``FEATURE_FRAME_S``, Hann, no overlap) and
  every microphone ``m`` other than the first, the generalised cross-correlation with the
  phase transform (GCC-PHAT; Knapp & Carter 1976) over the speech band, with each bin
  weighted by how far it stands above a running noise floor so that steady noise (a fan, an
  air handler) does not steer it. Its peak gives the frame's dominant time difference of
  arrival ``tau_m`` (seconds, positive when the sound reaches ``m`` after the first
  microphone) and its height a coherence in ``[0, 1]``: near 1 for one direct source, low
  for reverberant or mixed sound.
* **Sources.** The frames' delay vectors are clustered by mean shift (Comaniciu & Meer 2002)
  with a Gaussian kernel; each cluster holding at least ``MIN_SOURCE_SHARE`` of the active
  frames is a source, reported with its share of frames, median coherence and level.
* **The wanted talker.** By default the most *direct and persistent* source: the highest
  median coherence (which favours the voice closest to the array, whose direct sound
  dominates its reverberation) times its share of the active frames (a steady noise source
  can be as coherent in a dry room, but holds few frames). Being the nearest, the wanted
  talker should also be the loudest voice when it speaks: when another clearly directional
  voice is within ``LOUDER_BY_DB`` of it (median level of their frames) the take gives no way
  to decide, the choice is reported as undecided and every voice is kept as speech, as
  without this analysis. A bearing (with the microphone spacing) or a stretch of the take
  where only the wanted talker speaks overrides the rule.
* **Frames held by another voice.** Feature frames whose delays belong to a voice learned as
  noise, with no frame of the wanted talker within ``OTHER_FRAME_GUARD`` frames, count as
  noise in every bin: the take's own "other voice, not ours" stretches, which a user would
  otherwise mark as a noise region.
* **Time-frequency weight.** With far-field steering vectors ``a_c(f)`` built from the
  sources' delays, each bin's share of power along ``a_c``,
  ``r_c = |a_c^H y|^2 / (M |y|^2)``, gives the weight of the wanted source
  ``w = 1 / (1 + exp(kappa (max_c r_c - r_w - margin)))``: a bin counts as another source's
  only when that source clearly holds more of it than the wanted talker (a logistic form of
  the direction-based masks of spatial clustering; Sawada et al. 2011). Only other sources
  that are clearly directional count (``MIN_OTHER_COHERENCE``). Where the sources cannot be
  told apart at a frequency (low frequencies on a small array, spatial aliasing on a wide
  one) the weight is pulled to 1, so the engine behaves as it does without this analysis.
  The engine multiplies its speech-presence probability by ``w``, so the noise statistics
  take in the other voices and the talker's statistics leave them out.

References
----------
R. Martin, "Noise power spectral density estimation based on optimal smoothing and minimum
statistics", IEEE Trans. Speech and Audio Processing 9(5), 2001.
C. H. Knapp, G. C. Carter, "The generalized correlation method for estimation of time
delay", IEEE Trans. ASSP 24(4), 1976.
D. Comaniciu, P. Meer, "Mean shift: a robust approach toward feature space analysis",
IEEE Trans. PAMI 24(5), 2002.
H. Sawada, S. Araki, S. Makino, "Underdetermined convolutive blind source separation via
frequency bin-wise clustering and permutation alignment", IEEE Trans. ASLP 19(3), 2011.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from liftmag.estimators import beam_output

FEATURE_FRAME_S = 0.064  # short enough that one voice often dominates a frame
MAX_DELAY_S = 2.0e-3  # time differences searched: +-2 ms, microphones up to about 0.68 m apart
DELAY_STEP_S = 1.0 / 64000.0  # GCC grid; the peak is refined by parabolic interpolation
BAND_HZ = (150.0, 7000.0)  # where speech carries the direction
FLOOR_RISE_PER_S = 1.26  # the running noise floor may rise 1 dB per second
FLOOR_BIAS = 3.0  # minimum of the smoothed power -> mean noise power (see running_floor)
ACTIVE_ABOVE_FLOOR_DB = 6.0  # frames this far above the take's quiet level count as active
MIN_PEAK = 0.1  # frames whose GCC peak is lower carry no usable direction
MIN_SOURCE_SHARE = 0.08  # a source holds at least this share of the active frames
MIN_OTHER_COHERENCE = 0.3  # another source is learned as noise only if this directional
KERNEL_WIDTH_S = 2.0 * DELAY_STEP_S  # mean-shift kernel per pair: two steps of the GCC grid
MAX_CLUSTER_POINTS = 2000  # mean shift runs on at most this many frames (evenly strided)
OTHER_FRAME_GUARD = 1  # frames next to a wanted-talker frame that never count as another's
LOUDER_BY_DB = 2.0  # the wanted talker's median level lead over any voice learned as noise
KAPPA = 60.0  # steepness of the time-frequency posterior
MARGIN = 0.2  # lead in power share another source needs before a bin counts as noise


@dataclass(frozen=True)
class FrameFeatures:
    """Per feature frame: dominant delays ``(N, M-1)`` s, GCC peak ``(N,)``, level ``(N,)`` dB."""

    delays_s: NDArray
    peak: NDArray
    level_db: NDArray
    times_s: NDArray

    def __len__(self) -> int:
        return int(self.peak.size)


@dataclass(frozen=True)
class Source:
    """One directional source: delays relative to the first microphone and what it holds."""

    delays_s: tuple[float, ...]
    share: float  # of the active frames
    coherence: float  # median GCC-PHAT peak of its frames
    level_db: float  # median level of its frames (dB, arbitrary reference)

    def bearing_deg(self, spacing_m: float | None) -> float | None:
        """Far-field bearing on a uniform linear array (90 = broadside), if the spacing is known.

        From the least-squares fit of ``tau_m = -m d cos(theta) / c`` over the microphones.
        """
        from liftmag.geometry import SPEED_OF_SOUND_M_S

        if spacing_m is None:
            return None
        m = np.arange(1, len(self.delays_s) + 1) * spacing_m
        cos = -float(np.dot(m, self.delays_s) / np.dot(m, m)) * SPEED_OF_SOUND_M_S
        return float(np.degrees(np.arccos(np.clip(cos, -1.0, 1.0))))


@dataclass(frozen=True)
class TalkerMap:
    """The sources of a take and the wanted one (``wanted`` indexes ``sources``)."""

    sources: tuple[Source, ...]
    wanted: int | None
    chosen_by: str  # "direct", "undecided" (default rule), "bearing", "talker region", "none"
    confidence: float  # margin of the choice in [0, 1]
    active_frames: int
    # The frames the map was found from, for drawing it (report.talker_map_figure).
    features: FrameFeatures | None = field(default=None, compare=False, repr=False)

    @property
    def rivals(self) -> tuple[int, ...]:
        """Indices of the other sources that are clearly directional voices.

        Only sources whose frames are clearly directional (median GCC-PHAT peak at least
        ``MIN_OTHER_COHERENCE``) count: weaker clusters were, on our development rooms, mains
        hum or reflections of the talker, and treating them as noise cost up to 0.4 PESQ.
        """
        if self.wanted is None:
            return ()
        return tuple(i for i, s in enumerate(self.sources)
                     if i != self.wanted and s.coherence >= MIN_OTHER_COHERENCE)

    @property
    def removed(self) -> tuple[int, ...]:
        """Indices of the other sources that are learned as noise: the rivals, unless the
        choice was left undecided."""
        return () if self.chosen_by == "undecided" else self.rivals

    @property
    def kept(self) -> int | None:
        """Index of the voice kept as the talker, ``None`` when none was (undecided or none
        found); ``wanted`` still holds the default rule's best guess for the report."""
        return None if self.chosen_by == "undecided" else self.wanted

    @property
    def competing(self) -> bool:
        """True when another source beside the wanted talker is learned as noise."""
        return bool(self.removed)

    def to_dict(self, spacing_m: float | None = None) -> dict:
        """JSON-able summary (delays in ms; bearings only when the spacing is known)."""
        return {
            "chosen_by": self.chosen_by,
            "confidence": round(self.confidence, 3),
            "active_frames": self.active_frames,
            "sources": [
                {"delays_ms": [round(d * 1e3, 4) for d in s.delays_s],
                 "bearing_deg": (None if (b := s.bearing_deg(spacing_m)) is None
                                 else round(b, 1)),
                 "share": round(s.share, 3), "coherence": round(s.coherence, 3),
                 "wanted": i == self.kept, "learned_as_noise": i in self.removed}
                for i, s in enumerate(self.sources)
            ],
        }

    def describe(self, spacing_m: float | None = None) -> str:
        """One line for a summary: where the wanted talker is and how it was chosen."""
        if self.wanted is None:
            return "no directional talker found; processed as one talker"
        src = self.sources[self.wanted]
        where = f"time difference {src.delays_s[-1] * 1e3:+.3f} ms"
        bearing = src.bearing_deg(spacing_m)
        if bearing is not None:
            where += f", bearing {bearing:.0f} deg"
        if self.chosen_by == "undecided":
            return (f"{len(self.rivals) + 1} voices from different directions at about the "
                    "same level; no way to tell which one is wanted, so all are kept as speech "
                    "(choose with --target-deg or --talker-region)")
        others = len(self.removed)
        how = {"direct": "the most direct and persistent voice", "bearing": "the bearing given",
               "talker region": "the talker region"}[self.chosen_by]
        text = f"wanted talker at {where} ({src.share:.0%} of active frames), chosen by {how}"
        if self.chosen_by == "direct":
            text += f" (confidence {self.confidence:.2f})"
        if others:
            text += f"; {others} other source{'s' if others > 1 else ''} learned as noise"
        else:
            text += "; no other clearly directional source"
        return text


def running_floor(power: NDArray, state: tuple | None, frame_s: float) -> tuple[NDArray, tuple]:
    """Per-bin noise floor over frames ``power`` (N, F), and the state after the last frame.

    The power is smoothed over about three frames, its minimum tracked (falling at once,
    rising ``FLOOR_RISE_PER_S``) and scaled by ``FLOOR_BIAS``, because the minimum of a
    fluctuating noise power lies well below its mean (minimum statistics, Martin 2001).
    """
    rise = FLOOR_RISE_PER_S**frame_s
    out = np.empty_like(power)
    smooth, current = (power[0], power[0]) if state is None else state
    for k in range(power.shape[0]):  # recursive in time; F-wide vector operations
        smooth = 0.7 * smooth + 0.3 * power[k]
        current = np.minimum(current * rise, smooth)
        out[k] = current
    return FLOOR_BIAS * out, (smooth, current)


@functools.lru_cache(maxsize=8)
def _gcc_kernel(n_bins: int, first_hz: float, step_hz: float) -> tuple[NDArray, NDArray]:
    """Lags (L,) and ``exp(j 2 pi f tau)`` (F, L) for evenly spaced band frequencies."""
    f = first_hz + step_hz * np.arange(n_bins)
    lags = np.arange(-MAX_DELAY_S, MAX_DELAY_S + DELAY_STEP_S / 2, DELAY_STEP_S)
    return lags, np.exp(2j * np.pi * f[:, None] * lags[None, :])


def frame_features(
    spectra: NDArray, frequencies_hz: NDArray, floor: NDArray, start_s: float, frame_s: float
) -> FrameFeatures:
    """GCC-PHAT features of feature frames ``spectra`` (M, N, F) over the speech band.

    ``floor`` (N, F) is the running noise floor of the mean channel power; bins are weighted by
    ``max(0, 1 - floor / power)`` so that steady noise does not set the direction.
    """
    m, n, _ = spectra.shape
    band = (frequencies_hz >= BAND_HZ[0]) & (frequencies_hz <= BAND_HZ[1])
    spec = spectra[:, :, band]
    f = frequencies_hz[band]
    power = np.mean(np.abs(spec) ** 2, axis=0)
    weight = np.clip(1.0 - floor[:, band] / np.maximum(power, 1e-300), 0.0, None)
    total = np.maximum(weight.sum(axis=1), 1e-12)
    lags, kernel = _gcc_kernel(f.size, float(f[0]), float(f[1] - f[0]) if f.size > 1 else 1.0)
    delays = np.zeros((n, m - 1))
    peaks = np.zeros((n, m - 1))
    rows = np.arange(n)
    for mic in range(1, m):  # M - 1 pairs with the first microphone
        cross = spec[mic] * np.conj(spec[0])
        phat = weight * cross / np.maximum(np.abs(cross), 1e-300)
        gcc = np.real(phat @ kernel) / total[:, None]
        best = np.argmax(gcc, axis=1)
        inner = np.clip(best, 1, lags.size - 2)
        a, b, c = (gcc[rows, inner + d] for d in (-1, 0, 1))
        curve = a - 2 * b + c
        shift = np.where(curve < -1e-12, 0.5 * (a - c) / np.where(curve < -1e-12, curve, -1), 0)
        delays[:, mic - 1] = lags[inner] + np.clip(shift, -1, 1) * DELAY_STEP_S
        peaks[:, mic - 1] = gcc[rows, best]
    level = 10 * np.log10(np.mean(power, axis=-1) + 1e-30)
    times = start_s + frame_s * np.arange(n)
    return FrameFeatures(delays, peaks.mean(axis=1), level, times)


def join_features(parts: list[FrameFeatures]) -> FrameFeatures:
    """One :class:`FrameFeatures` from consecutive parts."""
    if not parts:
        return FrameFeatures(np.zeros((0, 1)), np.zeros(0), np.zeros(0), np.zeros(0))
    return FrameFeatures(*(np.concatenate([getattr(p, k) for p in parts])
                           for k in ("delays_s", "peak", "level_db", "times_s")))


def _active(features: FrameFeatures) -> NDArray:
    if not len(features):
        return np.zeros(0, bool)
    quiet = np.percentile(features.level_db, 10)
    return (features.level_db > quiet + ACTIVE_ABOVE_FLOOR_DB) & (features.peak > MIN_PEAK)


def kernel_width_s(n_pairs: int) -> float:
    """Mean-shift kernel width for delay vectors of ``n_pairs`` microphone pairs.

    Each pair's delay carries its own estimation error, so the distance between two frames of
    one source grows as the square root of the number of pairs; the kernel grows with it and
    keeps the same tolerance per pair (``KERNEL_WIDTH_S`` for two microphones).
    """
    return KERNEL_WIDTH_S * float(np.sqrt(max(n_pairs, 1)))


def find_sources(features: FrameFeatures) -> tuple[Source, ...]:
    """Directional sources: mean-shift modes of the active frames' delay vectors.

    Modes are taken greedily from the densest (density weighted by the GCC peak); each takes
    the frames within 2.5 kernel widths. Sources are ordered by share, largest first.
    """
    active = _active(features)
    pts = features.delays_s[active]
    if pts.shape[0] == 0:
        return ()
    stride = max(1, -(-pts.shape[0] // MAX_CLUSTER_POINTS))
    pts, peak, level = pts[::stride], features.peak[active][::stride], \
        features.level_db[active][::stride]
    h = kernel_width_s(pts.shape[1])
    sq = np.sum(pts**2, axis=-1)
    # Squared distances from inner products: one N x N array (32 MB at MAX_CLUSTER_POINTS).
    d2 = np.maximum(sq[:, None] + sq[None, :] - 2.0 * pts @ pts.T, 0.0)
    density = np.exp(-0.5 * d2 / h**2) @ peak
    del d2
    remaining = np.ones(pts.shape[0], bool)
    sources = []
    while remaining.sum() >= MIN_SOURCE_SHARE * pts.shape[0]:
        centre = pts[np.argmax(np.where(remaining, density, -np.inf))]
        for _ in range(10):  # mean shift from the densest remaining frame
            w = np.exp(-0.5 * np.sum((pts - centre) ** 2, axis=-1) / h**2) * peak * remaining
            centre = (w[:, None] * pts).sum(axis=0) / max(w.sum(), 1e-300)
        near = np.sqrt(np.sum((pts - centre) ** 2, axis=-1)) < 2.5 * h
        members = near & remaining
        remaining &= ~near
        share = members.sum() / pts.shape[0]
        if share >= MIN_SOURCE_SHARE:
            sources.append(Source(tuple(float(v) for v in centre), float(share),
                                  float(np.median(peak[members])),
                                  float(np.median(level[members]))))
    return tuple(sorted(sources, key=lambda s: -s.share))


def choose_wanted(
    sources: tuple[Source, ...],
    features: FrameFeatures,
    target_delays_s: NDArray | None = None,
    region_s: tuple[tuple[float, float], ...] = (),
) -> TalkerMap:
    """Decide which source is the wanted talker.

    ``target_delays_s`` (from a bearing and the spacing) picks the source nearest to it, or adds
    it as a source if none is within 3 kernel widths; ``region_s`` (stretches where only the
    wanted talker speaks) picks the source holding most of the active frames there. Otherwise
    the most direct source (highest median coherence) is chosen; ``confidence`` is its margin
    over the next, relative to the higher.
    """
    active = int(np.count_nonzero(_active(features)))
    if not sources and target_delays_s is None and not region_s:
        return TalkerMap((), None, "none", 0.0, active)
    h = kernel_width_s(features.delays_s.shape[1])
    if target_delays_s is not None:
        target = np.asarray(target_delays_s, dtype=float)
        dist = [float(np.linalg.norm(np.asarray(s.delays_s) - target)) for s in sources]
        if sources and min(dist) < 3 * h:
            i = int(np.argmin(dist))
            return TalkerMap(sources, i, "bearing", 1.0, active)
        given = Source(tuple(float(v) for v in target), 0.0, 0.0, float("nan"))
        return TalkerMap((*sources, given), len(sources), "bearing", 1.0, active)
    if region_s:
        mask = np.zeros(len(features), bool)
        for a, b in region_s:
            mask |= (features.times_s >= a) & (features.times_s < b)
        mask &= _active(features)
        if not mask.any():
            raise ValueError("the talker region holds no frame with a clear direction "
                             "(is the wanted talker speaking there?)")
        pts = features.delays_s[mask]
        votes = [np.sum(np.sqrt(np.sum((pts - np.asarray(s.delays_s)) ** 2, axis=-1)) < 2.5 * h)
                 for s in sources]
        if not sources or max(votes) == 0:
            centre = np.median(pts, axis=0)
            given = Source(tuple(float(v) for v in centre), 0.0,
                           float(np.median(features.peak[mask])),
                           float(np.median(features.level_db[mask])))
            return TalkerMap((*sources, given), len(sources), "talker region", 0.5, active)
        i = int(np.argmax(votes))
        return TalkerMap(sources, i, "talker region", float(votes[i] / mask.sum()), active)
    # Most direct (coherence) and most persistent (share of active frames): a steady noise
    # source can be as coherent as the talker in a dry room, but holds few frames.
    score = np.array([s.coherence * s.share for s in sources])
    i = int(np.argmax(score))
    ranked = np.sort(score)[::-1]
    margin = float((ranked[0] - ranked[1]) / ranked[0]) if len(sources) > 1 else 1.0
    chosen = TalkerMap(sources, i, "direct", margin, active)
    # The wanted voice is the nearest, so when it is active it is also the loudest. Another
    # clearly directional voice about as loud leaves no way to tell which one is wanted:
    # keep both as speech rather than risk learning the wanted talker as noise.
    rival = max((sources[j].level_db for j in chosen.rivals), default=-np.inf)
    if rival > sources[i].level_db - LOUDER_BY_DB:
        return TalkerMap(sources, i, "undecided", margin, active)
    return chosen


def steering_from_delays(delays_s: NDArray, frequencies_hz: NDArray) -> NDArray:
    """Far-field steering ``(..., F, M)`` for delays ``(..., M-1)`` relative to microphone 0."""
    tau = np.concatenate([np.zeros((*np.shape(delays_s)[:-1], 1)), delays_s], axis=-1)
    return np.exp(-2j * np.pi * frequencies_hz[:, None] * tau[..., None, :])


@dataclass(frozen=True)
class SpatialPrior:
    """What the engine needs per bin to weigh a frame's speech presence by the wanted talker.

    ``wanted`` (F, M) and ``others`` (C, F, M) unit-modulus steering vectors; ``separable``
    (F,) in [0, 1]: how well the wanted talker can be told from the nearest other source at
    each frequency (``1 - max_c |a_w^H a_c|^2 / M^2``).
    """

    wanted: NDArray
    others: NDArray
    separable: NDArray
    kappa: float = KAPPA
    # per feature frame: another source holds it (empty: no frame-level information)
    other_frames: NDArray = field(default_factory=lambda: np.zeros(0, bool))
    feature_frame_s: float = FEATURE_FRAME_S

    def frame_weight(self, times_s: NDArray) -> NDArray:
        """Per engine frame centred at ``times_s``: 0 where another source holds the feature
        frame (none of it may count as the wanted talker's speech), else 1."""
        if not self.other_frames.size:
            return np.ones(np.shape(times_s))
        k = np.floor(np.asarray(times_s) / self.feature_frame_s).astype(int)
        inside = (k >= 0) & (k < self.other_frames.size)
        held = self.other_frames[np.clip(k, 0, self.other_frames.size - 1)] & inside
        return np.where(held, 0.0, 1.0)


def _distance_s(features: FrameFeatures, source: Source) -> NDArray:
    """Distance ``(N,)`` of every frame's delay vector from ``source``'s, in seconds."""
    return np.sqrt(np.sum((features.delays_s - np.asarray(source.delays_s)) ** 2, axis=-1))


def frame_sources(talkers: TalkerMap, features: FrameFeatures) -> NDArray:
    """Per feature frame, the index of the nearest source within 2.5 kernel widths (the radius
    of :func:`find_sources`), or -1 for frames with no clear direction or no source near."""
    n = len(features)
    if not talkers.sources or n == 0:
        return np.full(n, -1)
    dist = np.stack([_distance_s(features, src) for src in talkers.sources])
    nearest = np.argmin(dist, axis=0)
    radius = 2.5 * kernel_width_s(features.delays_s.shape[1])
    ok = (dist[nearest, np.arange(n)] < radius) & (features.peak > MIN_PEAK)
    return np.where(ok, nearest, -1)


def other_frames(talkers: TalkerMap, features: FrameFeatures) -> NDArray:
    """Feature frames ``(N,)`` held by another source that is learned as noise.

    A frame counts when its delays lie within 2.5 kernel widths of such a source (the radius
    that assigns frames to sources in :func:`find_sources`), not within that of the wanted
    talker, and no frame within ``OTHER_FRAME_GUARD`` of it is the wanted talker's. These are
    the take's own stretches of "the other voice, not ours", the frames a user would mark as
    a noise region, spread over the whole take.
    """
    n = len(features)
    if talkers.wanted is None or not talkers.removed or n == 0:
        return np.zeros(n, bool)
    radius = 2.5 * kernel_width_s(features.delays_s.shape[1])
    clear = features.peak > MIN_PEAK

    def near(i: int) -> NDArray:
        return _distance_s(features, talkers.sources[i]) < radius

    wanted = near(talkers.wanted) & clear
    other = np.zeros(n, bool)
    for i in talkers.removed:
        other |= near(i) & clear
    guard = wanted.copy()
    for k in range(1, OTHER_FRAME_GUARD + 1):
        guard[k:] |= wanted[:-k]
        guard[:-k] |= wanted[k:]
    return other & ~guard


def spatial_prior(
    talkers: TalkerMap, frequencies_hz: NDArray, features: FrameFeatures | None = None
) -> SpatialPrior | None:
    """The :class:`SpatialPrior` of a talker map; ``None`` when there is no other source.

    With the take's ``features`` (by default the map's own) the prior also marks the feature
    frames that another source holds (:func:`other_frames`).
    """
    features = talkers.features if features is None else features
    if not talkers.competing:
        return None
    delays = np.array([s.delays_s for s in talkers.sources])
    steer = steering_from_delays(delays, frequencies_hz)  # (S, F, M)
    wanted = steer[talkers.wanted]
    others = steer[list(talkers.removed)]
    m = wanted.shape[-1]
    overlap = np.abs(np.einsum("fm,cfm->cf", np.conj(wanted), others)) ** 2 / m**2
    held = np.zeros(0, bool) if features is None else other_frames(talkers, features)
    frame_s = (float(features.times_s[1] - features.times_s[0])
               if features is not None and len(features) > 1 else FEATURE_FRAME_S)
    return SpatialPrior(wanted, others, 1.0 - overlap.max(axis=0), other_frames=held,
                        feature_frame_s=frame_s)


def _power_along(steer: NDArray, y: NDArray) -> NDArray:
    """``|a^H y|^2`` (K, F) for steering ``a`` (F, M) and frames ``y`` (K, F, M)."""
    proj = beam_output(steer, y)
    return proj.real**2 + proj.imag**2


def wanted_posterior(prior: SpatialPrior, y: NDArray) -> NDArray:
    """Posterior ``(K, F)`` that the wanted talker dominates each bin of frames ``y`` (K, F, M).

    Pulled to 1 where the sources are not separable, so such bins are treated as without
    this analysis.
    """
    m = y.shape[-1]
    power = y[..., 0].real ** 2 + y[..., 0].imag ** 2
    for ch in range(1, m):
        power += y[..., ch].real ** 2 + y[..., ch].imag ** 2
    norm = np.maximum(power, 1e-300) * m
    # Another source must hold clearly more of the bin than the wanted talker before the bin
    # counts as noise: a free-field model misses reverberation, and wanted speech counted as
    # noise would make the beamformer cancel the talker.
    lead = _power_along(prior.others[0], y)
    for other in prior.others[1:]:
        np.maximum(lead, _power_along(other, y), out=lead)
    lead -= _power_along(prior.wanted, y)
    lead /= norm
    w = 1.0 / (1.0 + np.exp(prior.kappa * (lead - MARGIN)))
    return 1.0 - prior.separable * (1.0 - w)


def take_features(blocks, sample_rate_hz: float, n_channels: int,
                  progress=None) -> FrameFeatures:
    """:func:`frame_features` over a whole take given as ``(M, n)`` blocks, in constant memory
    apart from the features themselves (a few numbers per 64 ms frame)."""
    length = max(32, round(FEATURE_FRAME_S * sample_rate_hz))
    frame_s = length / sample_rate_hz
    window = np.hanning(length)
    freqs = np.fft.rfftfreq(length, 1.0 / sample_rate_hz)
    pending = np.zeros((n_channels, 0))
    parts: list[FrameFeatures] = []
    state: tuple | None = None  # the running floor between calls
    start_s = 0.0

    def analyse(samples: NDArray) -> None:
        nonlocal state, start_s
        n = samples.shape[1] // length
        spectra = np.fft.rfft(samples.reshape(n_channels, n, length) * window, axis=-1)
        floors, state = running_floor(np.mean(np.abs(spectra) ** 2, axis=0), state, frame_s)
        parts.append(frame_features(spectra, freqs, floors, start_s, frame_s))
        start_s += n * frame_s

    done = 0
    for block in blocks:
        pending = np.concatenate([pending, np.asarray(block, dtype=float)], axis=1)
        done += block.shape[1]
        n = pending.shape[1] // length
        if n >= 16:  # frames in batches, so the per-call overhead stays small
            analyse(pending[:, : n * length])
            pending = pending[:, n * length :]
        if progress is not None:
            progress(done)
    if pending.shape[1] >= length:
        analyse(pending[:, : (pending.shape[1] // length) * length])
    return join_features(parts)
