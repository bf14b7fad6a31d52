"""The report of ``liftmag compare``: its tables, text, figures, summary and output folder.

Built from an :class:`liftmag.abcompare.Comparison` (computed in memory first) with the page
blocks of :mod:`liftmag.report`. :func:`write_comparison` stages every output (blind files,
key, figures, pages, scores) and puts them in place together, so an error leaves nothing
behind; ``liftmag.commands.compare`` reads the inputs, calls this and prints.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import re
import time
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path

import numpy as np

from liftmag import abcompare, audio_io, report
from liftmag.report import Image, Section, Table

__all__ = [
    "BLIND_DIR",
    "FIGURES_DIR",
    "KEY_JSON",
    "LISTENING_CAUTION",
    "ORIGINALS_CAUTION",
    "REPORT_HTML",
    "REPORT_MD",
    "SCORES_JSON",
    "SCORE_EXPLANATIONS",
    "build_sections",
    "figures",
    "human_lines",
    "planned_outputs",
    "score_rows",
    "stale_takes",
    "summary",
    "write_comparison",
]

LISTENING_CAUTION = (
    "Listening level: start with the monitor turned low and raise it slowly. The files "
    "are matched in loudness, but any of them can still hold loud transients (clicks, "
    "bumps, plosives); never listen at a level that is uncomfortable."
)
ORIGINALS_CAUTION = (
    "Enhanced audio is not the original recording. Keep the unprocessed files; "
    "forensic or evidential use needs the original, unprocessed file."
)

REPORT_HTML = "report.html"
REPORT_MD = "report.md"
SCORES_JSON = "scores.json"
KEY_JSON = "blind-key.json"
BLIND_DIR = "blind"
FIGURES_DIR = "figures"
_TAKE_RE = re.compile(r"^take-[0-9]+\.wav$")


def _num(value: float | None, digits: int = 1, signed: bool = False) -> str:
    if value is None:
        return "-"
    if math.isnan(value):
        return "n/a"
    if math.isinf(value):
        return "-inf" if value < 0 else "+inf"
    return f"{value:+.{digits}f}" if signed else f"{value:.{digits}f}"


def _json_number(value: float | None) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    return round(float(value), 4)


SCORE_EXPLANATIONS = (
    "Noise-floor change: level of the version minus level of the original in the noise-only "
    "region, in dB. Negative means less noise. 'At matched loudness' adds the gain used for "
    "listening, i.e. how much quieter the noise is when the speech plays equally loud.",
    "Speech level change: the same measurement over the speech-active part, in dB. Removing "
    "noise lowers it a little; a drop of several dB suggests speech itself was attenuated "
    "(an overall gain change of the version shows up here too).",
    "WADA SNR: a blind estimate of speech-to-noise ratio from the shape of the waveform's "
    "amplitude distribution (Kim & Stern 2008), in dB. Needs no clean reference; it assumes "
    "steady, roughly Gaussian noise and can be several dB off on processed audio.",
    "Kurtosis ratio: how peaky the remaining noise's spectrum is over time, after processing "
    "relative to before (Uemura et al. 2009). Near 1: the noise kept its character. Well above "
    "1: isolated tonal blips ('musical noise') are likely audible. It needs a truly "
    "noise-only region: any trace of speech there (onsets, tails) inflates it strongly, so "
    "give --noise-region over room tone when in doubt.",
    "With a clean reference: SI-SDR (scale-invariant signal-to-distortion ratio, dB, higher is "
    "better), STOI and ESTOI (predicted intelligibility, 0 to 1, higher is better) and PESQ-WB "
    "(ITU-T P.862.2 predicted quality, about 1 to 4.6, higher is better).",
    "Scores are pointers, not verdicts: listen, blind, before choosing.",
)


def score_rows(
    comparison: abcompare.Comparison, with_clean: bool
) -> tuple[tuple[str, ...], list[tuple[str, ...]]]:
    """Column names and one row of formatted scores per version."""
    cols = [
        "version",
        "noise floor change (dB)",
        "at matched loudness (dB)",
        "speech level change (dB)",
        "WADA SNR (dB)",
        "kurtosis ratio",
    ]
    if with_clean:
        cols += ["SI-SDR (dB)", "STOI", "ESTOI", "PESQ-WB"]
    rows = []
    for name in comparison.names:
        s = comparison.scores[name]
        row = [
            name,
            _num(s.noise_floor_change_db, signed=True),
            _num(s.noise_floor_change_matched_db, signed=True),
            _num(s.speech_level_change_db, signed=True),
            _num(s.wada_snr_db),
            _num(s.kurtosis_ratio, 2),
        ]
        if with_clean:
            row += [_num(s.si_sdr_db), _num(s.stoi, 3), _num(s.estoi, 3), _num(s.pesq_wb, 2)]
        rows.append(tuple(row))
    return tuple(cols), rows


def alignment_rows(comparison: abcompare.Comparison) -> list[tuple[str, ...]]:
    """Per version: delay, correlation, loudness, listening gain and peak, formatted."""
    rows = []
    loud = comparison.loudness
    for name in comparison.names:
        a = comparison.alignments.get(name)
        rows.append(
            (
                name,
                "0" if a is None else str(a.delay_samples),
                "0.00" if a is None else f"{a.delay_ms:.2f}",
                "1.00" if a is None else f"{a.peak_correlation:.2f}",
                _num(loud.loudness_lufs[name]),
                _num(loud.gain_db[name], 2, signed=True),
                _num(loud.peak_dbfs_after[name], signed=True),
            )
        )
    return rows


def summary(
    comparison: abcompare.Comparison,
    sources: Mapping[str, Path],
    channel: int,
    outputs: Mapping[str, str],
) -> dict:
    """The ``scores.json`` document (also what ``--json`` prints).

    ``sources`` maps each name (``original``, ``liftmag``, the others, ``clean``) to the file
    it was read from; ``channel`` is the channel used of multichannel files.
    """
    fs = comparison.fs_hz
    regions = comparison.regions
    loud = comparison.loudness
    versions = []
    for name in comparison.names:
        a = comparison.alignments.get(name)
        s = comparison.scores[name]
        versions.append(
            {
                "name": name,
                "file": str(sources[name]),
                "delay_samples": 0 if a is None else a.delay_samples,
                "delay_ms": 0.0 if a is None else round(a.delay_ms, 3),
                "polarity": 1 if a is None else a.polarity,
                "peak_correlation": 1.0 if a is None else _json_number(a.peak_correlation),
                "loudness_lufs": _json_number(loud.loudness_lufs[name]),
                "gain_db": _json_number(loud.gain_db[name]),
                "peak_dbfs_after_gain": _json_number(loud.peak_dbfs_after[name]),
                "scores": {
                    "noise_floor_change_db": _json_number(s.noise_floor_change_db),
                    "noise_floor_change_matched_db": _json_number(s.noise_floor_change_matched_db),
                    "speech_level_change_db": _json_number(s.speech_level_change_db),
                    "wada_snr_db": _json_number(s.wada_snr_db),
                    "kurtosis_ratio": _json_number(s.kurtosis_ratio),
                    "si_sdr_db": _json_number(s.si_sdr_db),
                    "stoi": _json_number(s.stoi),
                    "estoi": _json_number(s.estoi),
                    "pesq_wb": _json_number(s.pesq_wb),
                },
            }
        )
    clean = None
    if comparison.clean_alignment is not None:
        ca = comparison.clean_alignment
        clean = {
            "file": str(sources["clean"]),
            "delay_samples": ca.delay_samples,
            "delay_ms": round(ca.delay_ms, 3),
        }
    return {
        "format": "liftmag-compare",
        "format_version": 1,
        "sample_rate_hz": int(fs),
        "channel": channel,
        "duration_s": round(comparison.aligned["original"].size / fs, 3),
        "noise_region": {
            "found_automatically": regions.noise_found_automatically,
            "intervals_s": [[round(a, 3), round(b, 3)] for a, b in regions.noise_intervals_s(fs)],
            "total_s": round(regions.noise.sum() / fs, 3),
        },
        "speech_active_s": round(regions.speech.sum() / fs, 3),
        "common_reduction_db": _json_number(comparison.loudness.common_reduction_db),
        "clean": clean,
        "versions": versions,
        "notes": list(comparison.notes),
        "outputs": dict(outputs),
        "cautions": [LISTENING_CAUTION, ORIGINALS_CAUTION],
    }


def build_sections(
    comparison: abcompare.Comparison,
    original_path: Path,
    figures: Mapping[str, bytes],
    with_clean: bool,
) -> list[Section]:
    """The report's sections, for :func:`liftmag.report.html_page` and ``markdown_page``."""
    fs = comparison.fs_hz
    regions = comparison.regions
    cols, rows = score_rows(comparison, with_clean)
    intro = (
        f"Original take: {original_path.name} ({fs:g} Hz, "
        f"{comparison.aligned['original'].size / fs:.2f} s). Compared: "
        + ", ".join(n for n in comparison.names if n != "original")
        + ". Each version was aligned to the original, and all scores refer to the "
        "original's noise-only and speech-active parts."
    )
    noise_how = (
        "found automatically from the quietest frames"
        if regions.noise_found_automatically
        else "as given with --noise-region"
    )
    sections = [
        Section(
            "Summary",
            (
                intro,
                "! " + ORIGINALS_CAUTION,
                "! " + LISTENING_CAUTION,
            ),
        ),
        Section(
            "Scores",
            (
                Table(
                    cols,
                    tuple(rows),
                    caption=f"Noise-only region: {regions.noise.sum() / fs:.2f} s, {noise_how}; "
                    f"speech-active part: {regions.speech.sum() / fs:.2f} s.",
                ),
                *SCORE_EXPLANATIONS,
            ),
        ),
        Section(
            "Alignment and loudness",
            (
                Table(
                    (
                        "version",
                        "delay (samples)",
                        "delay (ms)",
                        "correlation",
                        "speech loudness (LUFS)",
                        "listening gain (dB)",
                        "peak after gain (dBFS)",
                    ),
                    tuple(alignment_rows(comparison)),
                    caption="Delay: how late each version is relative to the original "
                    "(cross-correlation, to the sample). Loudness: ITU-R BS.1770 integrated "
                    "loudness of the speech-active part. The listening gain brings each "
                    "version to the original's loudness.",
                ),
                *(
                    [
                        f"All listening gains include a common reduction of "
                        f"{-comparison.loudness.common_reduction_db:.1f} dB so that no file clips."
                    ]
                    if comparison.loudness.common_reduction_db < 0
                    else []
                ),
            ),
        ),
        Section(
            "Level over time",
            (
                Image(
                    figures["level-over-time"],
                    "level-over-time",
                    alt="Level over time of the original and each version",
                    caption="Short-term level of the original and of each aligned version as "
                    "delivered (before loudness matching). Grey: the noise-only region.",
                ),
            ),
        ),
        Section(
            "Spectrograms",
            tuple(
                Image(
                    figures[f"spectrogram-{name}"],
                    f"spectrogram-{name}",
                    alt=f"Spectrograms of the original, {name}, and what {name} removed",
                    caption=f"Left: original. Middle: {name}, aligned, as delivered. Right: "
                    f"what {name} removed (original minus aligned {name}); all on one colour "
                    "scale. Speech in the right panel means speech was removed or changed in "
                    "level.",
                )
                for name in comparison.names
                if name != "original"
            ),
        ),
        Section(
            "Blind listening",
            (
                f"The folder {BLIND_DIR}/ holds every version, the original included, matched "
                "in loudness and under neutral shuffled names (take-1.wav, ...). All have the "
                f"same length, format and time stamp. The key is in {KEY_JSON}: do not open it "
                "before listening; 'liftmag compare --reveal "
                f"{KEY_JSON}' prints which file is which.",
                "! " + LISTENING_CAUTION,
            ),
        ),
    ]
    if comparison.notes:
        sections.append(Section("Notes", tuple(comparison.notes)))
    return sections


def planned_outputs(out_dir: Path, n_takes: int, image_names: list[str]) -> list[Path]:
    """Every file a comparison of ``n_takes`` takes writes into ``out_dir``."""
    paths = [out_dir / REPORT_HTML, out_dir / REPORT_MD, out_dir / SCORES_JSON, out_dir / KEY_JSON]
    paths += [out_dir / BLIND_DIR / f"take-{i + 1}.wav" for i in range(n_takes)]
    paths += [out_dir / FIGURES_DIR / f"{name}.png" for name in image_names]
    return paths


def stale_takes(out_dir: Path, planned: list[Path]) -> list[Path]:
    """Blind files of an earlier, larger comparison in ``out_dir`` that this one removes."""
    blind = out_dir / BLIND_DIR
    if not blind.is_dir():
        return []
    keep = {p.name for p in planned if p.parent == blind}
    return sorted(p for p in blind.iterdir() if _TAKE_RE.match(p.name) and p.name not in keep)


def _stage_wav(staging: audio_io.StagedOutputs, final: Path, x: np.ndarray, fs_hz: int) -> Path:
    import soundfile as sf

    # 24-bit PCM: no float PEAK chunk (it carries a time stamp), and the
    # quantisation error (about -144 dBFS) is far below anything audible.
    temp = staging.file(final)
    sf.write(str(temp), x, fs_hz, format="WAV", subtype="PCM_24")
    return temp


def figures(
    comparison: abcompare.Comparison,
    progress: Callable[[Iterable, str], Iterable] | None = None,
) -> dict[str, bytes]:
    """PNG figures by name: one spectrogram row per version and the level over time."""
    progress = progress or (lambda items, _desc: items)
    fs = comparison.fs_hz
    x = comparison.aligned["original"]
    pngs: dict[str, bytes] = {}
    versions = [n for n in comparison.names if n != "original"]
    for name in progress(versions, "spectrograms"):
        v = comparison.aligned[name]
        pngs[f"spectrogram-{name}"] = report.spectrogram_row_png(
            [("original", x), (name, v), (f"removed by {name}", x - v)], fs
        )
    pngs["level-over-time"] = report.level_over_time_png(
        [(n, comparison.aligned[n]) for n in comparison.names],
        fs,
        shade_s=comparison.regions.noise_intervals_s(fs),
    )
    return pngs


def write_comparison(
    out_dir: Path,
    comparison: abcompare.Comparison,
    sources: Mapping[str, Path],
    pngs: Mapping[str, bytes],
    labels: Mapping[str, str],
    summary_doc: dict,
    stale: list[Path],
    with_clean: bool,
) -> None:
    """Write the whole report folder, all files or none, then remove ``stale`` blind files.

    ``labels`` maps neutral labels to version names (:func:`abcompare.blind_labels`);
    ``summary_doc`` is :func:`summary`'s document. Raises ``AudioOutputError`` (or
    ``OSError``) with nothing written if any file cannot be.
    """
    sections = build_sections(comparison, sources["original"], pngs, with_clean)
    title = "liftmag compare: " + sources["original"].name
    fs = int(comparison.fs_hz)
    blind_paths = []
    with audio_io.StagedOutputs() as staging:
        staging.ensure_dir(out_dir)
        # Written in label order, so creation order (and inode numbers) follow
        # the neutral labels, not the versions behind them.
        takes = []
        for label in abcompare.blind_label_order(labels):
            name = labels[label]
            path = out_dir / BLIND_DIR / f"{label}.wav"
            temp = _stage_wav(staging, path, comparison.matched[name], fs)
            blind_paths.append(path)
            takes.append(abcompare.BlindTake(
                file=path.name, name=name, source=str(sources[name].resolve()),
                gain_db=comparison.loudness.gain_db[name], sha256=audio_io.sha256_file(temp),
            ))
        staging.write_text(out_dir / KEY_JSON, abcompare.blind_key_json(BLIND_DIR, takes))
        for name, png in pngs.items():
            staging.write_bytes(out_dir / FIGURES_DIR / f"{name}.png", png)
        staging.write_text(out_dir / REPORT_HTML, report.html_page(title, sections))
        image_paths = {name: f"{FIGURES_DIR}/{name}.png" for name in pngs}
        staging.write_text(out_dir / REPORT_MD, report.markdown_page(title, sections, image_paths))
        staging.write_text(out_dir / SCORES_JSON, json.dumps(summary_doc, indent=2) + "\n")
    for path in stale:
        with contextlib.suppress(OSError):
            path.unlink()
    # One shared, whole-second modification time: the files' times say nothing
    # about which version is which.
    stamp_ns = int(time.time()) * 1_000_000_000
    for path in blind_paths:
        os.utime(path, ns=(stamp_ns, stamp_ns))


def human_lines(comparison: abcompare.Comparison, out_dir: Path, with_clean: bool) -> list[str]:
    """What ``liftmag compare`` prints for a reader: scores table, delays, notes, cautions."""
    cols, rows = score_rows(comparison, with_clean)
    widths = [max(len(c), *(len(r[i]) for r in rows)) for i, c in enumerate(cols)]
    lines = ["  ".join(c.ljust(w) for c, w in zip(cols, widths, strict=True))]
    for r in rows:
        lines.append("  ".join(v.ljust(w) for v, w in zip(r, widths, strict=True)))
    lines.append("")
    for name in comparison.names:
        a = comparison.alignments.get(name)
        if a is not None:
            lines.append(
                f"{name}: delay {a.delay_samples} samples ({a.delay_ms:.2f} ms), "
                f"listening gain {comparison.loudness.gain_db[name]:+.2f} dB"
            )
    lines += [f"note: {note}" for note in comparison.notes]
    lines.append(f"report: {out_dir / REPORT_HTML}  (also {REPORT_MD}, {SCORES_JSON})")
    lines.append(f"blind listening: {out_dir / BLIND_DIR}/  key: {out_dir / KEY_JSON}")
    lines.append(f"caution: {LISTENING_CAUTION}")
    lines.append(f"caution: {ORIGINALS_CAUTION}")
    return lines
