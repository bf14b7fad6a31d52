"""Shared test set-up: the tests/ folder is importable (rooms, browser and LV2 host helpers),
and the helpers several test files use are fixtures here."""

import struct
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


def _pack_bext(
    *,
    description: bytes,
    originator: bytes,
    reference: bytes,
    date: bytes,
    time: bytes,
    time_reference_samples: int,
    coding_history: bytes,
    version: int = 2,
    umid: bytes = b"\0" * 64,
    loudness: tuple[int, int, int, int, int] = (0, 0, 0, 0, 0),
) -> bytes:
    # EBU Tech 3285 v2 BROADCAST_EXT, field by field: Description 256, Originator 32,
    # OriginatorReference 32, OriginationDate 10 (yyyy-mm-dd), OriginationTime 8 (hh:mm:ss),
    # TimeReference low and high uint32, Version uint16, UMID 64, five loudness int16 (value
    # x 100, section 2.4; zero in version 1), 180 reserved bytes, then CodingHistory.
    return b"".join([
        description.ljust(256, b"\0"),
        originator.ljust(32, b"\0"),
        reference.ljust(32, b"\0"),
        date,
        time,
        struct.pack("<II", time_reference_samples & 0xFFFFFFFF, time_reference_samples >> 32),
        struct.pack("<H", version),
        umid,
        struct.pack("<5h", *loudness),
        b"\0" * 180,
        coding_history,
    ])


def _splice_before_data(wav: bytes, chunks: list[tuple[bytes, bytes]]) -> bytes:
    # Insert chunks before 'data' by hand, independently of liftmag: RIFF chunks are id, size
    # (uint32 little-endian), payload padded to an even length, and the RIFF size is the file
    # size minus 8 (Microsoft/IBM RIFF specification, 1991).
    data_at = wav.index(b"data", 12)
    extra = b"".join(
        cid + struct.pack("<I", len(p)) + p + (b"\0" if len(p) % 2 else b"") for cid, p in chunks
    )
    out = bytearray(wav[:data_at] + extra + wav[data_at:])
    struct.pack_into("<I", out, 4, len(out) - 8)
    return bytes(out)


@pytest.fixture(scope="session")
def pack_bext() -> Callable[..., bytes]:
    """``pack_bext(description=..., ..., coding_history=...)``: a bext payload packed by hand."""
    return _pack_bext


@pytest.fixture(scope="session")
def splice_before_data() -> Callable[[bytes, list[tuple[bytes, bytes]]], bytes]:
    """``splice_before_data(wav_bytes, [(id, payload), ...])``: chunks put before 'data'."""
    return _splice_before_data
