"""cffi build script of the LV2 shim (embedding mode).

The shared object is ``shim.c`` (package data beside this module) plus the code cffi
generates for the ``extern "Python"`` callbacks below. The values baked in at build time
(interpreter path, block size, state key, plugin URIs, channel counts and port indices) go
into a generated header, ``liftmag_ports.h``, which ``shim.c`` includes, so the C file is
complete on its own and a compiler can check it alone. Python is started by the shim itself
(isolated configuration), then cffi runs ``INIT_CODE``, which imports the bridge (copied into
the bundle as ``liftmag_lv2_bridge.py``, imported by path) and lets it attach the callbacks.
Used by :mod:`liftmag_lv2.bundle`.
"""

from __future__ import annotations

import json
import os
import shutil
import sysconfig
from collections.abc import Sequence
from pathlib import Path

import cffi

from liftmag_lv2.ttl import ControlPort, port_indices

HERE = Path(__file__).resolve().parent
SHIM_SOURCE = HERE / "shim.c"
HEADER = "liftmag_ports.h"
MODULE_NAME = "_liftmag_lv2"
BRIDGE_MODULE = "liftmag_lv2_bridge"
# Frames per bridge call, whatever the host's run() size; added to the reported latency.
# The engine does its per-frame work in numpy batches, so a few STFT hops per call run
# about 20 % faster than one (measured at 48 kHz: 1024 frames 19x, 4096 frames 23x real
# time on one core); the price is 85 ms more latency at 48 kHz, which offline use hides.
BLOCK_FRAMES = 4096

CDEF = """
extern "Python" int64_t liftmag_py_instantiate(double rate, uint32_t n_channels,
                                               uint32_t block, int32_t *engine_latency);
extern "Python" int liftmag_py_process(int64_t handle, const float *in, float *out,
                                       uint32_t n_frames, const float *controls,
                                       uint32_t n_controls);
extern "Python" int liftmag_py_activate(int64_t handle);
extern "Python" void liftmag_py_cleanup(int64_t handle);
extern "Python" int liftmag_py_save(int64_t handle, void *sink);
extern "Python" int liftmag_py_restore(int64_t handle, const char *data, size_t size);

void liftmag_log(const char *message);
int liftmag_state_store(void *sink, const char *data, size_t size);
const char *liftmag_bundle_dir(void);
"""

# Runs once, inside the embedded interpreter, when the shim calls cffi_start_python().
INIT_CODE = f"""
import importlib.util
import sys
from {MODULE_NAME} import ffi, lib
try:
    # By file path: the bundle directory itself must not go on sys.path, where its shared
    # object could shadow a package of the same name.
    _path = ffi.string(lib.liftmag_bundle_dir()).decode() + "/{BRIDGE_MODULE}.py"
    _spec = importlib.util.spec_from_file_location("{BRIDGE_MODULE}", _path)
    _bridge = importlib.util.module_from_spec(_spec)
    sys.modules["{BRIDGE_MODULE}"] = _bridge
    _spec.loader.exec_module(_bridge)
    _bridge.attach(ffi, lib)
except BaseException:
    import traceback
    lib.liftmag_log(("Python bridge start-up failed:\\n" + traceback.format_exc()).encode())
    raise
"""


def c_string(text: str) -> str:
    """A C string literal (JSON escaping is a subset of C's for these paths and URIs)."""
    if any(ord(ch) < 32 or ord(ch) > 126 for ch in text):
        raise ValueError(f"only printable ASCII is baked into the shim, got {text!r}")
    return json.dumps(text)


def libpython_dir() -> str:
    """Directory of the shared libpython of this interpreter (the shim links against it)."""
    libdir = str(sysconfig.get_config_var("LIBDIR"))
    name = f"libpython{sysconfig.get_config_var('LDVERSION')}.so"
    if not (Path(libdir) / name).exists():
        raise RuntimeError(
            f"{name} is not in {libdir}: the plugin embeds Python and links against it "
            "(on Debian install python3-dev; a self-built Python needs --enable-shared)"
        )
    return libdir


def python_headers() -> Path:
    """Python.h of this interpreter (Debian: python3-dev)."""
    return Path(sysconfig.get_paths()["include"]) / "Python.h"


# Where the LV2 headers are looked for (Debian's lv2-dev installs into /usr/include).
LV2_INCLUDE_DIRS = ("/usr/include", "/usr/local/include")


def c_compiler() -> str | None:
    """Path of the C compiler the build will run (CC, else the one Python was built with,
    as setuptools chooses it), or None when it is not on PATH."""
    command = os.environ.get("CC") or str(sysconfig.get_config_var("CC") or "cc")
    words = command.split()
    return shutil.which(words[0]) if words else None


def missing_build_tools() -> list[str]:
    """What building the shim needs and this machine lacks (empty when all is there)."""
    missing = []
    if c_compiler() is None:
        missing.append("a C compiler (Debian: gcc; or set CC)")
    if not python_headers().is_file():
        missing.append("the Python headers (Debian: python3-dev)")
    try:
        libpython_dir()
    except RuntimeError:
        missing.append("the shared libpython (Debian: python3-dev)")
    if not any((Path(d) / "lv2" / "core" / "lv2_util.h").is_file() for d in LV2_INCLUDE_DIRS):
        missing.append("the LV2 headers (Debian: lv2-dev)")
    return missing


def _macro_name(symbol: str) -> str:
    if not symbol.isidentifier() or not symbol.isascii():
        raise ValueError(f"port symbol {symbol!r} is not a C identifier")
    return symbol.upper()


def ports_header(venv_python: str, plugins: Sequence[tuple[str, int]],
                 ports: tuple[ControlPort, ...], state_key: str,
                 block_frames: int = BLOCK_FRAMES, libpython: str = "") -> str:
    """Text of ``liftmag_ports.h``: the build-time values and every plugin's port indices.

    The indices come from :func:`liftmag_lv2.ttl.port_indices`, the function that numbers
    the ports in the TTL, so the C side and the TTL share one layout.
    """
    if not plugins or any(n < 1 or n > 16 for _, n in plugins):
        raise ValueError("each plugin needs 1 to 16 channels")
    control_symbols = [p.symbol for p in ports]
    lines = [
        "/* Generated by liftmag_lv2.build_shim for one build of the plugin; do not edit. */",
        "#ifndef LIFTMAG_PORTS_H",
        "#define LIFTMAG_PORTS_H",
        "",
        f"#define LIFTMAG_VENV_PYTHON {c_string(venv_python)}",
        f"#define LIFTMAG_LIBPYTHON_DIR {c_string(libpython)}",
        f"#define LIFTMAG_BLOCK {int(block_frames)}u",
        f"#define LIFTMAG_STATE_KEY_URI {c_string(state_key)}",
        f"#define LIFTMAG_N_CONTROLS {len(control_symbols)}",
        "",
        "/* Control inputs in port order: LIFTMAG_CONTROL(symbol, offset from the first",
        "   control port). */",
        "#define LIFTMAG_CONTROLS \\",
        *[f"    LIFTMAG_CONTROL({c_string(sym)}, {k}) \\"
          for k, sym in enumerate(control_symbols)],
        "",
        *[f"#define LIFTMAG_CONTROL_{_macro_name(sym)} {k}"
          for k, sym in enumerate(control_symbols)],
        "",
        "/* One entry per plugin: LIFTMAG_PLUGIN(uri, channels, first audio input, first audio",
        "   output, first control input, latency output), port indices as in its TTL. */",
        "#define LIFTMAG_PLUGINS \\",
    ]
    for uri, n in plugins:
        index = port_indices(n, ports)
        first_control = index[control_symbols[0]] if control_symbols else index["latency"]
        lines.append(f"    LIFTMAG_PLUGIN({c_string(uri)}, {int(n)}, {index['in_1']}, "
                     f"{index['out_1']}, {first_control}, {index['latency']}) \\")
    lines += ["", "#endif", ""]
    return "\n".join(lines)


def make_ffi(header_dir: Path) -> cffi.FFI:
    """The cffi builder for the shim; ``header_dir`` holds the generated header."""
    if not (header_dir / HEADER).is_file():
        raise FileNotFoundError(f"{header_dir / HEADER} is missing; write it first")
    ffibuilder = cffi.FFI()
    ffibuilder.cdef(CDEF)
    libdir = libpython_dir()
    ffibuilder.set_source(
        MODULE_NAME,
        SHIM_SOURCE.read_text(),
        include_dirs=[str(header_dir)],
        libraries=["dl", "m"],
        library_dirs=[libdir],
        # The host knows nothing of our Python: find libpython through the rpath. DT_RPATH
        # (not RUNPATH) so that LD_LIBRARY_PATH in the host cannot swap in another one.
        extra_link_args=[f"-Wl,-rpath,{libdir}", "-Wl,--disable-new-dtags", "-Wl,-z,defs"],
        extra_compile_args=["-fvisibility=hidden", "-O2", "-pthread"],
    )
    ffibuilder.embedding_init_code(INIT_CODE)
    return ffibuilder


def compile_shim(out_file: Path, tmpdir: Path, *, venv_python: str,
                 plugins: Sequence[tuple[str, int]], ports: tuple[ControlPort, ...],
                 state_key: str, block_frames: int = BLOCK_FRAMES,
                 verbose: bool = False) -> Path:
    """Compile the shared object to ``out_file`` (work files and the header go to ``tmpdir``)."""
    tmpdir.mkdir(parents=True, exist_ok=True)
    (tmpdir / HEADER).write_text(ports_header(venv_python, plugins, ports, state_key,
                                              block_frames, libpython_dir()))
    ffibuilder = make_ffi(tmpdir)
    built = Path(ffibuilder.compile(tmpdir=str(tmpdir), target=out_file.name, verbose=verbose))
    out_file.parent.mkdir(parents=True, exist_ok=True)
    built.replace(out_file)
    return out_file
