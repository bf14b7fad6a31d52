"""``liftmag plugin``: install the LV2 plugin bundle, or show what is installed."""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
from pathlib import Path
from typing import Any

from liftmag_lv2.bundle import BUILD_INFO, BUNDLE_NAME, read_build_info, source_digest

from liftmag.audio_io import StagedOutputs

HELP = (
    "Install the LV2 plugin (urn:liftmag:dialogue-2ch and -4ch) so audio editors that host "
    "LV2 effects can apply liftmag to a selection, or show what is installed. The plugin "
    "is meant for offline rendering: it runs the same Python engine as `liftmag process` "
    "and is not hard real-time capable."
)

# Start of the plugin's log lines that list control values it did not take as they were
# (plugin/liftmag_lv2/bridge.py writes them; a test checks that the two agree).
CONTROLS_NOTE = "control values replaced"
RECENT_NOTES = 5
# lilv's default search path on Linux, used when LV2_PATH is unset (lilv, src/lilv_config.h).
DEFAULT_LV2_PATH = ("~/.lv2", "/usr/local/lib/lv2", "/usr/lib/lv2")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    sub = parser.add_subparsers(dest="action", metavar="ACTION", required=True)
    install = sub.add_parser(
        "install", help="build the bundle if needed and copy it into an LV2 folder",
        description="Build the bundle if it is missing or older than the installed liftmag "
                    "(in a source checkout build/liftmag.lv2, else in ~/.cache/liftmag), then "
                    "copy it to DEST/liftmag.lv2 (replacing an earlier liftmag install). "
                    "Building needs a C compiler, the Python headers and the LV2 headers.",
    )
    install.add_argument("--dest", type=Path, default=None,
                         help="LV2 folder to install into (default: ~/.lv2)")
    install.add_argument("--rebuild", action="store_true",
                         help="build the bundle even if it looks current")
    install.add_argument("--bundle", type=Path, default=None,
                         help="install this already built liftmag.lv2 instead of building")
    info = sub.add_parser("info", help="show installed liftmag bundles and their build",
                          description="List liftmag bundles in DEST and in LV2_PATH.")
    info.add_argument("--dest", type=Path, default=None,
                      help="also look in this LV2 folder (default: ~/.lv2)")
    info.add_argument("--json", action="store_true", help="print JSON on stdout")


def default_dest() -> Path:
    # Path.home() falls back to the password database when HOME is unset (env -i).
    return Path.home() / ".lv2"


def log_file() -> Path:
    """Where the plugin logs (the same rule as liftmag/lv2/shim.c)."""
    state = os.environ.get("XDG_STATE_HOME", "")
    if state.startswith("/"):
        return Path(state) / "liftmag" / "lv2-plugin.log"
    return Path.home() / ".cache" / "liftmag" / "lv2-plugin.log"


def recent_control_notes(path: Path, limit: int = RECENT_NOTES) -> list[str]:
    """The latest log lines about replaced control values (oldest first)."""
    try:
        text = path.read_text(errors="replace")
    except OSError:
        return []
    return [line for line in text.splitlines() if CONTROLS_NOTE in line][-limit:]


def lv2_search_path() -> list[Path]:
    """The folders LV2 hosts built on lilv search (LV2_PATH, else lilv's default)."""
    text = os.environ.get("LV2_PATH")
    parts = text.split(os.pathsep) if text else list(DEFAULT_LV2_PATH)
    return [Path(p).expanduser() for p in parts if p]


def _ensure_bundle(rebuild: bool) -> Path:
    from liftmag_lv2 import build_shim
    from liftmag_lv2 import bundle as builder

    from liftmag.errors import UserError

    out = builder.default_out()
    if not rebuild and builder.is_current(out):
        return out
    missing = build_shim.missing_build_tools()
    if missing:
        raise UserError("building the plugin needs a C compiler, the Python headers and the "
                        f"LV2 headers; missing: {', '.join(missing)}")
    print(f"building {out} ...", file=sys.stderr)
    try:
        return builder.build_bundle(out)
    except Exception as exc:  # compiler and cffi errors come in many classes
        raise UserError(
            f"building the plugin failed ({exc.__class__.__name__}: {exc}); it needs a C "
            "compiler, the Python headers and the LV2 headers (Debian: gcc python3-dev lv2-dev)"
        ) from exc


def install(bundle: Path, dest: Path) -> Path:
    """Copy ``bundle`` to ``dest/liftmag.lv2`` whole (no half-copied bundle is ever seen)."""
    from liftmag.errors import UserError

    target = dest / BUNDLE_NAME
    if target.exists() and read_build_info(target) is None:
        raise UserError(f"{target} exists and is not a liftmag bundle; not replacing it")
    with StagedOutputs() as staging:  # replaced whole on commit, nothing half-copied
        copied = staging.stage_dir(target)
        shutil.copytree(bundle, copied, ignore=shutil.ignore_patterns("__pycache__"),
                        dirs_exist_ok=True)
        os.chmod(copied, 0o755)
    return target


def _bundles(dest: Path) -> list[Path]:
    seen: list[Path] = []
    for folder in [dest, *lv2_search_path()]:
        candidate = (folder / BUNDLE_NAME).resolve()
        if candidate not in seen and (candidate / BUILD_INFO).is_file():
            seen.append(candidate)
    return seen


def describe(bundle: Path) -> dict[str, Any]:
    """What ``liftmag plugin info`` reports for one bundle."""
    info = read_build_info(bundle) or {}
    python = info.get("venv_python", "")
    record: dict[str, Any] = {
        "bundle": str(bundle),
        "plugins": [p.get("uri") for p in info.get("plugins", [])],
        "liftmag_version": info.get("liftmag_version"),
        "built_at": info.get("built_at"),
        "python": python,
        "python_present": bool(python) and os.access(python, os.X_OK),
        "block_frames": info.get("block_frames"),
        "in_lv2_path": any(bundle.parent == p.resolve() for p in lv2_search_path()),
        "current": None,
    }
    if python:
        record["current"] = source_digest(python) == info.get("source_digest")
    return record


def run(args: argparse.Namespace) -> int:
    from liftmag.errors import UserError

    dest = (args.dest or default_dest()).expanduser()
    if args.action == "install":
        if args.bundle is not None:
            bundle = args.bundle.expanduser().resolve()
            if read_build_info(bundle) is None:
                raise UserError(f"{bundle} is not a built liftmag bundle (no {BUILD_INFO})")
        else:
            bundle = _ensure_bundle(args.rebuild)
        target = install(bundle, dest)
        record = describe(target)
        print(f"installed {', '.join(record['plugins'])} into {target}")
        if not record["in_lv2_path"]:
            print(f"note: hosts do not look in {dest}; add it to LV2_PATH")
        if not record["python_present"]:
            print(f"warning: the plugin's Python ({record['python']}) is missing; it will "
                  "pass audio through unprocessed")
        print("The plugin is for offline rendering (not hard real-time). Enhanced audio is "
              "not the original: keep the original take and check levels before playback.")
        return 0

    records = [describe(b) for b in _bundles(dest)]
    notes = recent_control_notes(log_file())
    if args.json:
        json.dump({"bundles": records, "log_file": str(log_file()), "control_notes": notes},
                  sys.stdout, indent=2)
        sys.stdout.write("\n")
        return 0
    if not records:
        print(f"no liftmag bundle in {dest} or LV2_PATH; run `liftmag plugin install`")
    for r in records:
        state = {True: "yes", False: "no (run `liftmag plugin install` again)",
                 None: "unknown (no interpreter recorded)"}[r["current"]]
        print(f"{r['bundle']}")
        print(f"  plugins:        {', '.join(r['plugins'])}")
        print(f"  built:          {r['built_at']} (liftmag {r['liftmag_version']})")
        print(f"  python:         {r['python']}"
              + ("" if r["python_present"] else "  (MISSING: audio passes through)"))
        print(f"  block, frames:  {r['block_frames']} (part of the reported latency)")
        print(f"  in LV2 path:    {'yes' if r['in_lv2_path'] else 'no'}")
        print(f"  up to date:     {state}")
    print(f"log file: {log_file()}")
    if notes:
        print("control values the plugin did not take as given (latest last; a host that "
              "starts controls at 0 gets the defaults):")
        for line in notes:
            print(f"  {line}")
    return 0
