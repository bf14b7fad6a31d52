"""Development runs for the competing-talker work: a design drawn apart from the judged one."""

from __future__ import annotations

import dataclasses
import json
import sys
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import quality_varied  # noqa: E402
import varied_scenes  # noqa: E402


def dev_specs(kinds=("competing-talker",), per_kind=6) -> list:
    specs = varied_scenes.design(per_kind=per_kind, seed=4242, n_long=0, n_48k=1, kinds=kinds)
    return [dataclasses.replace(s, seed=s.seed + 500) for s in specs]


def main(argv: list[str]) -> None:
    kinds = tuple(argv[0].split(",")) if argv else ("competing-talker",)
    workflows = tuple(argv[1].split(",")) if len(argv) > 1 else ("nothing",)
    out = argv[2] if len(argv) > 2 else "/tmp/talker_dev.json"
    baseline = "--baseline" in argv
    specs = dev_specs(kinds)
    jobs = [(s, workflows, (None,), baseline) for s in specs]
    rows = []
    with ProcessPoolExecutor(2) as pool:
        for res in pool.map(quality_varied.scene_rows, *zip(*jobs, strict=True)):
            rows += res
    Path(out).write_text(json.dumps(rows, default=float))
    print(quality_varied.comparison_tables(rows))


if __name__ == "__main__":
    main(sys.argv[1:])
