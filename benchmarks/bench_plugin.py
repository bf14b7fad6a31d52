"""LV2 plugin speed: lv2apply real-time factor, first-instance start-up, worst run() time.

* Real-time factor of lilv's ``lv2apply`` (which calls run() once per sample) on 60 s of
  48 kHz stereo with the default estimator, beside the engine alone (``process_array``),
  the same lv2apply run with the engine switched off (the plugin's dry path: no Python
  per block), and lv2apply with a bare copying plugin (what lv2apply itself costs: one
  libsndfile read and write per sample).
* First-instance start-up: instantiate() of the first instance in a fresh process (starts
  Python, imports numpy, scipy and liftmag, builds the engine), then of a second one.
* Per-call times from our test host (tests/lv2host) with run() block sizes 64, 256 and
  1024 frames: mean and worst. The plugin calls the engine once per 1024 frames, so the
  worst call is the one that carries a block's processing.

BLAS threads are pinned to 1, as in bench_engine.py. Target: real-time factor of at least
20x for lv2apply; the plugin is for offline rendering, so worst-call times are reported,
not promised.

    .venv/bin/python benchmarks/bench_plugin.py [--seconds 60] [--block-seconds 10]
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import shutil  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "tests"))
from lv2host import support  # noqa: E402

from liftmag.engine import process_array  # noqa: E402
from liftmag.settings import Settings  # noqa: E402

FS = 48000
TARGET_RTF = 20.0

# A bare stereo copy plugin: the floor of what any plugin costs under lv2apply.
COPY_C = r"""
#include <lv2/core/lv2.h>
#include <stdlib.h>
#include <string.h>
typedef struct { const float *in[2]; float *out[2]; } Copy;
static LV2_Handle make(const LV2_Descriptor *d, double rate, const char *path,
                       const LV2_Feature *const *features)
{ (void)d; (void)rate; (void)path; (void)features; return calloc(1, sizeof(Copy)); }
static void connect(LV2_Handle h, uint32_t port, void *data)
{ Copy *c = h; if (port < 2) c->in[port] = data; else c->out[port - 2] = data; }
static void run(LV2_Handle h, uint32_t n)
{ Copy *c = h; for (int i = 0; i < 2; ++i) memcpy(c->out[i], c->in[i], n * sizeof(float)); }
static void cleanup(LV2_Handle h) { free(h); }
static const LV2_Descriptor descriptor = {"urn:liftmag:bench:copy", make, connect, NULL, run,
                                          NULL, cleanup, NULL};
LV2_SYMBOL_EXPORT const LV2_Descriptor *lv2_descriptor(uint32_t i)
{ return i == 0 ? &descriptor : NULL; }
"""
COPY_TTL = """@prefix lv2: <http://lv2plug.in/ns/lv2core#> .
<urn:liftmag:bench:copy> a lv2:Plugin ; lv2:binary <copy.so> ; lv2:port
 [ a lv2:InputPort , lv2:AudioPort ; lv2:index 0 ; lv2:symbol "in_1" ; lv2:name "In 1" ] ,
 [ a lv2:InputPort , lv2:AudioPort ; lv2:index 1 ; lv2:symbol "in_2" ; lv2:name "In 2" ] ,
 [ a lv2:OutputPort , lv2:AudioPort ; lv2:index 2 ; lv2:symbol "out_1" ; lv2:name "Out 1" ] ,
 [ a lv2:OutputPort , lv2:AudioPort ; lv2:index 3 ; lv2:symbol "out_2" ; lv2:name "Out 2" ] .
"""


def copy_plugin(folder: Path) -> Path:
    """Build the copy plugin's bundle in ``folder/copy.lv2``; returns ``folder``."""
    bundle = folder / "copy.lv2"
    bundle.mkdir(parents=True)
    (bundle / "copy.c").write_text(COPY_C)
    (bundle / "manifest.ttl").write_text(COPY_TTL)
    subprocess.run(["gcc", "-shared", "-fPIC", "-O2", "-o", str(bundle / "copy.so"),
                    str(bundle / "copy.c")], check=True)
    return folder


def signal(seconds: float, seed: int = 0) -> np.ndarray:
    """Stereo noise with a gated tone (as in bench_engine.py), float32 values."""
    rng = np.random.default_rng(seed)
    n = int(seconds * FS)
    t = np.arange(n) / FS
    x = 0.05 * rng.standard_normal((2, n))
    x += 0.1 * np.sin(2 * np.pi * 220 * t) * (np.sin(2 * np.pi * 0.5 * t) > 0)
    return x.astype(np.float32).astype(np.float64)


def timed_lv2apply(x: np.ndarray, env: dict[str, str], workdir: Path,
                   uri: str = support.URI_2CH) -> float:
    t0 = time.perf_counter()
    support.lv2apply(uri, x, FS, env, workdir=workdir)
    return time.perf_counter() - t0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--seconds", type=float, default=60.0, help="lv2apply signal length")
    parser.add_argument("--block-seconds", type=float, default=10.0,
                        help="signal length for the per-call timing")
    parser.add_argument("--repeat", type=int, default=2,
                        help="runs of each measurement: times are the best run (the machine "
                             "may be shared), worst calls the worst over all runs")
    args = parser.parse_args(argv)
    if support.missing_tools():
        print(f"skipped: {support.skip_reason()}")
        return 0

    with tempfile.TemporaryDirectory(prefix="bench-plugin-") as tmp_name:
        tmp = Path(tmp_name)
        t0 = time.perf_counter()
        bundle = support.bundle()
        print(f"bundle built in {time.perf_counter() - t0:.1f} s: {bundle}")
        env = support.lv2_env(bundle.parent, tmp / "state")
        x = signal(args.seconds)

        dry_env = dict(env, **{support.bridge_module().TEST_FAULT_ENV: "import"})
        copy_env = support.lv2_env(copy_plugin(tmp / "copy"), tmp / "state")
        engine_s = plugin_s = dry_s = copy_s = float("inf")
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            process_array(x, FS, Settings())
            engine_s = min(engine_s, time.perf_counter() - t0)
            plugin_s = min(plugin_s, timed_lv2apply(x, env, tmp))
            dry_s = min(dry_s, timed_lv2apply(x, dry_env, tmp))
            copy_s = min(copy_s, timed_lv2apply(x, copy_env, tmp, "urn:liftmag:bench:copy"))

        host = support.compile_host(tmp)
        first = support.run_host(host, bundle, [support.Job(support.URI_2CH, FS, x[:, :FS],
                                                            {}, blocks="f1024")] * 2,
                                 tmp, env, tag="startup")
        start_first = first.timing_ms[(0, 0)]["instantiate"]
        start_second = first.timing_ms[(1, 0)]["instantiate"]

        xb = x[:, : int(args.block_seconds * FS)]
        rows = []
        for block in (64, 256, 1024):
            job = support.Job(support.URI_2CH, FS, xb, {}, blocks=f"f{block}")
            result = support.run_host(host, bundle, [job] * args.repeat, tmp, env,
                                      tag=f"b{block}")
            total = min(t["run"] for t in result.timing_ms.values())
            worst = max(t["worst_run"] for t in result.timing_ms.values())
            calls = -(-xb.shape[1] // block)
            rows.append((block, total / calls, worst, 1e3 * block / FS,
                         xb.shape[1] / FS / (total / 1e3)))

    n = args.seconds
    print(f"\nlv2apply, {n:g} s of {FS} Hz stereo, default estimator, one BLAS thread, "
          f"best of {args.repeat}")
    print("| run | wall time | real-time factor |")
    print("|---|---|---|")
    print(f"| engine alone (process_array) | {engine_s:.1f} s | {n / engine_s:.1f}x |")
    print(f"| lv2apply, plugin | {plugin_s:.1f} s | {n / plugin_s:.1f}x |")
    print(f"| lv2apply, plugin's dry path (no engine) | {dry_s:.1f} s | {n / dry_s:.1f}x |")
    print(f"| lv2apply, bare copy plugin | {copy_s:.1f} s | {n / copy_s:.1f}x |")
    verdict = "meets" if n / plugin_s >= TARGET_RTF else "misses"
    print(f"target {TARGET_RTF:g}x: {verdict} it (lv2apply alone allows at most "
          f"{n / copy_s:.1f}x here)")

    print("\nStart-up (our test host, instantiate() wall time)")
    print("| instance | time |")
    print("|---|---|")
    print(f"| first in the process (starts Python) | {start_first:.0f} ms |")
    print(f"| second | {start_second:.0f} ms |")

    print(f"\nrun() call times, {args.block_seconds:g} s of {FS} Hz stereo, fixed host blocks")
    print("| block (frames) | mean call | worst call | block duration | real-time factor |")
    print("|---|---|---|---|---|")
    for block, mean_ms, worst_ms, dur_ms, rtf in rows:
        print(f"| {block} | {mean_ms:.3f} ms | {worst_ms:.1f} ms | {dur_ms:.2f} ms | "
              f"{rtf:.1f}x |")
    print("(worst calls longer than the block's duration are why the plugin is for offline "
          "rendering only)")
    return 0


if __name__ == "__main__":
    if shutil.which("lv2apply") is None:
        print("skipped: lv2apply (lilv-utils) is not installed")
        raise SystemExit(0)
    raise SystemExit(main())
