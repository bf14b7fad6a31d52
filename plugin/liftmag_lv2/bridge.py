"""Python side of the liftmag LV2 plugin: the callbacks the C shim calls.

The shim (``shim.c``) starts the interpreter, then cffi's init code imports this module from
the bundle and calls :func:`attach`, which defines the ``extern "Python"`` callbacks. Each
plugin instance owns one :class:`liftmag.engine.Processor`; the shim hands over fixed blocks
of ``block`` frames (planar float32), so the engine sees the same pushes whatever the host's
block size.

Nothing raised here may reach the host. Every callback catches its errors, logs them (stderr
and the log file, through the shim) and returns 0, and the shim then outputs the dry signal
delayed by the reported latency.

Test hook: the environment variable ``LIFTMAG_LV2_TEST_FAULT`` (read when an instance is
created) injects a failure so the tests can check that path: ``import`` (the engine cannot
be imported), ``instantiate``, ``process`` (every block raises), ``save`` or ``restore``.
It has no other effect and is not meant for users.
"""

from __future__ import annotations

import itertools
import json
import math
import os
import threading
import traceback
from collections.abc import Sequence
from pathlib import Path
from typing import Any

TEST_FAULT_ENV = "LIFTMAG_LV2_TEST_FAULT"
# Start of the log line that lists control values not taken as they are (`liftmag plugin
# info` shows the latest such lines).
CONTROLS_NOTE = "control values replaced"
PORTS_FILE = Path(__file__).resolve().parent / "ports.json"

_ffi: Any = None
_lib: Any = None
_instances: dict[int, _Instance] = {}
_handles = itertools.count(1)
_ports_cache: dict[str, Any] = {}


def log(message: str) -> None:
    """One line to stderr and the plugin log, through the shim (so C and Python share it)."""
    if _lib is not None:
        _lib.liftmag_log(message.encode("utf-8", errors="replace"))


def port_table() -> dict[str, Any]:
    """The port table the bundle was built with (``ports.json``)."""
    if not _ports_cache:
        _ports_cache.update(json.loads(PORTS_FILE.read_text()))
    return _ports_cache


def _fault(name: str, fault: str) -> None:
    if fault == name:
        raise RuntimeError(f"injected test fault ({TEST_FAULT_ENV}={name})")


# ------------------------------------------------------------------ controls -> settings

_KEEP = object()  # _port_value's answer for "leave the setting at its default"


def _port_value(port: dict[str, Any], value: float) -> tuple[Any, str]:
    """The settings value for one port value, and a note when the value was not taken as is.

    Out-of-range values are clamped. On ports where 0 stands for "not set" or "the default",
    0 and values outside the usable range that lie nearer 0 than the range mean that.
    """
    kind = port["kind"]
    symbol = port["symbol"]
    if kind == "enumeration":
        index = round(value)
        if index not in port["offered"]:
            raise ValueError(f"{symbol} {value:g} is not one of the offered values")
        return port["choices"][index], ""
    if kind == "toggle":
        return value >= 0.5, ""
    lo, hi = port["valid_minimum"], port["valid_maximum"]
    clamped = min(max(value, lo), hi)
    zero = port.get("zero", "")
    if zero and (value == 0.0 or abs(value) <= abs(value - clamped)):
        if zero == "unset":
            return None, "" if value == 0.0 else f"{symbol} {value:g} read as 0 (not set)"
        note = f"{symbol} {value:g} read as the default {port['default']:g}"
        return _KEEP, note + (" (0 means the default)" if value == 0.0 else "")
    if clamped != value:
        return float(clamped), f"{symbol} {value:g} clamped to {clamped:g}"
    return float(value), ""


def settings_from_controls(values: Sequence[float | None], controls: Sequence[dict[str, Any]],
                           base: Any = None) -> tuple[Any, list[str]]:
    """Settings for these port values, and a note for every value not taken as it is.

    Unconnected ports (None or NaN) keep the default. Port combinations the settings refuse
    (a talker bearing without a microphone spacing) lose as few values as possible: first
    one optional value (the bearing before the spacing, in port order), then all of them,
    and only then are the defaults used, so the host always gets a working engine and a
    bearing that cannot be used never costs the other settings.
    """
    from liftmag.settings import Settings

    base = Settings() if base is None else base
    if len(values) != len(controls):
        raise ValueError(f"{len(values)} control values for {len(controls)} ports: the "
                         "bundle is inconsistent; rebuild it (liftmag plugin install --rebuild)")
    notes: list[str] = []
    changes: dict[str, Any] = {}
    for value, port in zip(values, controls, strict=True):
        if value is None or not math.isfinite(value):
            continue
        try:
            setting, note = _port_value(port, float(value))
        except ValueError as exc:
            notes.append(f"{exc}; the default is used")
            continue
        if note:
            notes.append(note)
        if setting is not _KEEP:
            changes[port["field"]] = setting
    optional = [p["field"] for p in controls
                if p.get("zero") == "unset" and changes.get(p["field"]) is not None]
    trials = [()] + [(name,) for name in optional] + [tuple(optional)]
    for dropped in dict.fromkeys(trials):
        try:
            settings = base.replace(**{k: v for k, v in changes.items() if k not in dropped})
        except ValueError as exc:
            reason = str(exc)
            continue
        if dropped:
            notes.append(f"{', '.join(dropped)} ignored ({reason})")
        return settings, notes
    return base, [*notes, f"defaults used ({reason})"]


# ------------------------------------------------------------------ engine access

def _engine_api() -> tuple[Any, Any]:
    """(Processor, NoiseModel) from liftmag.engine."""
    if os.environ.get(TEST_FAULT_ENV) == "import":
        raise ImportError(f"injected test fault ({TEST_FAULT_ENV}=import)")
    from liftmag.engine import NoiseModel, Processor

    return Processor, NoiseModel


class _Instance:
    """One plugin instance: the engine, its settings and what has been logged already."""

    def __init__(self, rate: float, n_channels: int, block: int) -> None:
        self.fault = os.environ.get(TEST_FAULT_ENV, "")
        processor_cls, self.noise_model_cls = _engine_api()
        _fault("instantiate", self.fault)
        from liftmag.settings import Settings

        self.rate, self.n_channels, self.block = float(rate), int(n_channels), int(block)
        self.settings = Settings()
        self.processor_cls = processor_cls
        self.processor = processor_cls(self.settings, self.rate, self.n_channels)
        self.latency = int(self.processor.latency_samples)
        self.lock = threading.Lock()  # save() may run beside run() (LV2 state threading)
        self.controls = port_table()["controls"]
        self.seen: tuple[float | None, ...] | None = None
        self.dirty = False
        self.failures = 0
        self.logged: set[str] = set()
        self.handle = next(_handles)
        self.name = f"instance {self.handle} ({self.n_channels} ch, {self.rate:g} Hz)"

    def log_once(self, key: str, message: str) -> None:
        if key not in self.logged:
            self.logged.add(key)
            log(f"{self.name}: {message}")

    def apply_controls(self, values: tuple[float | None, ...]) -> None:
        self.seen = values
        settings, notes = settings_from_controls(values, self.controls)
        if notes:
            self.log_once("controls:" + repr(values),
                          f"{CONTROLS_NOTE}: " + "; ".join(notes))
        if settings != self.settings:
            with self.lock:
                self.processor.update_settings(settings)
            self.settings = settings

    def process(self, inp: Any, out: Any, n: int, controls: Any, n_controls: int) -> None:
        import numpy as np

        _fault("process", self.fault)
        nc = self.n_channels
        raw = [None if math.isnan(v) else v for v in _ffi.unpack(controls, n_controls)]
        values = tuple(raw)
        if values != self.seen:
            self.apply_controls(values)
        x = np.frombuffer(_ffi.buffer(inp, 4 * nc * n), dtype=np.float32)
        x = x.reshape(nc, n).astype(np.float64)
        finite = np.isfinite(x)
        if not finite.all():
            x[~finite] = 0.0
            self.log_once("nan-in", "input holds NaN or infinite samples; they are "
                                    "replaced by 0 (logged once per instance)")
        with self.lock:
            y = np.asarray(self.processor.push(x))
            self.dirty = True
        if y.ndim == 1:
            y = y[np.newaxis, :]
        if y.shape[1] != n or y.shape[0] not in (1, nc):
            raise ValueError(f"engine returned shape {y.shape} for a {nc} x {n} block")
        o = np.frombuffer(_ffi.buffer(out, 4 * nc * n), dtype=np.float32).reshape(nc, n)
        o[:] = y  # one output channel goes to every output port
        bad = ~np.isfinite(o)
        if bad.any():
            o[bad] = 0.0
            self.log_once("nan-out", "the engine produced non-finite samples; they are "
                                     "replaced by 0 (logged once per instance)")

    def activate(self) -> None:
        # LV2 activate() resets the signal state; the learned noise model is kept.
        if self.dirty:
            with self.lock:
                model = self.processor.noise_model()
                self.processor = self.processor_cls(self.settings, self.rate, self.n_channels)
                self.processor.set_noise_model(model)
                self.dirty = False

    def save(self) -> bytes:
        _fault("save", self.fault)
        with self.lock:
            model = self.processor.noise_model()
        return bytes(model.to_bytes())

    def restore(self, data: bytes | None) -> None:
        _fault("restore", self.fault)
        if data is None:
            model = self.processor_cls(self.settings, self.rate, self.n_channels).noise_model()
        else:
            model = self.noise_model_cls.from_bytes(data)
        with self.lock:
            self.processor.set_noise_model(model)

    def failed(self, what: str) -> None:
        """Log a failed block: the first with its traceback, then at 10, 100, ... failures."""
        self.failures += 1
        if self.failures == 1:
            log(f"{self.name}: {what} failed; the dry signal is output instead:\n"
                + traceback.format_exc().rstrip())
        elif math.log10(self.failures).is_integer():
            log(f"{self.name}: {what} has failed {self.failures} times")


# ------------------------------------------------------------------ the callbacks

def attach(ffi: Any, lib: Any) -> None:
    """Define the extern "Python" callbacks of the shim (called by cffi's init code)."""
    global _ffi, _lib
    _ffi, _lib = ffi, lib

    @ffi.def_extern()
    def liftmag_py_instantiate(rate: float, n_channels: int, block: int, latency: Any) -> int:
        try:
            instance = _Instance(rate, n_channels, block)
        except BaseException:
            log(f"could not create the engine ({n_channels} channels, {rate:g} Hz); audio "
                "passes through unprocessed:\n" + traceback.format_exc().rstrip())
            return 0
        handle = instance.handle
        _instances[handle] = instance
        latency[0] = instance.latency
        return handle

    @ffi.def_extern()
    def liftmag_py_process(handle: int, inp: Any, out: Any, n: int, controls: Any,
                           n_controls: int) -> int:
        instance = _instances.get(handle)
        if instance is None:
            return 0
        try:
            instance.process(inp, out, n, controls, n_controls)
        except BaseException:
            instance.failed("processing a block")
            return 0
        return 1

    @ffi.def_extern()
    def liftmag_py_activate(handle: int) -> int:
        instance = _instances.get(handle)
        if instance is None:
            return 0
        try:
            instance.activate()
        except BaseException:
            log("resetting the engine failed; audio passes through unprocessed:\n"
                + traceback.format_exc().rstrip())
            _instances.pop(handle, None)
            return 0
        return 1

    @ffi.def_extern()
    def liftmag_py_cleanup(handle: int) -> None:
        _instances.pop(handle, None)

    @ffi.def_extern()
    def liftmag_py_save(handle: int, sink: Any) -> int:
        instance = _instances.get(handle)
        if instance is None:
            return 0
        try:
            data = instance.save()
        except BaseException:
            log("saving the noise model failed:\n" + traceback.format_exc().rstrip())
            return 0
        return 1 if lib.liftmag_state_store(sink, data, len(data)) else 0

    @ffi.def_extern()
    def liftmag_py_restore(handle: int, data: Any, size: int) -> int:
        instance = _instances.get(handle)
        if instance is None:
            return 0
        try:
            instance.restore(None if data == ffi.NULL or size == 0
                             else ffi.buffer(data, size)[:])
        except BaseException:
            log("restoring the noise model failed; the current model is kept:\n"
                + traceback.format_exc().rstrip())
            return 0
        return 1
