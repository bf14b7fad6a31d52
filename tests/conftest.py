"""Shared test set-up: the tests/ folder is importable (rooms, browser and LV2 host helpers),
and the helpers several test files use are fixtures here."""

import sys
from collections.abc import Callable
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

import numpy as np
import pytest


@pytest.fixture(scope="session")
def bundle() -> Path:
    """The LV2 bundle, built once for all plugin tests (they skip without the LV2 tools)."""
    from lv2host import support

    return support.bundle()


def _crandn(rng: np.random.Generator, *shape: int) -> np.ndarray:
    """Circular complex standard normal samples, E|z|^2 = 1."""
    return (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)) / np.sqrt(2)


def _random_covariance(m: int, rng: np.random.Generator, loading: float) -> np.ndarray:
    """A random Hermitian positive-definite m x m matrix, ``loading`` times I added."""
    a = rng.standard_normal((m, m)) + 1j * rng.standard_normal((m, m))
    return a @ a.conj().T / m + loading * np.eye(m)


# Session scope: hypothesis' @given tests take them too (a function-scoped fixture is not
# reset between its examples, so hypothesis refuses those).
@pytest.fixture(scope="session")
def crandn() -> Callable[..., np.ndarray]:
    """``crandn(rng, *shape)``: circular complex standard normal samples, E|z|^2 = 1."""
    return _crandn


@pytest.fixture(scope="session")
def random_covariance() -> Callable[[int, np.random.Generator, float], np.ndarray]:
    """``random_covariance(m, rng, loading)``: random Hermitian positive-definite matrix."""
    return _random_covariance


@pytest.fixture()
def run_cli(capsys: pytest.CaptureFixture[str]) -> Callable[..., tuple[int, str, str]]:
    """``run_cli(*args)``: the ``liftmag`` entry point in this process -> (status, out, err)."""
    from liftmag.cli import main

    def run(*args: object) -> tuple[int, str, str]:
        status = main([str(a) for a in args])
        captured = capsys.readouterr()
        return status, captured.out, captured.err

    return run


@pytest.fixture(scope="session")
def partials() -> Callable[[Path], list[Path]]:
    """``partials(folder)``: hidden temporary files (``.NAME.partial-*``) left under ``folder``."""

    def find(folder: Path) -> list[Path]:
        return [p for p in folder.rglob("*") if ".partial-" in p.name]

    return find
