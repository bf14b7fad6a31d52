"""Helpers for the plugin tests: build the bundle once, drive lilv's tools and our test host.

Imported by ``tests/test_plugin*.py`` as ``lv2host.support`` (pytest puts ``tests/`` on
``sys.path``).
"""

from __future__ import annotations

import atexit
import os
import re
import shutil
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

HOST_SOURCE = Path(__file__).resolve().parent / "lv2host.c"
LV2_TOOLS = ("lv2ls", "lv2info", "lv2apply", "lv2_validate", "sord_validate")
URI_2CH = "urn:liftmag:dialogue-2ch"
URI_4CH = "urn:liftmag:dialogue-4ch"
# LV2 state extension: a value stored with LV2_STATE_IS_POD | LV2_STATE_IS_PORTABLE.
STATE_FLAGS_POD_PORTABLE = 1 | 2
ATOM_CHUNK_URI = "http://lv2plug.in/ns/ext/atom#Chunk"
# Float32 output of a float64 engine: a few units in the last place of the signal's peak.
F32_REL = 8 * float(np.finfo(np.float32).eps)


def missing_tools() -> list[str]:
    """LV2 tools (lilv-utils, lv2-dev, sordi) and compilers the plugin tests need."""
    missing = [t for t in LV2_TOOLS if shutil.which(t) is None]
    if shutil.which("gcc") is None:
        missing.append("gcc")
    # Building the shim also needs Python's headers and shared library (Debian: python3-dev).
    from liftmag_lv2 import build_shim

    return missing + build_shim.missing_build_tools()


def skip_reason() -> str:
    missing = missing_tools()
    return ("LV2 toolchain missing: " + ", ".join(missing)
            + " (install with `make system-deps`)") if missing else ""


def build_module() -> Any:
    """The bundle builder (``liftmag_lv2.bundle``)."""
    from liftmag_lv2 import bundle

    return bundle


def bridge_module() -> Any:
    """The plugin's Python bridge (``liftmag_lv2.bridge``; its pure-Python parts need no cffi)."""
    from liftmag_lv2 import bridge

    return bridge


def ttl_module() -> Any:
    from liftmag_lv2 import ttl

    return ttl


_scratch = Path(tempfile.mkdtemp(prefix="liftmag-plugin-tests-"))
atexit.register(shutil.rmtree, _scratch, ignore_errors=True)
_bundles: dict[str, Path] = {}


def bundle(python: str | None = None) -> Path:
    """A bundle built from the working tree, once per test session and interpreter path.

    It lives in a ``<scratch>/<name>/liftmag.lv2`` folder; that parent folder works as an
    LV2_PATH entry by itself.
    """
    key = python or ""
    if key not in _bundles:
        folder = _scratch / f"lv2-{len(_bundles)}"
        _bundles[key] = build_module().build_bundle(folder / "liftmag.lv2", python)
    return _bundles[key]


def block_frames(bundle_dir: Path) -> int:
    return int(build_module().read_build_info(bundle_dir)["block_frames"])


def lv2_env(lv2_path: Path, state_home: Path, **extra: str) -> dict[str, str]:
    """The environment for an LV2 tool: our bundle only, logs in a test folder."""
    env = dict(os.environ)
    env.pop(bridge_module().TEST_FAULT_ENV, None)
    env.update(LV2_PATH=str(lv2_path), XDG_STATE_HOME=str(state_home), **extra)
    return env


def plugin_log(state_home: Path) -> str:
    path = state_home / "liftmag" / "lv2-plugin.log"
    return path.read_text() if path.exists() else ""


def port_indices(uri: str, env: dict[str, str]) -> dict[str, int]:
    """Symbol -> index as lilv reads them from our TTL (lv2info output)."""
    text = subprocess.run(["lv2info", uri], env=env, capture_output=True, text=True,
                          check=True).stdout
    indices = {}
    ports = re.findall(r"Port (\d+):(.*?)(?=\n\s*Port \d+:|\Z)", text, flags=re.S)
    for index, body in ports:
        sym = re.search(r"Symbol:\s*(\S+)", body)
        if sym:
            indices[sym.group(1)] = int(index)
    return indices


def lv2apply(uri: str, x: np.ndarray, fs: int, env: dict[str, str],
             controls: dict[str, float] | None = None, workdir: Path | None = None,
             env_command: list[str] | None = None) -> np.ndarray:
    """Run lilv's ``lv2apply`` on ``x`` (channels, n): returns (outputs, n) float32.

    ``env_command`` (e.g. ``["env", "-i", "HOME=..."]``) prefixes the command line. The
    files are 32-bit float WAV, which lv2apply keeps for its output, so nothing but the
    plugin changes the samples.
    """
    import soundfile as sf

    workdir = workdir or Path(tempfile.mkdtemp(dir=_scratch))
    src, dst = workdir / "in.wav", workdir / "out.wav"
    sf.write(src, np.asarray(x, dtype=np.float32).T, fs, subtype="FLOAT")
    cmd = [*(env_command or []), shutil.which("lv2apply") or "lv2apply", "-i", str(src),
           "-o", str(dst)]
    for symbol, value in (controls or {}).items():
        cmd += ["-c", symbol, repr(float(value))]
    cmd.append(uri)
    proc = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=600)
    if proc.returncode != 0:
        raise AssertionError(f"lv2apply failed ({proc.returncode}): {proc.stderr}")
    y, fs_out = sf.read(dst, dtype="float32", always_2d=True)
    assert fs_out == fs
    return y.T


def compile_host(out_dir: Path) -> Path:
    exe = out_dir / "lv2host"
    if not exe.exists():
        subprocess.run(["gcc", "-O1", "-Wall", "-Wextra", "-Werror", "-pthread", "-o",
                        str(exe), str(HOST_SOURCE), "-ldl"], check=True)
    return exe


@dataclass
class Job:
    """One instance run by the test host."""

    uri: str
    rate: int
    x: np.ndarray  # (channels, n) input, float32 after writing
    controls: dict[str, float]
    blocks: str = "r1"  # rN: random sizes 1..8192 from seed N; fN: fixed N
    restore: Path | None = None
    save: Path | None = None


@dataclass
class HostResult:
    outputs: list[list[np.ndarray]]  # [round][job] -> (outputs, n) float32
    latency: dict[tuple[int, int], int]  # (job, round) -> reported latency
    restore_status: dict[tuple[int, int], int]
    save_status: dict[tuple[int, int], int]
    stderr: str
    timing_ms: dict[tuple[int, int], dict[str, float]]  # instantiate, run, worst_run


def run_host(host: Path, bundle_dir: Path, jobs: list[Job], workdir: Path, env: dict[str, str],
             threads: int = 1, rounds: int = 1, tag: str = "run") -> HostResult:
    """Run ``jobs`` in our test host; port indices come from lilv (lv2info)."""
    workdir.mkdir(parents=True, exist_ok=True)
    lines = []
    n_out: list[int] = []
    index_cache: dict[str, dict[str, int]] = {}
    for k, job in enumerate(jobs):
        ports = index_cache.setdefault(job.uri, port_indices(job.uri, env))
        nc = job.x.shape[0]
        ins = ",".join(str(ports[f"in_{c + 1}"]) for c in range(nc))
        outs = ",".join(str(ports[f"out_{c + 1}"]) for c in range(nc))
        n_out.append(nc)
        ctl = ",".join(f"{ports[s]}={float(v)!r}" for s, v in job.controls.items()) or "-"
        src = workdir / f"{tag}-in{k}.f32"
        np.ascontiguousarray(job.x, dtype="<f4").tofile(src)
        lines.append(" ".join([
            job.uri, str(job.rate), ins, outs, str(ports["latency"]), ctl, str(src),
            str(workdir / f"{tag}-out{k}.f32"), job.blocks,
            str(job.restore) if job.restore else "-", str(job.save) if job.save else "-",
        ]))
    jobfile = workdir / f"{tag}-jobs.txt"
    jobfile.write_text("\n".join(lines) + "\n")
    so = bundle_dir / build_module().BINARY
    proc = subprocess.run([str(host), str(so), str(bundle_dir), str(jobfile), str(threads),
                           str(rounds)], env=env, capture_output=True, text=True, timeout=900)
    if proc.returncode != 0:
        raise AssertionError(f"lv2host failed ({proc.returncode}):\n{proc.stderr[-4000:]}")
    latency, restore, save, timing = {}, {}, {}, {}
    pattern = (r"job (\d+) round (\d+) latency (-?\d+) restore (-?\d+) save (-?\d+) "
               r"instantiate_ms (\S+) run_ms (\S+) worst_run_ms (\S+)")
    for m in re.finditer(pattern, proc.stdout):
        key = (int(m.group(1)), int(m.group(2)))
        latency[key], restore[key], save[key] = (int(m.group(i)) for i in (3, 4, 5))
        timing[key] = {name: float(m.group(i))
                       for name, i in (("instantiate", 6), ("run", 7), ("worst_run", 8))}
    if len(latency) != len(jobs) * rounds:
        raise AssertionError(f"lv2host reported {len(latency)} of {len(jobs) * rounds} jobs")
    outputs = []
    for r in range(rounds):
        suffix = "" if r == 0 else f".r{r}"
        outputs.append([
            np.fromfile(workdir / f"{tag}-out{k}.f32{suffix}", dtype="<f4").reshape(n_out[k], -1)
            for k in range(len(jobs))
        ])
    return HostResult(outputs, latency, restore, save, proc.stderr, timing)


def read_state(path: Path) -> list[tuple[str, str, int, bytes]]:
    """Properties of a state file written by our host: (key, type, flags, value)."""
    data = path.read_bytes()
    props, pos = [], 0
    while pos < len(data):
        end = data.index(b"\n", pos)
        key, type_, flags, size = data[pos:end].decode().split()
        start = end + 1
        props.append((key, type_, int(flags), data[start:start + int(size)]))
        pos = start + int(size)
    return props


def assert_f32_close(actual: np.ndarray, expected: np.ndarray, what: str) -> None:
    """Equal within float32 rounding of the signal's peak."""
    assert actual.shape == expected.shape, (what, actual.shape, expected.shape)
    peak = max(float(np.max(np.abs(expected))), 1e-6)
    err = float(np.max(np.abs(actual.astype(np.float64) - expected)))
    assert err <= F32_REL * peak, f"{what}: max error {err:.3g} for peak {peak:.3g}"


# ------------------------------------------------------------------ other LV2 hosts

LIFTMAG_CLI = Path(sys.executable).parent / "liftmag"


def reported_latency(bundle_dir: Path, uri: str, rate: int, env: dict[str, str],
                     workdir: Path) -> int:
    """The latency the plugin reports on its latency port (read by our test host).

    Hosts that do not compensate it (ecasound, GStreamer's bridge) leave the output this
    many frames late; it is read at run time, never assumed, because it follows the engine.
    """
    channels = 4 if uri == URI_4CH else 2
    host = compile_host(_scratch)
    job = Job(uri, rate, np.zeros((channels, block_frames(bundle_dir)), np.float32), {},
              blocks="f256")
    result = run_host(host, bundle_dir, [job], workdir, env, tag="latency")
    return result.latency[(0, 0)]


def cli_process(x: np.ndarray, fs: int, workdir: Path, *options: str) -> np.ndarray:
    """``liftmag process --one-pass`` on ``x`` (channels, n) as a 32-bit float WAV.

    ``--one-pass``: a plugin cannot read the take before it plays, so the CLI output it must
    equal is the one without the whole-take first pass (same look-ahead, same settings).
    """
    import soundfile as sf

    src, dst = workdir / "cli-in.wav", workdir / "cli-out.wav"
    sf.write(src, np.asarray(x, dtype=np.float32).T, fs, subtype="FLOAT")
    proc = subprocess.run([str(LIFTMAG_CLI), "process", str(src), "-o", str(dst), "--one-pass",
                           *options],
                          capture_output=True, text=True, timeout=600)
    if proc.returncode != 0:
        raise AssertionError(f"liftmag process failed ({proc.returncode}): {proc.stderr}")
    y, fs_out = sf.read(dst, dtype="float64", always_2d=True)
    assert fs_out == fs
    return y.T


def write_float_wav(path: Path, x: np.ndarray, fs: int) -> None:
    import soundfile as sf

    sf.write(path, np.asarray(x, dtype=np.float32).T, fs, subtype="FLOAT")


def read_wav(path: Path, fs: int) -> np.ndarray:
    """A host's output as (channels, n) float32, after checking its rate and subtype."""
    import soundfile as sf

    info = sf.info(str(path))
    # A host that wrote integer samples would add its own rounding to the comparison.
    assert info.subtype == "FLOAT", (path, info.subtype)
    y, fs_out = sf.read(path, dtype="float32", always_2d=True)
    assert fs_out == fs
    return y.T


def run_ecasound(uri: str, src: Path, dst: Path, fs: int, channels: int,
                 env: dict[str, str]) -> str:
    """``ecasound -i SRC -o DST -elv2:URI`` with no control values; returns its output.

    ``dst`` must not exist: ecasound opens an existing WAV file in its own format.
    """
    assert not dst.exists()
    proc = subprocess.run(
        ["ecasound", "-q", "-i", str(src), f"-f:f32_le,{channels},{fs}", "-o", str(dst),
         f"-elv2:{uri}"],
        env=env, capture_output=True, text=True, timeout=600, stdin=subprocess.DEVNULL)
    if proc.returncode != 0 or not dst.exists():
        raise AssertionError(f"ecasound failed ({proc.returncode}): {proc.stdout}{proc.stderr}")
    return proc.stdout + proc.stderr


def gst_env(lv2_path: Path, state_home: Path, registry: Path) -> dict[str, str]:
    """An LV2 environment plus a private GStreamer registry, so the lv2 bridge scans our
    bundle afresh and nothing is cached outside the test's folder."""
    env = lv2_env(lv2_path, state_home, GST_REGISTRY=str(registry))
    env.pop("GST_PLUGIN_PATH", None)
    return env


def gst_element(uri: str, env: dict[str, str]) -> str:
    """The element name GStreamer's lv2 bridge gives a plugin, from ``gst-inspect-1.0 lv2``
    (it lists ``NAME: doap:name`` for each plugin it could wrap)."""
    ttl = ttl_module()
    channels = 4 if uri == URI_4CH else 2
    title = ttl.plugin_title(channels)
    out = subprocess.run(["gst-inspect-1.0", "lv2"], env=env, capture_output=True, text=True,
                         timeout=300).stdout
    found = re.findall(rf"^\s*(\S+):\s*{re.escape(title)}\s*$", out, flags=re.M)
    if not found:
        raise AssertionError(f"GStreamer's lv2 bridge did not wrap {uri}:\n{out}")
    return found[0]


def run_gstreamer(element: str, src: Path, dst: Path, env: dict[str, str]) -> str:
    proc = subprocess.run(
        ["gst-launch-1.0", "-q", "filesrc", f"location={src}", "!", "wavparse", "!",
         "audioconvert", "!", element, "!", "wavenc", "!", "filesink", f"location={dst}"],
        env=env, capture_output=True, text=True, timeout=600, stdin=subprocess.DEVNULL)
    if proc.returncode != 0 or not dst.exists():
        raise AssertionError(f"gst-launch-1.0 failed ({proc.returncode}): "
                             f"{proc.stdout}{proc.stderr}")
    return proc.stdout + proc.stderr


def run_lv2file(uri: str, src: Path, dst: Path, env: dict[str, str]) -> str:
    proc = subprocess.run(["lv2file", "-i", str(src), "-o", str(dst), uri], env=env,
                          capture_output=True, text=True, timeout=600,
                          stdin=subprocess.DEVNULL)
    if proc.returncode != 0 or not dst.exists():
        raise AssertionError(f"lv2file failed ({proc.returncode}): {proc.stdout}{proc.stderr}")
    return proc.stdout + proc.stderr
