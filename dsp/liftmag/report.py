"""Reusable report pieces: PNG figures as bytes and self-contained HTML/Markdown pages.

Figures use matplotlib's object-oriented API with the Agg canvas, imported
lazily, so nothing here touches a display or pyplot's global state. Pages
are built from small frozen blocks (:class:`Table`, :class:`Image`, text),
and every image is embedded in the HTML as a base64 PNG so the single file
can be mailed or archived on its own.
"""

from __future__ import annotations

import base64
import html
import io
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

__all__ = [
    "Image",
    "Section",
    "Table",
    "html_page",
    "level_over_time_png",
    "markdown_page",
    "spectrogram_png",
    "spectrogram_row_png",
    "talker_map_figure",
]

_DPI = 80


# --------------------------------------------------------------------------- figures


def _new_figure(width_in: float, height_in: float):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_in, height_in), dpi=_DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _png_bytes(fig, fmt: str = "png") -> bytes:
    """The figure as ``fmt`` bytes (png, svg or pdf)."""
    buf = io.BytesIO()
    # No "Software" tag etc.: the bytes of a PNG depend only on the picture.
    fig.savefig(buf, format=fmt, metadata={"Software": None} if fmt == "png" else None)
    return buf.getvalue()


def _power_spectrogram_db(
    x: np.ndarray, fs_hz: float, frame_s: float, max_frames: int
) -> tuple[np.ndarray, tuple[float, float, float, float]]:
    """(power dB [bins, frames], image extent in s and kHz); Hann window, 75 % overlap."""
    from scipy.signal import ShortTimeFFT
    from scipy.signal.windows import hann

    sig = np.asarray(x, dtype=np.float64)
    n_win = max(16, round(frame_s * fs_hz))
    hop = max(1, n_win // 4, int(np.ceil(sig.size / max_frames)))
    window = hann(n_win, sym=False)
    stft = ShortTimeFFT(window, hop, fs_hz, scale_to="psd")
    power = stft.spectrogram(sig)
    with np.errstate(divide="ignore"):
        power_db = 10.0 * np.log10(power)
    t0_s, t1_s, f0_hz, f1_hz = stft.extent(sig.size)
    return power_db, (t0_s, t1_s, f0_hz / 1e3, f1_hz / 1e3)


def _draw_spectrogram(ax, power_db, extent, vmin_db, vmax_db, title):
    img = ax.imshow(
        np.nan_to_num(power_db, neginf=vmin_db),
        origin="lower",
        aspect="auto",
        extent=extent,
        vmin=vmin_db,
        vmax=vmax_db,
        cmap="magma",
        interpolation="nearest",
    )
    ax.set_title(title, fontsize=10)
    ax.set_xlabel("time (s)")
    ax.set_ylabel("frequency (kHz)")
    return img


def spectrogram_png(
    x: np.ndarray,
    fs_hz: float,
    title: str = "",
    *,
    frame_s: float = 0.032,
    dynamic_range_db: float = 80.0,
    max_frames: int = 2000,
) -> bytes:
    """One spectrogram as PNG bytes.

    Power spectral density ``10 log10 |STFT|²`` (dB re 1 full-scale²/Hz),
    Hann window of ``frame_s`` seconds, hop a quarter of it (coarser for long
    signals so at most ``max_frames`` frames are drawn); colour range is the
    top ``dynamic_range_db`` dB.
    """
    return spectrogram_row_png(
        [(title, x)],
        fs_hz,
        frame_s=frame_s,
        dynamic_range_db=dynamic_range_db,
        max_frames=max_frames,
    )


def spectrogram_row_png(
    panels: Sequence[tuple[str, np.ndarray]],
    fs_hz: float,
    *,
    frame_s: float = 0.032,
    dynamic_range_db: float = 80.0,
    max_frames: int = 2000,
    panel_width_in: float = 4.2,
    height_in: float = 3.2,
) -> bytes:
    """Spectrograms side by side, on one shared colour scale, as PNG bytes.

    The scale is shared so that equal colours mean equal power in every
    panel: its top is the loudest bin over all panels and it spans
    ``dynamic_range_db`` dB. See :func:`spectrogram_png` for the analysis.
    """
    if not panels:
        raise ValueError("no panels to draw")
    specs = [_power_spectrogram_db(x, fs_hz, frame_s, max_frames) for _, x in panels]
    finite_max = [float(np.max(p[np.isfinite(p)])) for p, _ in specs if np.isfinite(p).any()]
    vmax_db = max(finite_max) if finite_max else 0.0
    vmin_db = vmax_db - dynamic_range_db
    fig = _new_figure(panel_width_in * len(panels) + 0.8, height_in)
    axes = fig.subplots(1, len(panels), sharex=True, sharey=True, squeeze=False)[0]
    img = None
    for ax, (title, _), (power_db, extent) in zip(axes, panels, specs, strict=True):
        img = _draw_spectrogram(ax, power_db, extent, vmin_db, vmax_db, title)
    fig.colorbar(img, ax=list(axes), label="power (dB)", shrink=0.9)
    return _png_bytes(fig)


def level_over_time_png(
    traces: Sequence[tuple[str, np.ndarray]],
    fs_hz: float,
    *,
    frame_s: float = 0.050,
    shade_s: Sequence[tuple[float, float]] = (),
    shade_label: str = "noise-only region",
    floor_db: float = -100.0,
    title: str = "Level over time",
    width_in: float = 10.0,
    height_in: float = 3.6,
) -> bytes:
    """Short-term level of several signals on one plot, as PNG bytes.

    Level is ``10 log10(mean x²)`` over consecutive ``frame_s`` frames, in dB
    re full scale (a full-scale square wave reads 0 dB; a full-scale sine
    -3 dB), floored at ``floor_db`` for silence. ``shade_s`` intervals (in
    seconds) are shaded, e.g. the noise-only region.
    """
    from liftmag.metrics import frame_levels_db

    frame_len = max(1, round(frame_s * fs_hz))
    fig = _new_figure(width_in, height_in)
    ax = fig.subplots()
    for i, (start_s, end_s) in enumerate(shade_s):
        ax.axvspan(start_s, end_s, color="0.85", zorder=0, label=shade_label if i == 0 else None)
    for label, x in traces:
        levels = np.maximum(frame_levels_db(np.asarray(x, dtype=np.float64), frame_len), floor_db)
        t_s = (np.arange(levels.size) + 0.5) * frame_len / fs_hz
        ax.plot(t_s, levels, label=label, linewidth=1.0, drawstyle="steps-mid")
    ax.set_xlabel("time (s)")
    ax.set_ylabel(f"level, {frame_s * 1e3:.0f} ms RMS (dBFS)")
    ax.set_title(title, fontsize=10)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    return _png_bytes(fig)


def talker_map_figure(
    features,
    talkers,
    *,
    spacing_m: float | None = None,
    fmt: str = "png",
    title: str = "Who talks from where",
    width_in: float = 10.0,
    height_in: float = 3.6,
) -> bytes:
    """The take's directional sources over time (:mod:`liftmag.talkers`), as ``fmt`` bytes.

    Each 64 ms feature frame with a clear direction is a dot at its time difference of
    arrival between the first and the last microphone (ms), coloured by the source it belongs
    to: the wanted talker, a voice learned as noise, or a source kept as speech (an undecided
    choice, or one too diffuse to count); a line marks each source with its share of frames
    (and bearing when the spacing is known).
    """
    from liftmag.talkers import frame_sources

    roles = {"wanted": ("tab:green", "wanted talker"), "noise": ("tab:red", "learned as noise"),
             "kept": ("tab:orange", "kept as speech")}
    owner = frame_sources(talkers, features)
    fig = _new_figure(width_in, height_in)
    ax = fig.subplots()
    delay_ms = features.delays_s[:, -1] * 1e3 if len(features) else np.zeros(0)
    loose = owner < 0
    ax.scatter(features.times_s[loose], delay_ms[loose], s=4, color="0.75",
               label="no clear source")
    for i, src in enumerate(talkers.sources):
        role = "wanted" if i == talkers.kept else "noise" if i in talkers.removed else "kept"
        colour, name = roles[role]
        mine = owner == i
        bearing = src.bearing_deg(spacing_m)
        where = f", {bearing:.0f} deg" if bearing is not None else ""
        label = f"{name} ({src.share:.0%} of active frames{where})"
        ax.scatter(features.times_s[mine], delay_ms[mine], s=6, color=colour, label=label)
        ax.axhline(src.delays_s[-1] * 1e3, color=colour, linewidth=1.0, linestyle="--")
    if talkers.sources:  # stray frames (reflections, noise) would squeeze the sources flat
        centres = [src.delays_s[-1] * 1e3 for src in talkers.sources]
        ax.set_ylim(min(centres) - 0.3, max(centres) + 0.3)
    ax.set_xlabel("time (s)")
    ax.set_ylabel("time difference, last - first mic (ms)")
    ax.set_title(title, fontsize=10)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    return _png_bytes(fig, fmt)


# --------------------------------------------------------------------------- pages


@dataclass(frozen=True)
class Table:
    """A table of preformatted cells with an optional caption."""

    columns: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    caption: str = ""


@dataclass(frozen=True)
class Image:
    """A PNG image. ``name`` is a file-name stem for pages that link images."""

    png: bytes
    name: str
    caption: str = ""
    alt: str = ""


Block = str | Table | Image


@dataclass(frozen=True)
class Section:
    """A heading and its blocks; a ``str`` block is one plain-text paragraph,
    a ``str`` starting with ``"! "`` is a caution, drawn boxed."""

    heading: str
    blocks: tuple[Block, ...]


_CSS = """
body{font-family:system-ui,sans-serif;max-width:1200px;margin:2em auto;padding:0 1em;
color:#222;line-height:1.45}
table{border-collapse:collapse;margin:1em 0;font-size:0.92em}
th,td{border:1px solid #bbb;padding:0.3em 0.6em;text-align:right}
th:first-child,td:first-child{text-align:left}
th{background:#eee}
caption{caption-side:bottom;text-align:left;font-size:0.88em;color:#555;padding-top:0.4em}
figure{margin:1.2em 0}
figure img{max-width:100%;height:auto;border:1px solid #ddd}
figcaption{font-size:0.88em;color:#555}
.caution{border-left:5px solid #c60;background:#fff4e6;padding:0.6em 1em}
"""


def _html_block(block: Block) -> str:
    esc = html.escape
    if isinstance(block, Table):
        head = "".join(f'<th scope="col">{esc(c)}</th>' for c in block.columns)
        body = "".join(
            "<tr>" + "".join(f"<td>{esc(cell)}</td>" for cell in row) + "</tr>"
            for row in block.rows
        )
        cap = f"<caption>{esc(block.caption)}</caption>" if block.caption else ""
        return f"<table>{cap}<thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"
    if isinstance(block, Image):
        data = base64.b64encode(block.png).decode("ascii")
        cap = f"<figcaption>{esc(block.caption)}</figcaption>" if block.caption else ""
        alt = esc(block.alt or block.caption or block.name)
        return f'<figure><img src="data:image/png;base64,{data}" alt="{alt}">{cap}</figure>'
    if block.startswith("! "):
        return f'<p class="caution">{esc(block[2:])}</p>'
    return f"<p>{esc(block)}</p>"


def html_page(title: str, sections: Sequence[Section]) -> str:
    """A complete, self-contained HTML5 document (inline CSS, base64 PNG images)."""
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{html.escape(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{html.escape(title)}</h1>",
    ]
    for section in sections:
        parts.append(f"<section><h2>{html.escape(section.heading)}</h2>")
        parts.extend(_html_block(b) for b in section.blocks)
        parts.append("</section>")
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def _md_cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def markdown_page(title: str, sections: Sequence[Section], image_paths: Mapping[str, str]) -> str:
    """The same page as Markdown; images link to ``image_paths[image.name]``."""
    lines = [f"# {title}", ""]
    for section in sections:
        lines += [f"## {section.heading}", ""]
        for block in section.blocks:
            if isinstance(block, Table):
                lines.append("| " + " | ".join(_md_cell(c) for c in block.columns) + " |")
                lines.append("|" + "|".join("---" for _ in block.columns) + "|")
                lines += ["| " + " | ".join(_md_cell(c) for c in row) + " |" for row in block.rows]
                if block.caption:
                    lines += ["", f"*{block.caption}*"]
            elif isinstance(block, Image):
                alt = (block.alt or block.name).replace("[", "(").replace("]", ")")
                lines.append(f"![{alt}]({image_paths[block.name]})")
                if block.caption:
                    lines += ["", f"*{block.caption}*"]
            elif block.startswith("! "):
                lines.append(f"> **Caution.** {block[2:]}")
            else:
                lines.append(block)
            lines.append("")
    return "\n".join(lines)
