"""Noise statistics: running moments, reusable noise models, and the spiked regulariser.

The engine keeps, per STFT bin, weighted running sums of the noise snapshot's outer product
``v v^H`` and of its lifted second moment ``rho rho^T`` (fourth-order statistics). A
:class:`NoiseModel` is a snapshot of those moments that a user can learn once from room
tone and apply to every take.

The lifted noise covariance is estimated from few frames (``M^4`` entries per bin), so it is
regularised (:func:`spiked_lift_covariance`): in the noise-whitened domain a circular
Gaussian noise has identity lifted covariance, and a sample estimate from ``N`` frames has
its eigenvalues spread over the Marchenko-Pastur bulk ``[(1 - sqrt(q))^2, (1 + sqrt(q))^2]``
with ``q = M^2 / N`` (Marchenko & Pastur 1967). Only eigen-directions that lie clearly
outside that bulk are kept; the rest are set to the Gaussian model. On Gaussian noise the
lifted estimators then reduce to the linear ones.
"""

from __future__ import annotations

import io
import json
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from liftmag.lift import lift_dimension, lift_snapshots, lift_transform, rho, unrho

FORMAT_VERSION = 1
MIN_LIFT_EIGENVALUE = 0.01  # floor of a kept eigenvalue, relative to the Gaussian model
FORMAT_NAME = "liftmag-noise-model"


@dataclass(frozen=True)
class NoiseModel:
    """Noise statistics per STFT bin, learned from room tone or tracked while processing.

    Attributes
    ----------
    covariance : (F, M, M) complex   ``E[v v^H]`` per bin
    lift_second_moment : (F, D, D) real   ``E[rho(v v^H) rho(v v^H)^T]``, D = M^2
    frames : float   effective number of frames behind the estimates
    sample_rate_hz, frame_length, hop, n_channels : the STFT geometry it belongs to
    description : free text (where it was learned)
    """

    covariance: NDArray[np.complex128]
    lift_second_moment: NDArray[np.float64]
    frames: float
    sample_rate_hz: float
    frame_length: int
    hop: int
    n_channels: int
    description: str = ""

    def __post_init__(self) -> None:
        f, m = self.covariance.shape[0], self.n_channels
        d = lift_dimension(m)
        if self.covariance.shape != (f, m, m) or self.lift_second_moment.shape != (f, d, d):
            raise ValueError("noise model arrays do not match its channel count")
        if f != self.frame_length // 2 + 1:
            raise ValueError("noise model arrays do not match its frame length")

    @property
    def duration_s(self) -> float:
        return self.frames * self.hop / self.sample_rate_hz

    def mismatch(self, sample_rate_hz: float, frame_length: int, hop: int, n_channels: int) -> str:
        """Empty if the model fits this geometry, else a sentence naming what differs."""
        problems = []
        if self.sample_rate_hz != sample_rate_hz:
            problems.append(f"sample rate {self.sample_rate_hz:g} Hz vs {sample_rate_hz:g} Hz")
        if self.n_channels != n_channels:
            problems.append(f"{self.n_channels} channels vs {n_channels}")
        if (self.frame_length, self.hop) != (frame_length, hop):
            problems.append(
                f"STFT frame/hop {self.frame_length}/{self.hop} vs {frame_length}/{hop} samples"
            )
        if not problems:
            return ""
        return "the noise model does not match this take: " + "; ".join(problems)

    def to_bytes(self) -> bytes:
        """Serialise as an ``.npz`` archive (arrays plus a JSON metadata entry)."""
        meta = {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "frames": self.frames,
            "sample_rate_hz": self.sample_rate_hz,
            "frame_length": self.frame_length,
            "hop": self.hop,
            "n_channels": self.n_channels,
            "description": self.description,
        }
        buf = io.BytesIO()
        np.savez_compressed(
            buf,
            covariance=self.covariance,
            lift_second_moment=self.lift_second_moment,
            metadata=np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8),
        )
        return buf.getvalue()

    @classmethod
    def from_bytes(cls, data: bytes) -> NoiseModel:
        """Inverse of :meth:`to_bytes`; refuses other formats and newer versions clearly."""
        try:
            with np.load(io.BytesIO(data), allow_pickle=False) as archive:
                meta = json.loads(archive["metadata"].tobytes().decode())
                cov = archive["covariance"]
                lift2 = archive["lift_second_moment"]
        except Exception as exc:  # zip, key or JSON errors all mean "not our model"
            raise ValueError(f"not a liftmag noise model ({exc.__class__.__name__})") from exc
        if not isinstance(meta, dict) or meta.get("format") != FORMAT_NAME:
            raise ValueError("not a liftmag noise model (format tag missing)")
        version = meta.get("format_version", 0)
        if isinstance(version, (int, float)) and version > FORMAT_VERSION:
            raise ValueError(
                f"noise model format version {meta['format_version']} is newer than this "
                f"liftmag understands ({FORMAT_VERSION}); update liftmag"
            )
        model = cls(
            covariance=_checked_array(cov, "covariance", np.complexfloating),
            lift_second_moment=_checked_array(lift2, "lift_second_moment", np.floating),
            frames=_positive(meta, "frames", float),
            sample_rate_hz=_positive(meta, "sample_rate_hz", float),
            frame_length=_positive(meta, "frame_length", int),
            hop=_positive(meta, "hop", int), n_channels=_positive(meta, "n_channels", int),
            description=str(meta.get("description", "")),
        )
        if model.hop > model.frame_length:
            raise ValueError(
                f"damaged noise model: hop {model.hop} exceeds frame_length {model.frame_length}"
            )
        silent = model.silent_channels()
        if silent:
            raise ValueError(
                "the noise model is silent on channel(s) "
                + ", ".join(str(c + 1) for c in silent)
                + " (learned from digital silence or a dead microphone); learn it again"
            )
        return model

    def silent_channels(self) -> tuple[int, ...]:
        """0-based channels with no noise power in any bin: digital silence, a dead mic."""
        power = np.einsum("fmm->m", np.abs(self.covariance))
        return tuple(int(c) for c in np.flatnonzero(power <= 0.0))


def _positive(meta: dict, key: str, kind: type) -> float | int:
    """A metadata number that must be finite and above zero, as ``kind``."""
    value = meta.get(key)
    ok = isinstance(value, (int, float)) and not isinstance(value, bool)
    if ok and kind is int:
        ok = float(value).is_integer()
    if not ok or not np.isfinite(value) or value <= 0:
        raise ValueError(
            f"damaged noise model: metadata {key} is {value!r}, not a positive number"
        )
    return kind(value)


def _checked_array(array: np.ndarray, name: str, kind: type) -> np.ndarray:
    if not np.issubdtype(array.dtype, kind) and not np.issubdtype(array.dtype, np.floating):
        raise ValueError(f"damaged noise model: {name} holds {array.dtype}, not numbers")
    if array.ndim != 3 or not np.isfinite(array).all():
        raise ValueError(f"damaged noise model: {name} is not a finite F x D x D array")
    return array


class MomentAccumulator:
    """Weighted running moments with exponential forgetting (or none, ``forgetting=1``).

    Keeps ``S1 = sum w_n a^(N-n) y y^H``, ``S2 = sum w_n a^(N-n) rho rho^T``, the weight sum
    ``W = sum w_n a^(N-n)`` and ``W2 = sum (w_n a^(N-n))^2``, so means are bias-free from the
    first frame and ``W^2 / W2`` is the effective number of frames (Kish's effective sample
    size) for the regulariser.
    """

    def __init__(self, n_bins: int, n_channels: int, with_lift: bool = True) -> None:
        d = lift_dimension(n_channels)
        # The covariance is kept as its real lift: rho is linear, so the weighted sum of
        # rho(y y^H) is rho of the weighted sum of y y^H, and it costs a plain weighted sum.
        self.lift_first = np.zeros((n_bins, d))
        self.lift_sum = np.zeros((n_bins, d, d)) if with_lift else None
        self.weight = np.zeros(n_bins)
        self.weight_sq = np.zeros(n_bins)
        self.version = 0  # bumped by every change, so derived values can be cached
        # A fixed prior (whole-take means) that never decays: (first, sum, weight) or None.
        self.prior: tuple[NDArray, NDArray | None, NDArray] | None = None

    def update(
        self,
        y: NDArray[np.complex128],
        weight: NDArray,
        forgetting: float,
        lifted: NDArray[np.float64] | None = None,
    ) -> None:
        """Add frames ``y`` (K, F, M) or one frame (F, M) with weights (K, F), (F,) or scalar.

        Equivalent to K sequential updates ``S <- forgetting * S + w_k x_k``, computed at once
        as ``forgetting^K S + sum_k forgetting^(K-1-k) w_k x_k``. ``lifted`` may pass
        ``lift_snapshots(y)`` when the caller has it already.
        """
        y = np.asarray(y)
        if y.ndim == 2:
            y = y[None]
        k_frames, n_bins = y.shape[:2]
        w = np.broadcast_to(np.asarray(weight, dtype=float), (k_frames, n_bins))
        decay = forgetting ** np.arange(k_frames - 1, -1, -1, dtype=float)
        wd = w * decay[:, None]
        keep = forgetting**k_frames
        r = lift_snapshots(y) if lifted is None else lifted
        # Entries first, (D, K, F): lift_snapshots stores them so, and the weighting and
        # the sum over frames then run on contiguous planes.
        weighted = np.moveaxis(r, -1, 0) * wd
        if keep != 1.0:  # no forgetting (whole-take sums): skip a pass over the sums
            self.lift_first *= keep
        self.lift_first += weighted.sum(axis=1).T
        if self.lift_sum is not None:
            if keep != 1.0:
                self.lift_sum *= keep
            # Per bin (D x K) @ (K x D): one batched product on contiguous copies, a little
            # faster than einsum or than the product on strided views.
            self.lift_sum += np.matmul(np.ascontiguousarray(weighted.transpose(2, 0, 1)),
                                       np.ascontiguousarray(r.transpose(1, 0, 2)))
        self.weight = keep * self.weight + wd.sum(axis=0)
        self.weight_sq = keep**2 * self.weight_sq + (wd**2).sum(axis=0)
        self.version += 1

    def seed(self, model: NoiseModel) -> None:
        """Start from a model, counting it as ``model.frames`` frames of evidence."""
        self.seed_moments(model.covariance, model.lift_second_moment, model.frames)

    def seed_moments(
        self, covariance: NDArray, lift_second_moment: NDArray | None, frames: NDArray | float
    ) -> None:
        """Start from mean moments, counting them as ``frames`` (per bin or one number)."""
        n = np.broadcast_to(np.asarray(frames, dtype=float), self.weight.shape)
        self.lift_first = rho(covariance) * n[:, None]
        if self.lift_sum is not None and lift_second_moment is not None:
            self.lift_sum = lift_second_moment * n[:, None, None]
        self.weight = n.copy()
        self.weight_sq = n.copy()
        self.version += 1

    def set_prior(
        self, covariance: NDArray, lift_second_moment: NDArray | None, frames: NDArray | float
    ) -> None:
        """Add fixed mean moments worth ``frames`` to every later mean (they never decay)."""
        n = np.broadcast_to(np.asarray(frames, dtype=float), self.weight.shape).copy()
        lift = None
        if self.lift_sum is not None and lift_second_moment is not None:
            lift = lift_second_moment * n[:, None, None]
        self.prior = (rho(covariance) * n[:, None], lift, n)
        self.version += 1

    def means(self) -> tuple[NDArray[np.complex128], NDArray[np.float64] | None]:
        return self.covariance(), self.lift_mean()

    def covariance(self) -> NDArray[np.complex128]:
        """The mean ``E[v v^H]`` (F, M, M), the prior included."""
        first = self.lift_first if self.prior is None else self.lift_first + self.prior[0]
        return unrho(first / np.maximum(self.total_weight(), 1e-300)[:, None])

    def lift_mean(self) -> NDArray[np.float64] | None:
        """The mean ``E[rho rho^T]`` (F, D, D), the prior included; ``None`` if not kept.

        Apart from :meth:`covariance` because it is ``M^2`` times larger: the engine needs it
        only when it re-analyses the lifted noise structure.
        """
        total = self.lift_sum
        if total is None:
            return None
        if self.prior is not None and self.prior[1] is not None:
            total = total + self.prior[1]
        return total / np.maximum(self.total_weight(), 1e-300)[:, None, None]

    def total_weight(self) -> NDArray[np.float64]:
        """Weight behind :meth:`means`, the prior included."""
        return self.weight if self.prior is None else self.weight + self.prior[2]

    def effective_frames(self) -> NDArray[np.float64]:
        if self.prior is None:
            return self.weight**2 / np.maximum(self.weight_sq, 1e-300)
        w = self.weight + self.prior[2]
        return w**2 / np.maximum(self.weight_sq + self.prior[2], 1e-300)


def lift_whitening(whitener: NDArray[np.complex128]) -> NDArray[np.float64]:
    """Real matrix ``B`` with ``rho(A Y A^H) = B rho(Y)`` for per-bin matrices ``A`` (F, M, M).

    ``B = T (conj(A) kron A) T^H`` with ``T`` from :func:`liftmag.lift.lift_transform`.
    """
    m = whitener.shape[-1]
    t = lift_transform(m)
    kron = (np.conj(whitener)[:, :, None, :, None] * whitener[:, None, :, None, :]).reshape(
        whitener.shape[0], m * m, m * m
    )
    return np.real(t @ kron @ t.conj().T)


def whitened_lift_covariance(
    covariance: NDArray[np.complex128],
    lift_second_moment: NDArray[np.float64],
    whitener: NDArray[np.complex128],
) -> NDArray[np.float64]:
    """Covariance of the lifted *whitened* noise, ``B (E[rho rho^T] - mu mu^T) B^T``."""
    from liftmag.lift import rho

    mu = rho(covariance)
    c = lift_second_moment - mu[:, :, None] * mu[:, None, :]
    b = lift_whitening(whitener)
    out = b @ c @ np.swapaxes(b, -1, -2)
    return (out + np.swapaxes(out, -1, -2)) / 2


def spiked_lift_factors(
    whitened_cov: NDArray[np.float64],
    effective_frames: NDArray,
    threshold: float = 1.5,
    mostly_structured: bool = False,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.int_]]:
    """Eigen-factors of :func:`spiked_lift_covariance`: ``regularised = U diag(values) U^T``.

    Returns ``(values (F, D), U (F, D, D), n_spikes (F,))``; bins without structure get
    ``values = 1`` and ``U = I``. The engine uses the factors directly (the inverse square
    root is ``diag(values^-1/2) U^T``), so no further decomposition is needed.
    ``mostly_structured`` only changes the cost: when most bins are expected to have
    structure, every bin is decomposed at once instead of screening eigenvalues first.
    """
    d = whitened_cov.shape[-1]
    n = np.maximum(np.asarray(effective_frames, dtype=float), 1.0)
    q = d / n
    upper = threshold * (1 + np.sqrt(q)) ** 2
    lower = np.where(q < 1, (1 - np.sqrt(np.minimum(q, 1))) ** 2 / threshold, 0.0)
    if mostly_structured:
        lam_all, u_all = np.linalg.eigh(whitened_cov)
    else:  # eigenvalues alone decide which bins have structure; eigenvectors only for those
        lam_all, u_all = np.linalg.eigvalsh(whitened_cov), None
    spiky = np.flatnonzero(
        np.any((lam_all > upper[:, None]) | (lam_all < lower[:, None]), axis=-1)
    )
    values = np.ones(whitened_cov.shape[:-1])
    vectors = np.broadcast_to(np.eye(d), whitened_cov.shape).copy()
    n_spikes = np.zeros(whitened_cov.shape[0], dtype=int)
    if spiky.size:
        if u_all is None:
            lam, u = np.linalg.eigh(whitened_cov[spiky])
        else:
            lam, u = lam_all[spiky], u_all[spiky]
        keep = (lam > upper[spiky, None]) | (lam < lower[spiky, None])
        # Even a steady tone rides on some sensor noise: never trust a direction as noise-free.
        values[spiky] = np.where(keep, np.maximum(lam, MIN_LIFT_EIGENVALUE), 1.0)
        vectors[spiky] = u
        n_spikes[spiky] = keep.sum(axis=-1)
    return values, vectors, n_spikes


def spiked_lift_covariance(
    whitened_cov: NDArray[np.float64], effective_frames: NDArray, threshold: float = 1.5
) -> tuple[NDArray[np.float64], NDArray[np.int_]]:
    """Keep the eigen-directions outside the Gaussian bulk; set the rest to the identity.

    Parameters
    ----------
    whitened_cov : (F, D, D)   sample covariance of the whitened noise lift
    effective_frames : (F,)    effective number of frames behind it
    threshold : float          an eigenvalue counts as structure when it exceeds
        ``threshold * (1 + sqrt(q))^2`` or is below ``(1 - sqrt(q))^2 / threshold``, with
        ``q = D / N`` (Marchenko-Pastur edges for an identity population covariance).

    Returns
    -------
    regularised : (F, D, D)  ``I + sum_k (lambda_k - 1) u_k u_k^T`` over the kept directions,
                             with ``lambda_k`` floored at ``MIN_LIFT_EIGENVALUE``
    n_spikes : (F,)          number of kept directions per bin (0 = Gaussian-looking)
    """
    values, vectors, n_spikes = spiked_lift_factors(whitened_cov, effective_frames, threshold)
    regularised = np.einsum("fik,fk,fjk->fij", vectors, values, vectors)
    return (regularised + np.swapaxes(regularised, -1, -2)) / 2, n_spikes


def shrunk_lift_covariance(
    whitened_cov: NDArray[np.float64], effective_frames: NDArray
) -> NDArray[np.float64]:
    """Linear shrinkage towards the Gaussian model: ``(1 - beta) C + beta I``, ``beta = D/(D+N)``.

    A plain, documented alternative to :func:`spiked_lift_covariance` (used by the forced
    ``lifted-mv`` estimator so the two regularisers can be compared).
    """
    d = whitened_cov.shape[-1]
    beta = d / (d + np.maximum(np.asarray(effective_frames, dtype=float), 1.0))
    return (1 - beta)[:, None, None] * whitened_cov + beta[:, None, None] * np.eye(d)
