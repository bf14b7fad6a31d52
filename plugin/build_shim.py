"""cffi build script of the LV2 shim (embedding mode).

The shared object is ``plugin/shim.c`` plus the code cffi generates for the ``extern
"Python"`` callbacks below. Python is started by the shim itself (isolated configuration,
interpreter path baked in here), then cffi runs ``INIT_CODE``, which imports the bridge
(``liftmag_lv2_bridge.py``, copied next to the shared object, imported by path) and lets it
attach the callbacks. Used by ``build/build_bundle.py``.
"""

from __future__ import annotations

import json
import sysconfig
from collections.abc import Sequence
from pathlib import Path

import cffi

HERE = Path(__file__).resolve().parent
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


def make_ffi(venv_python: str, plugins: Sequence[tuple[str, int]], n_controls: int,
             state_key: str, block_frames: int = BLOCK_FRAMES) -> cffi.FFI:
    """The cffi builder for the shim with the build-time values baked in."""
    if not plugins or any(n < 1 or n > 16 for _, n in plugins):
        raise ValueError("each plugin needs 1 to 16 channels")
    config = "\n".join([
        f"#define LIFTMAG_VENV_PYTHON {c_string(venv_python)}",
        f"#define LIFTMAG_N_CONTROLS {int(n_controls)}",
        f"#define LIFTMAG_BLOCK {int(block_frames)}u",
        f"#define LIFTMAG_STATE_KEY_URI {c_string(state_key)}",
        "#define LIFTMAG_PLUGINS \\",
        *[f"    LIFTMAG_PLUGIN({c_string(uri)}, {int(n)}) \\" for uri, n in plugins],
        "",
    ])
    ffibuilder = cffi.FFI()
    ffibuilder.cdef(CDEF)
    libdir = libpython_dir()
    ffibuilder.set_source(
        MODULE_NAME,
        config + "\n" + (HERE / "shim.c").read_text(),
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
                 plugins: Sequence[tuple[str, int]], n_controls: int, state_key: str,
                 block_frames: int = BLOCK_FRAMES, verbose: bool = False) -> Path:
    """Compile the shared object to ``out_file`` (work files go to ``tmpdir``)."""
    tmpdir.mkdir(parents=True, exist_ok=True)
    ffibuilder = make_ffi(venv_python, plugins, n_controls, state_key, block_frames)
    built = Path(ffibuilder.compile(tmpdir=str(tmpdir), target=out_file.name, verbose=verbose))
    out_file.parent.mkdir(parents=True, exist_ok=True)
    built.replace(out_file)
    return out_file
