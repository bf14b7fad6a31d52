"""Assemble the LV2 bundle ``liftmag.lv2`` (``make plugin`` and ``liftmag plugin install``).

The bundle holds the shared object (the cffi shim), ``manifest.ttl``, one TTL per plugin,
``ports.json`` (the control-port table the bridge reads), the bridge module and
``build-info.json`` (what was baked in, and a digest of the sources, so ``liftmag plugin
install`` knows when to rebuild).

Everything it reads ships in the package, so it works from an installed wheel as from a
source checkout. In a checkout the bundle goes to ``build/liftmag.lv2`` (work files to
``build/out/plugin/``); otherwise to ``liftmag.lv2`` in the user's cache folder
(``$XDG_CACHE_HOME/liftmag``, else ``~/.cache/liftmag``).

Run it with the interpreter of the environment the plugin should use (the Makefile uses
``.venv/bin/python``): that interpreter's path is baked into the shared object.
"""

from __future__ import annotations

import argparse
import hashlib
import importlib.util
import json
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from liftmag.audio_io import StagedOutputs
from liftmag_lv2 import build_shim, ttl

HERE = Path(__file__).resolve().parent  # the liftmag_lv2 package folder
CORE = Path(importlib.util.find_spec("liftmag").origin).parent  # the liftmag package folder
BINARY = "liftmag_lv2.so"
BUILD_INFO = "build-info.json"
BUNDLE_NAME = "liftmag.lv2"

# Everything whose change means the bundle must be rebuilt (relative to the package).
SOURCES = (
    HERE / "shim.c",
    HERE / "build_shim.py",
    HERE / "ttl.py",
    HERE / "bridge.py",
    HERE / "bundle.py",
    HERE / "templates" / "manifest.ttl.in",
    HERE / "templates" / "plugin.ttl.in",
    CORE / "settings.py",
)


def source_checkout() -> Path | None:
    """The source tree this package runs from (``plugin/liftmag_lv2`` beside ``build/``), if any."""
    repo = HERE.parents[1]
    marks = (repo / "pyproject.toml", repo / "build" / "system-deps.sh")
    return repo if HERE.parent.name == "plugin" and all(p.is_file() for p in marks) else None


def cache_dir() -> Path:
    """The user's cache folder for liftmag (XDG base directories: XDG_CACHE_HOME)."""
    cache = os.environ.get("XDG_CACHE_HOME", "")
    return (Path(cache) if cache.startswith("/") else Path.home() / ".cache") / "liftmag"


def default_out() -> Path:
    """Where the bundle is built: ``build/liftmag.lv2`` in a checkout, else the cache."""
    repo = source_checkout()
    return (repo / "build" if repo is not None else cache_dir()) / BUNDLE_NAME


def _work_parent(out: Path) -> Path:
    repo = source_checkout()
    if repo is not None and out.parent == repo / "build":
        return repo / "build" / "out" / "plugin"
    return out.parent


def default_python() -> str:
    """The interpreter to bake in: the running virtual environment's ``bin/python``."""
    if sys.prefix != sys.base_prefix:
        candidate = Path(sys.prefix) / "bin" / "python"
        if os.access(candidate, os.X_OK):
            return str(candidate)
    return sys.executable


def source_digest(venv_python: str) -> str:
    """Digest of the plugin sources and the interpreter path baked in."""
    h = hashlib.sha256(venv_python.encode())
    for path in SOURCES:
        h.update(path.name.encode() + b"\0" + path.read_bytes() + b"\0")
    return h.hexdigest()


def read_build_info(bundle: Path) -> dict[str, Any] | None:
    """The bundle's build-info.json, or None when missing or unreadable."""
    try:
        return json.loads((bundle / BUILD_INFO).read_text())
    except (OSError, ValueError):
        return None


def is_current(bundle: Path, venv_python: str | None = None) -> bool:
    """Whether ``bundle`` exists complete and was built from the present sources."""
    info = read_build_info(bundle)
    venv_python = venv_python or default_python()
    return bool(info) and (bundle / BINARY).is_file() and info.get(
        "source_digest") == source_digest(venv_python)


def build_bundle(out: Path | None = None, venv_python: str | None = None,
                 verbose: bool = False) -> Path:
    """Build the bundle into ``out`` (replaced whole, so a half-built bundle never shows)."""
    venv_python = venv_python or default_python()
    from liftmag import __version__

    out = (out or default_out()).resolve()
    out.parent.mkdir(parents=True, exist_ok=True)
    work_parent = _work_parent(out)
    work_parent.mkdir(parents=True, exist_ok=True)
    # Staged under the temporary names the batch sweeper knows; replaced whole on commit.
    with StagedOutputs() as staging:
        stage = staging.stage_dir(out)
        ports = ttl.control_ports()
        started = time.perf_counter()
        with tempfile.TemporaryDirectory(prefix=".liftmag-lv2-work.", dir=work_parent) as work:
            build_shim.compile_shim(
                stage / BINARY, Path(work), venv_python=venv_python,
                plugins=[(uri, n) for uri, n, _ in ttl.PLUGINS],
                ports=ports,
                state_key=ttl.STATE_KEY_URI, verbose=verbose,
            )
        (stage / "manifest.ttl").write_text(ttl.manifest_ttl(BINARY))
        for uri, n_channels, stem in ttl.PLUGINS:
            (stage / f"{stem}.ttl").write_text(ttl.plugin_ttl(uri, n_channels, stem, ports))
        (stage / "ports.json").write_text(ttl.ports_json(build_shim.BLOCK_FRAMES))
        shutil.copy2(HERE / "bridge.py", stage / f"{build_shim.BRIDGE_MODULE}.py")
        info = {
            "liftmag_version": __version__,
            "venv_python": venv_python,
            "libpython_dir": build_shim.libpython_dir(),
            "python_version": "{}.{}".format(*sys.version_info[:2]),
            "block_frames": build_shim.BLOCK_FRAMES,
            "plugins": [{"uri": uri, "channels": n, "ttl": f"{stem}.ttl"}
                        for uri, n, stem in ttl.PLUGINS],
            "source_digest": source_digest(venv_python),
            "built_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "compile_seconds": round(time.perf_counter() - started, 2),
        }
        (stage / BUILD_INFO).write_text(json.dumps(info, indent=1) + "\n")
        os.chmod(stage, 0o755)
    return out


def main(argv: list[str] | None = None) -> int:
    """``python -m liftmag_lv2.bundle`` (``build/build_bundle.py`` calls this)."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--out", type=Path, default=None,
                        help=f"bundle directory to write (default {default_out()})")
    parser.add_argument("--python", default=None,
                        help="interpreter path to bake in (default: the running virtual "
                             "environment's bin/python; it must share this interpreter's "
                             "libpython)")
    parser.add_argument("--verbose", action="store_true", help="show the compiler commands")
    args = parser.parse_args(argv)
    out = build_bundle(args.out, args.python, verbose=args.verbose)
    print(f"built {out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
