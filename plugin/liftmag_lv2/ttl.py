"""The LV2 description of liftmag: plugin list, control ports and the Turtle files.

The control ports are generated from the fields of :class:`liftmag.settings.Settings` that are
marked ``lv2_port=True``, so the plugin, the CLI and the docs cannot drift apart. The same
port table is written into the bundle as ``ports.json`` for the Python bridge, which turns
port values back into settings.

Port layout of every plugin (indices as in the LV2 core specification: contiguous from 0):
audio inputs ``in_1 .. in_N``, audio outputs ``out_1 .. out_N``, the control inputs in field
order, then the ``latency`` control output.
"""

from __future__ import annotations

import dataclasses
import json
import math
import re
from dataclasses import dataclass
from pathlib import Path
from string import Template
from typing import Any

from liftmag import settings as settings_module
from liftmag.settings import Settings, settings_fields

TEMPLATES = Path(__file__).resolve().parent / "templates"

# (URI, channels, file stem). URIs are ours and never change once released: LV2 state and
# host sessions refer to them (LV2 state extension: "the plugin URI MUST change" when ports
# change incompatibly, so a new port layout means a new URI).
PLUGINS: tuple[tuple[str, int, str], ...] = (
    ("urn:liftmag:dialogue-2ch", 2, "dialogue-2ch"),
    ("urn:liftmag:dialogue-4ch", 4, "dialogue-4ch"),
)
# LV2 core (lv2:minorVersion): the minor version MUST rise with backwards-compatible
# additions, and an odd minor version marks a development version. 2: port groups, and 0
# standing for the default where 0 was useless, with the same ports at the same indices.
MINOR_VERSION = 2
MICRO_VERSION = 0
STATE_KEY_URI = "urn:liftmag:state:noise-model"

# Settings units -> LV2 units extension (http://lv2plug.in/ns/extensions/units).
LV2_UNITS: dict[str, str] = {
    "dB": "units:db",
    "deg": "units:degree",
    "m": "units:m",
    "s": "units:s",
    "Hz": "units:hz",
}
UNIT_WORDS: dict[str, str] = {"dB": "dB", "deg": "degrees", "m": "metres", "s": "seconds",
                              "Hz": "Hz"}


@dataclass(frozen=True)
class ControlPort:
    """One control input generated from a settings field."""

    symbol: str
    field: str
    label: str
    kind: str  # "enumeration", "toggle" or "number"
    help: str
    default: float
    minimum: float
    maximum: float
    unit: str = ""
    choices: tuple[str, ...] = ()
    offered: tuple[int, ...] = ()  # indices into choices that are usable from the plugin
    choice_help: tuple[str, ...] = ()
    # What port value 0 stands for: "unset" (None, an optional field left out) or "default"
    # (the setting's default); "" where 0 is an ordinary value. Hosts that start every
    # control at 0 then get the default processing.
    zero: str = ""
    valid_minimum: float | None = None  # range of real values (the port range adds 0)
    valid_maximum: float | None = None

    def to_json(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


def _choice_usable(name: str, choice: str) -> bool:
    """Whether some assignment of the plugin's own controls makes this choice valid.

    A choice that needs a setting the plugin has no port for (``lifted-nulls`` needs null
    bearings) would only ever fall back to the default, so it is not offered.
    """
    trials: list[dict[str, Any]] = [{}]
    optional: dict[str, Any] = {}
    for f in settings_fields():
        meta = f.metadata
        if meta.get("lv2_port") and meta.get("lv2_zero") == "unset":
            optional[f.name] = 0.5 * (float(meta["minimum"]) + float(meta["maximum"]))
    trials.append(optional)
    for extra in trials:
        try:
            Settings(**{**extra, name: choice})
        except ValueError:
            continue
        return True
    return False


def _plain_help(text: str) -> str:
    # Help texts name CLI options (--mic-spacing-m); in the plugin those are port symbols.
    return re.sub(r"--([a-z0-9-]+)", lambda m: m.group(1).replace("-", "_"), text)


def control_ports() -> tuple[ControlPort, ...]:
    """The control inputs, in settings-field order."""
    defaults = Settings()
    ports = []
    for f in settings_fields():
        meta = f.metadata
        if not meta.get("lv2_port"):
            continue
        default = getattr(defaults, f.name)
        label = meta.get("lv2_label") or f.name.replace("_", " ").capitalize()
        help_text = _plain_help(meta["help"])
        if meta.get("choices"):
            choices = tuple(meta["choices"])
            helps = getattr(settings_module, f"{f.name.upper()}_HELP", {})
            ports.append(ControlPort(
                symbol=f.name, field=f.name, label=label, kind="enumeration", help=help_text,
                default=float(choices.index(default)), minimum=0.0,
                maximum=float(len(choices) - 1), choices=choices,
                offered=tuple(i for i, c in enumerate(choices) if _choice_usable(f.name, c)),
                choice_help=tuple(helps.get(c, "") for c in choices),
            ))
        elif isinstance(default, bool):
            ports.append(ControlPort(
                symbol=f.name, field=f.name, label=label, kind="toggle", help=help_text,
                default=float(default), minimum=0.0, maximum=1.0,
            ))
        else:
            zero = meta.get("lv2_zero", "")
            lo, hi = float(meta["minimum"]), float(meta["maximum"])
            if zero not in ("", "unset", "default"):
                raise ValueError(f"settings field {f.name}: lv2_zero must be unset or default")
            if (default is None) != (zero == "unset"):
                raise ValueError(f"settings field {f.name}: optional fields, and only they, "
                                 "need lv2_zero='unset'")
            if meta.get("unit") and meta["unit"] not in LV2_UNITS:
                raise ValueError(f"settings unit {meta['unit']!r} has no LV2 unit mapping")
            ports.append(ControlPort(
                symbol=f.name, field=f.name, label=label, kind="number", help=help_text,
                default=0.0 if default is None else float(default),
                minimum=min(lo, 0.0) if zero else lo, maximum=max(hi, 0.0) if zero else hi,
                unit=meta.get("unit", ""), zero=zero, valid_minimum=lo, valid_maximum=hi,
            ))
    return tuple(ports)


def port_indices(n_channels: int, ports: tuple[ControlPort, ...]) -> dict[str, int]:
    """Symbol -> port index for one plugin (the layout the C shim assumes)."""
    index = {f"in_{c + 1}": c for c in range(n_channels)}
    index.update({f"out_{c + 1}": n_channels + c for c in range(n_channels)})
    index.update({p.symbol: 2 * n_channels + k for k, p in enumerate(ports)})
    index["latency"] = 2 * n_channels + len(ports)
    return index


def _literal(text: str) -> str:
    """A Turtle string literal (long form when it holds a line break)."""
    text = text.replace("\\", "\\\\")
    if "\n" in text:
        return '"""' + text.replace('"', '\\"') + '"""'
    return '"' + text.replace('"', '\\"') + '"'


def _number(value: float) -> str:
    if not math.isfinite(value):
        raise ValueError("TTL numbers must be finite")
    if float(value).is_integer():
        return str(int(value))
    # Turtle decimal literal: the shortest repr that round-trips, never in exponent form.
    text = f"{value:.10f}".rstrip("0")
    return text + "0" if text.endswith(".") else text


def _range_words(port: ControlPort) -> str:
    lo, hi = port.valid_minimum, port.valid_maximum
    assert lo is not None and hi is not None
    unit = UNIT_WORDS.get(port.unit, port.unit)
    suffix = f" {unit}" if unit else ""
    return f"{_number(lo)} to {_number(hi)}{suffix}"


def port_comment(port: ControlPort) -> str:
    """The rdfs:comment of a control port: what it does, its unit, range and default."""
    head = port.help[0].upper() + port.help[1:]
    if port.kind == "enumeration":
        parts = [f"{i} = {port.choices[i]}"
                 + (f": {port.choice_help[i]}" if port.choice_help[i] else "")
                 for i in port.offered]
        default_name = port.choices[int(port.default)]
        return (f"{head}. Values: " + "; ".join(parts)
                + f". Default {int(port.default)} ({default_name}).")
    if port.kind == "toggle":
        return f"{head}. 0 = off, 1 = on; default {int(port.default)}."
    text = f"{head}. Range {_range_words(port)}"
    unit = UNIT_WORDS.get(port.unit, port.unit)
    if port.zero == "unset":
        text += "; 0 means not set (the default)"
    elif port.zero == "default":
        text += f"; 0 means the default, {_number(port.default)}" + (f" {unit}" if unit else "")
    else:
        text += f"; default {_number(port.default)}" + (f" {unit}" if unit else "")
    if port.zero and port.valid_minimum is not None and port.valid_minimum <= 0.0:
        text += "; for 0 itself give a value just above it"
    return text + "."


def zero_label(port: ControlPort) -> str:
    """The scale-point label of port value 0 (hosts with generic controls show it)."""
    if port.zero == "unset":
        return "not set"
    unit = f" {port.unit}" if port.unit else ""
    return f"default ({_number(port.default)}{unit})"


def _control_port_ttl(index: int, port: ControlPort) -> str:
    lines = [
        "a lv2:InputPort , lv2:ControlPort",
        f"lv2:index {index}",
        f'lv2:symbol "{port.symbol}"',
        f"lv2:name {_literal(port.label)}",
        f"rdfs:comment {_literal(port_comment(port))}",
        f"lv2:default {_number(port.default)}",
        f"lv2:minimum {_number(port.minimum)}",
        f"lv2:maximum {_number(port.maximum)}",
    ]
    if port.kind == "enumeration":
        lines.append("lv2:portProperty lv2:integer , lv2:enumeration")
        points = [
            f"[ rdfs:label {_literal(port.choices[i])} ; rdf:value {i} ]" for i in port.offered
        ]
        lines.append("lv2:scalePoint " + " ,\n\t\t\t".join(points))
    elif port.kind == "toggle":
        lines.append("lv2:portProperty lv2:toggled , lv2:integer")
    else:
        if port.unit:
            lines.append(f"units:unit {LV2_UNITS[port.unit]}")
        if port.zero:
            # A labelled point, so hosts with generic controls show what 0 does.
            lines.append(
                f"lv2:scalePoint [ rdfs:label {_literal(zero_label(port))} ; rdf:value 0 ]"
            )
    return "[\n\t\t" + " ;\n\t\t".join(lines) + "\n\t]"


def group_uri(uri: str, direction: str) -> str:
    """The port group of a plugin's inputs (``in``) or outputs (``out``)."""
    return f"{uri}#{direction}"


def channel_designations(n_channels: int) -> tuple[str, ...]:
    """The lv2:designation of each channel of a group, as Turtle terms.

    Two channels form the LV2 stereo group (port groups extension: ``pg:StereoGroup``, left
    then right), which hosts such as GStreamer need to treat the pair as one stream. Other
    counts are a ``pg:DiscreteGroup`` whose channels are our own ``lv2:Channel`` resources,
    one per microphone in array order: the surround layouts of the extension (4.0 is left,
    centre, right, rear centre) would let a host reorder an array's channels by position.
    """
    if n_channels == 2:
        return ("pg:left", "pg:right")
    return tuple(f"<{MICROPHONE_CHANNEL_URI}{c + 1}>" for c in range(n_channels))


MICROPHONE_CHANNEL_URI = "urn:liftmag:channel:microphone-"


def _groups_ttl(uri: str, n_channels: int) -> str:
    kind = "pg:StereoGroup" if n_channels == 2 else "pg:DiscreteGroup"
    designations = channel_designations(n_channels)
    blocks = []
    for direction, role, name in (("in", "pg:InputGroup", "Microphones"),
                                  ("out", "pg:OutputGroup", "Outputs")):
        lines = [f"a {kind} , {role}", f'lv2:symbol "{direction}"',
                 f"lv2:name {_literal(name)}"]
        if direction == "out":
            lines.append(f"pg:source <{group_uri(uri, 'in')}>")
        if n_channels != 2:  # pg:StereoGroup declares its own elements
            lines.append("pg:element " + " ,\n\t\t".join(
                f"[ lv2:index {c} ; lv2:designation {d} ]" for c, d in enumerate(designations)
            ))
        blocks.append(f"<{group_uri(uri, direction)}>\n\t" + " ;\n\t".join(lines) + " .")
    if n_channels != 2:
        blocks += [f"{d}\n\ta lv2:Channel ;\n\trdfs:label {_literal(f'microphone {c + 1}')} ."
                   for c, d in enumerate(designations)]
    return "\n\n".join(blocks)


def _audio_port_ttl(uri: str, index: int, direction: str, channel: int,
                    n_channels: int) -> str:
    if direction == "in":
        role = " (the reference channel, whose sound is cleaned)" if channel == 0 else ""
        comment = f"Microphone {channel + 1} of {n_channels}{role}."
        kind, name = "lv2:InputPort", f"Microphone {channel + 1}"
    else:
        comment = (f"Output {channel + 1}. With output modes that give one channel "
                   "(cleaned, taken-out) every output carries that channel; with keep-image "
                   f"it is microphone {channel + 1} with the shared gain applied.")
        kind, name = "lv2:OutputPort", f"Output {channel + 1}"
    return ("[\n\t\t" + " ;\n\t\t".join([
        f"a {kind} , lv2:AudioPort",
        f"lv2:index {index}",
        f'lv2:symbol "{direction}_{channel + 1}"',
        f"lv2:name {_literal(name)}",
        f"rdfs:comment {_literal(comment)}",
        f"pg:group <{group_uri(uri, direction)}>",
        f"lv2:designation {channel_designations(n_channels)[channel]}",
    ]) + "\n\t]")


LATENCY_COMMENT = (
    "Delay of the outputs behind the inputs, in samples (frames): the STFT frame of the "
    "engine plus the fixed block the plugin gathers before it calls the engine. Constant "
    "for the life of an instance; hosts use it to align the output."
)


def _latency_port_ttl(index: int) -> str:
    return ("[\n\t\t" + " ;\n\t\t".join([
        "a lv2:OutputPort , lv2:ControlPort",
        f"lv2:index {index}",
        'lv2:symbol "latency"',
        'lv2:name "Latency"',
        f"rdfs:comment {_literal(LATENCY_COMMENT)}",
        # lv2:designation lv2:latency is the current LV2 core way; lv2:reportsLatency is
        # the older property some hosts still read, so both are given.
        "lv2:designation lv2:latency",
        "lv2:portProperty lv2:reportsLatency , lv2:integer",
        "units:unit units:frame",
        "lv2:minimum 0",
        # 2^24: a float32 port value holds every whole number up to this exactly.
        "lv2:maximum 16777216",
    ]) + "\n\t]")


PLUGIN_COMMENT = (
    "Cleans dialogue recorded with {n} microphones: estimates the clean-speech STFT "
    "magnitudes of the reference microphone (input 1) with linear or lifted (quadratic) "
    "estimators. Output is the same as `liftmag process` with the same settings, delayed "
    "by the reported latency. Meant for offline rendering, not live use: it runs Python "
    "and is not hard real-time capable. Enhanced audio is not the original recording; "
    "keep the original and check levels, since removing noise changes loudness."
)


def plugin_title(n_channels: int) -> str:
    """The plugin's doap:name (hosts list it; GStreamer shows it beside the element name)."""
    return f"liftmag dialogue cleaner, {n_channels} microphones"


def plugin_ttl(uri: str, n_channels: int, stem: str,
               ports: tuple[ControlPort, ...] | None = None) -> str:
    """The Turtle description of one plugin."""
    ports = control_ports() if ports is None else ports
    blocks = [_audio_port_ttl(uri, c, "in", c, n_channels) for c in range(n_channels)]
    blocks += [_audio_port_ttl(uri, n_channels + c, "out", c, n_channels)
               for c in range(n_channels)]
    blocks += [_control_port_ttl(2 * n_channels + k, p) for k, p in enumerate(ports)]
    blocks.append(_latency_port_ttl(2 * n_channels + len(ports)))
    template = Template((TEMPLATES / "plugin.ttl.in").read_text())
    return template.substitute(
        name=stem, uri=uri, title=plugin_title(n_channels),
        minor_version=MINOR_VERSION, micro_version=MICRO_VERSION,
        comment=_literal(PLUGIN_COMMENT.format(n=n_channels)),
        ports=" ,\n\t".join(blocks),
        main_input=group_uri(uri, "in"), main_output=group_uri(uri, "out"),
        groups=_groups_ttl(uri, n_channels),
    )


def manifest_ttl(binary: str) -> str:
    """The bundle manifest listing every plugin."""
    entries = [
        f"<{uri}>\n\ta lv2:Plugin ;\n\tlv2:binary <{binary}> ;\n\trdfs:seeAlso <{stem}.ttl> ."
        for uri, _, stem in PLUGINS
    ]
    return Template((TEMPLATES / "manifest.ttl.in").read_text()).substitute(
        entries="\n\n".join(entries)
    )


def ports_json(block_frames: int) -> str:
    """The port table the bridge reads at start-up (same order as the TTL)."""
    return json.dumps({
        "format": "liftmag-lv2-ports",
        "block_frames": block_frames,
        "state_key": STATE_KEY_URI,
        "plugins": [{"uri": u, "channels": n, "stem": s} for u, n, s in PLUGINS],
        "controls": [p.to_json() for p in control_ports()],
    }, indent=1)
