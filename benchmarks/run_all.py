"""Run every benchmark in this folder, one after the other (`make bench`)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
SCRIPTS = [
    ["bench_estimators.py"],
    ["bench_engine.py", "--memory"],
    ["quality_rooms.py"],
    ["quality_varied.py"],
    ["bench_plugin.py"],
    ["bench_batch.py"],
]


def main() -> int:
    failed = []
    for script, *args in SCRIPTS:
        path = HERE / script
        if not path.exists():
            print(f"== {script}: not present, skipped")
            continue
        print(f"== {script} {' '.join(args)}", flush=True)
        if subprocess.run([sys.executable, str(path), *args]).returncode != 0:
            failed.append(script)
    if failed:
        print("failed: " + ", ".join(failed))
    return 1 if failed else 0


if __name__ == "__main__":
    raise SystemExit(main())
