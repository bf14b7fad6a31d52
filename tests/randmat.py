"""Test helper: random complex data for the estimator and lift tests (one copy for all files)."""

from __future__ import annotations

import numpy as np


def crandn(rng: np.random.Generator, *shape: int) -> np.ndarray:
    """Circular complex standard normal samples, E|z|^2 = 1."""
    return (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)) / np.sqrt(2)


def random_covariance(m: int, rng: np.random.Generator, loading: float) -> np.ndarray:
    """A random Hermitian positive-definite m x m matrix, ``loading`` times I added."""
    a = rng.standard_normal((m, m)) + 1j * rng.standard_normal((m, m))
    return a @ a.conj().T / m + loading * np.eye(m)
