"""``liftmag study``: Monte-Carlo RMSE of the magnitude estimate versus input SNR."""

from __future__ import annotations

import argparse
import csv
import json
import sys
from pathlib import Path

from liftmag.commands.pattern import check_bearings, parse_float_list
from liftmag.errors import UserError

HELP = """\
Monte-Carlo study of how well each estimator recovers a fixed magnitude A = 1 (uniform
random phase) from one narrowband bin of a uniform linear array (target broadside), versus
the input SNR at the reference microphone. Reports the RMSE of |A^ - A| as a fraction of A,
its standard error and the bias. Second-order noise statistics are the exact model values;
fourth-order statistics (lifted estimators) are estimated from --stats-samples independent
noise-only snapshots (0: exact). linear-wiener, lifted-wiener and lifted-mv are told the
true A; linear-wiener-fixed and lifted-wiener-fixed learn it iteratively, starting from the
reference microphone's mean power. Writes study.csv, study.json and study.png into --out.
"""

UNITS = "RMSE and bias of the magnitude estimate, as a fraction of the true magnitude A"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    from liftmag.study import NOISE_HELP, NOISE_KINDS, STUDY_ESTIMATORS, StudyConfig

    d = StudyConfig()
    parser.add_argument(
        "--noise", choices=NOISE_KINDS, default=d.noise,
        help="; ".join(f"{k}: {v}" for k, v in NOISE_HELP.items()) + " (default %(default)s)",
    )
    parser.add_argument(
        "--estimators", default=",".join(STUDY_ESTIMATORS),
        help="comma list (default: all of %(default)s)",
    )
    parser.add_argument(
        "--snr-db", action="append", default=None,
        help="input SNRs in dB, repeatable or comma list; write --snr-db=-10,0 when the "
        "list starts with a minus sign (default " + ",".join(f"{x:g}" for x in d.snr_db) + ")",
    )
    parser.add_argument("--mics", type=int, default=d.n_mics,
                        help="microphones of the uniform linear array (default %(default)s)")
    parser.add_argument("--mic-spacing-m", type=float, default=d.mic_spacing_m,
                        help="array spacing in metres (default %(default)s)")
    parser.add_argument("--frequency-hz", type=float, default=d.frequency_hz,
                        help="frequency of the narrowband bin (default %(default)s)")
    parser.add_argument("--interferer-deg", action="append", default=None,
                        help="bearings of the two-interferers sources and of the lifted-nulls "
                        "nulls, 0..180 (default 0,180)")
    parser.add_argument("--self-noise-db", type=float, default=d.self_noise_db,
                        help="two-interferers: white self-noise power relative to one "
                        "interferer, dB (default %(default)s)")
    parser.add_argument("--realisations", type=int, default=d.realisations,
                        help="Monte-Carlo realisations per SNR, at least 100 "
                        "(default %(default)s)")
    parser.add_argument("--stats-samples", type=int, default=d.stats_samples,
                        help="noise-only snapshots for the fourth-order statistics; 0 = exact "
                        "(default %(default)s)")
    parser.add_argument("--seed", type=int, default=d.seed, help="random seed (default 0)")
    parser.add_argument("--tolerance", type=float, default=d.tolerance,
                        help="relative change of A^2 that stops the iterations "
                        "(default %(default)s)")
    parser.add_argument("--max-iterations", type=int, default=d.max_iterations,
                        help="iteration limit of the fixed-magnitude estimators "
                        "(default %(default)s)")
    parser.add_argument("--out", default="liftmag-study",
                        help="directory for study.csv, study.json, study.png "
                        "(default ./%(default)s/)")
    parser.add_argument("--json", action="store_true",
                        help="print the results as JSON on stdout")


def _config(args: argparse.Namespace):
    from liftmag.study import StudyConfig

    names = tuple(e.strip() for e in args.estimators.split(",") if e.strip())
    snr_db = tuple(parse_float_list(args.snr_db, "--snr-db")) if args.snr_db else None
    interferers = (
        tuple(parse_float_list(args.interferer_deg, "--interferer-deg"))
        if args.interferer_deg else (0.0, 180.0)
    )
    check_bearings(interferers, "--interferer-deg")
    if args.mics < 2:
        raise UserError(f"an array needs at least 2 microphones, got --mics {args.mics}")
    if args.realisations < 100:
        raise UserError(f"--realisations must be at least 100, got {args.realisations}")
    if args.seed < 0:
        raise UserError(f"--seed must be >= 0, got {args.seed}")
    if "lifted-nulls" in names and not interferers:
        raise UserError("lifted-nulls needs at least one --interferer-deg bearing")
    kwargs = {
        "noise": args.noise, "estimators": names, "n_mics": args.mics,
        "mic_spacing_m": args.mic_spacing_m, "frequency_hz": args.frequency_hz,
        "interferer_deg": interferers, "self_noise_db": args.self_noise_db,
        "realisations": args.realisations, "stats_samples": args.stats_samples,
        "seed": args.seed, "tolerance": args.tolerance, "max_iterations": args.max_iterations,
    }
    if snr_db is not None:
        kwargs["snr_db"] = snr_db
    try:
        return StudyConfig(**kwargs)
    except ValueError as exc:
        raise UserError(str(exc)) from None


def result_document(result) -> dict:
    """The JSON document of a :class:`liftmag.study.StudyResult`."""
    from liftmag.study import START_GUESS

    cfg = result.config
    names = cfg.estimators
    iterative = sorted({k for p in result.points for k in p.iterations})
    return {
        "snr_db": [p.snr_db for p in result.points],
        "noise": cfg.noise,
        "units": UNITS,
        "rmse": {e: [p.rmse[e] for p in result.points] for e in names},
        "rmse_se": {e: [p.rmse_se[e] for p in result.points] for e in names},
        "bias": {e: [p.bias[e] for p in result.points] for e in names},
        "iterations": {e: [p.iterations[e].iterations for p in result.points] for e in iterative},
        "converged": {e: [p.iterations[e].converged for p in result.points] for e in iterative},
        "magnitude_sq_estimate": {
            e: [p.iterations[e].magnitude_sq for p in result.points] for e in iterative
        },
        "start_guess": START_GUESS,
        "config": {
            "mics": cfg.n_mics, "mic_spacing_m": cfg.mic_spacing_m,
            "frequency_hz": cfg.frequency_hz, "target_deg": cfg.target_deg,
            "interferer_deg": list(cfg.interferer_deg), "self_noise_db": cfg.self_noise_db,
            "realisations": cfg.realisations, "stats_samples": cfg.stats_samples,
            "seed": cfg.seed, "magnitude": cfg.magnitude, "tolerance": cfg.tolerance,
            "max_iterations": cfg.max_iterations,
        },
    }


def _write_csv(path: Path, result) -> None:
    with path.open("w", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow(["noise", "snr_db", "estimator", "rmse_fraction_of_a",
                         "rmse_se", "bias_fraction_of_a", "iterations", "converged"])
        for p in result.points:
            for e in result.config.estimators:
                it = p.iterations.get(e)
                writer.writerow([
                    result.config.noise, f"{p.snr_db:g}", e, f"{p.rmse[e]:.6g}",
                    f"{p.rmse_se[e]:.3g}", f"{p.bias[e]:.6g}",
                    "" if it is None else it.iterations, "" if it is None else it.converged,
                ])


def _table(doc: dict) -> str:
    names = list(doc["rmse"])
    width = max(len(n) for n in names) + 2
    lines = [f"RMSE of |A^ - A| (fraction of A), noise: {doc['noise']}",
             "SNR dB".ljust(width) + "".join(f"{s:>9g}" for s in doc["snr_db"])]
    for n in names:
        lines.append(n.ljust(width) + "".join(f"{v:9.4f}" for v in doc["rmse"][n]))
    for n, its in doc["iterations"].items():
        conv = "all converged" if all(doc["converged"][n]) else "NOT all converged"
        lines.append(f"{n}: iterations {its} ({conv})")
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    from tqdm import tqdm

    from liftmag.plots import study_figure
    from liftmag.study import run_study

    config = _config(args)
    out_dir = Path(args.out)
    if out_dir.exists() and not out_dir.is_dir():
        raise UserError(f"--out {out_dir} exists and is not a directory")
    # The bar appears only if the run takes more than about two seconds.
    with tqdm(total=len(config.snr_db), desc="SNR points", unit="snr", file=sys.stderr,
              delay=2.0, leave=False) as bar:
        try:
            result = run_study(config, progress=lambda done, total: bar.update(1))
        except (ValueError, ArithmeticError) as exc:
            raise UserError(str(exc).splitlines()[0]) from None
    doc = result_document(result)
    out_dir.mkdir(parents=True, exist_ok=True)
    (out_dir / "study.json").write_text(json.dumps(doc, indent=1) + "\n")
    _write_csv(out_dir / "study.csv", result)
    study_figure(
        out_dir / "study.png", doc["snr_db"], doc["rmse"], doc["rmse_se"],
        title=f"{config.noise} noise, {config.n_mics} mics, {config.realisations} "
        f"realisations per SNR",
    )
    if args.json:
        json.dump(doc, sys.stdout)
        sys.stdout.write("\n")
    else:
        print(_table(doc))
        print(f"wrote {out_dir / 'study.csv'}, {out_dir / 'study.json'}, "
              f"{out_dir / 'study.png'}")
    return 0
