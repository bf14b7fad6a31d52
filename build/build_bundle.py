"""Assemble the LV2 bundle ``build/liftmag.lv2/`` (``make plugin`` runs this).

The bundle holds the shared object (the cffi shim), ``manifest.ttl``, one TTL per plugin,
``ports.json`` (the control-port table the bridge reads), the bridge module and
``build-info.json`` (what was baked in, and a digest of the sources, so ``liftmag plugin
install`` knows when to rebuild). Work files go to ``build/out/plugin/``.

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

REPO = Path(__file__).resolve().parent.parent
DEFAULT_OUT = REPO / "build" / "liftmag.lv2"
WORK_DIR = REPO / "build" / "out" / "plugin"
BINARY = "liftmag_lv2.so"
BUILD_INFO = "build-info.json"

# Everything whose change means the bundle must be rebuilt.
SOURCES = (
    "plugin/shim.c",
    "plugin/build_shim.py",
    "plugin/ttl.py",
    "plugin/liftmag_lv2_bridge.py",
    "plugin/templates/manifest.ttl.in",
    "plugin/templates/plugin.ttl.in",
    "dsp/liftmag/settings.py",
    "build/build_bundle.py",
)


def plugin_module(name: str) -> Any:
    """Load ``plugin/<name>.py`` (plugin/ holds build inputs, not an installed package)."""
    full = f"liftmag_plugin_{name}"
    if full in sys.modules:
        return sys.modules[full]
    spec = importlib.util.spec_from_file_location(full, REPO / "plugin" / f"{name}.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[full] = module  # dataclasses look their module up while the class is made
    try:
        spec.loader.exec_module(module)
    except BaseException:
        del sys.modules[full]
        raise
    return module


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
    for rel in SOURCES:
        h.update(rel.encode() + b"\0" + (REPO / rel).read_bytes() + b"\0")
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


def build_bundle(out: Path = DEFAULT_OUT, venv_python: str | None = None,
                 verbose: bool = False) -> Path:
    """Build the bundle into ``out`` (replaced whole, so a half-built bundle never shows)."""
    venv_python = venv_python or default_python()
    ttl = plugin_module("ttl")
    build_shim = plugin_module("build_shim")
    from liftmag import __version__

    out = out.resolve()
    out.parent.mkdir(parents=True, exist_ok=True)
    WORK_DIR.mkdir(parents=True, exist_ok=True)
    stage = Path(tempfile.mkdtemp(prefix=f".{out.name}.", dir=out.parent))
    try:
        ports = ttl.control_ports()
        started = time.perf_counter()
        with tempfile.TemporaryDirectory(dir=WORK_DIR) as work:
            build_shim.compile_shim(
                stage / BINARY, Path(work), venv_python=venv_python,
                plugins=[(uri, n) for uri, n, _ in ttl.PLUGINS], n_controls=len(ports),
                state_key=ttl.STATE_KEY_URI, verbose=verbose,
            )
        (stage / "manifest.ttl").write_text(ttl.manifest_ttl(BINARY))
        for uri, n_channels, stem in ttl.PLUGINS:
            (stage / f"{stem}.ttl").write_text(ttl.plugin_ttl(uri, n_channels, stem, ports))
        (stage / "ports.json").write_text(ttl.ports_json(build_shim.BLOCK_FRAMES))
        shutil.copy2(REPO / "plugin" / f"{build_shim.BRIDGE_MODULE}.py", stage)
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
        old = None
        if out.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{out.name}.old.", dir=out.parent))
            out.replace(old / out.name)
        stage.replace(out)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    finally:
        if stage.exists():
            shutil.rmtree(stage, ignore_errors=True)
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT,
                        help=f"bundle directory to write (default {DEFAULT_OUT})")
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
