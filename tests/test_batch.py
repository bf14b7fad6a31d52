"""`liftmag batch`: many takes, bad ones reported, resumable, interruptible, same bits everywhere.

External references used as oracles:
* POSIX.1-2017 <signal.h>: SIGKILL "cannot be caught or ignored" (so a killed worker cannot
  remove its own temporary file: the batch must), SIGINT is the terminal interrupt, and a
  process ended by a signal reports it in its wait status (Python: negative exitcode).
* Dask distributed's own ``LocalCluster`` is the reference executor for ``--cluster``.
* Linux proc(5): ``/proc/PID/fd/N`` links name the files a process holds open; used to
  find the worker that is writing a temporary file, so that it can be killed mid-write.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from liftmag import audio_io, batch
from liftmag.scenes import demo_scene
from liftmag.settings import Settings

FS = 16000
TAKE_S = 3.0


@pytest.fixture(scope="module")
def scene():
    return demo_scene(seed=11, room_tone_s=4.0)


def write_take(path: Path, scene, offset_s: float = 0.0, seconds: float = TAKE_S) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    start = round(offset_s * FS)
    sf.write(path, scene.mixture[:, start : start + round(seconds * FS)].T, FS, subtype="PCM_16")
    return path


def write_stems(paths: list[Path], scene, offset_s: float = 0.0) -> None:
    start = round(offset_s * FS)
    for channel, path in enumerate(paths):
        path.parent.mkdir(parents=True, exist_ok=True)
        block = scene.mixture[channel, start : start + round(TAKE_S * FS)]
        sf.write(path, block, FS, subtype="PCM_16")


def events(out_dir: Path) -> list[dict]:
    lines = (out_dir / batch.LOG_NAME).read_text().splitlines()
    return [json.loads(line) for line in lines]


def last_end(out_dir: Path) -> dict:
    return [e for e in events(out_dir) if e["event"] == "end"][-1]


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# ------------------------------------------------------------------ planning (pure)


def test_group_by_suffix_orders_channels_by_number_not_by_name(tmp_path):
    names = ["b_10.wav", "b_9.wav", "a.wav", "c.ch2.wav", "c.ch1.wav"]
    files = [tmp_path / n for n in names]
    takes = batch.group_takes(files, batch.compile_group_pattern(r"_(\d+)$"))
    by_name = {t.name: t for t in takes}
    assert [p.name for p in by_name["b.wav"].members] == ["b_9.wav", "b_10.wav"]
    assert by_name["a.wav"].members == (tmp_path / "a.wav",)
    assert "c.ch1.wav" in by_name and "c.ch2.wav" in by_name  # not this rule's suffix
    dotted = batch.group_takes(files, batch.compile_group_pattern(r".ch(\d)"))
    stems = next(t for t in dotted if t.name == "c.wav")
    assert [p.name for p in stems.members] == ["c.ch1.wav", "c.ch2.wav"]


def test_group_with_a_repeated_channel_number_is_refused(tmp_path):
    files = [tmp_path / "x_1.wav", tmp_path / "x_01.wav", tmp_path / "x_2.wav"]
    (take,) = batch.group_takes(files, batch.compile_group_pattern(r"_(\d+)$"))
    assert "claims channel 1" in take.problem


@pytest.mark.parametrize("pattern", [r"_\d+$", r"_(\d+"])
def test_bad_group_patterns_are_refused(pattern):
    with pytest.raises(batch.BatchError, match="--group-by-suffix"):
        batch.compile_group_pattern(pattern)


def test_outputs_that_clash_or_hit_an_input_are_refused():
    plans = [
        batch.TakePlan("a", ("/m/a.wav",), "/o/x.wav"),
        batch.TakePlan("b", ("/m/b.wav",), "/o/x.wav"),
        batch.TakePlan("c", ("/m/c.wav",), "/m/a.wav"),
        batch.TakePlan("d", ("/m/d.wav",), "/o/d.wav"),
    ]
    checked = {p.label: p.problem for p in batch.check_outputs(plans)}
    assert "more than one take" in checked["a"] and "more than one take" in checked["b"]
    assert "is read by this batch" in checked["c"]
    assert checked["d"] == ""


def test_selection_skips_the_output_folder_and_hidden_files(tmp_path, scene):
    write_take(tmp_path / "in" / "a.wav", scene)
    write_take(tmp_path / "in" / "out" / "a.wav", scene)  # an earlier batch's output
    (tmp_path / "in" / ".a.wav.partial-0000").write_bytes(b"x")
    (tmp_path / "in" / "notes.txt").write_text("not audio")
    sel = batch.expand_selection([str(tmp_path / "in")], exclude=[tmp_path / "in" / "out"])
    assert [p.name for p in sel.files] == ["a.wav"]


def test_take_key_changes_with_each_thing_an_output_is_made_from():
    base = batch.take_key(["aa"], Settings(), None, None)
    assert base == batch.take_key(["aa"], Settings(), None, None)
    others = [
        batch.take_key(["ab"], Settings(), None, None),
        batch.take_key(["aa", "bb"], Settings(), None, None),
        batch.take_key(["aa"], Settings(reduction_limit_db=12.0), None, None),
        batch.take_key(["aa"], Settings(), "cc", None),
        batch.take_key(["aa"], Settings(), None, "FLOAT"),
        batch.take_key(["aa"], Settings(), None, None, version="9.9.9"),
    ]
    assert len({base, *others}) == len(others) + 1


def test_sha256_file_matches_hashlib_on_the_whole_file(tmp_path):
    data = np.random.default_rng(0).bytes(3 * batch.HASH_CHUNK_BYTES + 17)
    path = tmp_path / "blob"
    path.write_bytes(data)
    assert batch.sha256_file(path) == hashlib.sha256(data).hexdigest()


# --------------------------------------------------------------- a folder with trouble


def test_bad_takes_are_reported_good_ones_processed_nothing_partial(
    tmp_path, scene, run_cli, partials
):
    src = tmp_path / "day"
    write_take(src / "good1.wav", scene, 0.0)
    write_take(src / "sub" / "good2.wav", scene, 4.0)
    write_stems([src / "pair_1.wav", src / "pair_2.wav"], scene, 2.0)
    (src / "corrupt.wav").write_bytes(b"RIFF\x10\x00\x00\x00WAVEjunkjunkjunk" * 8)
    sf.write(src / "mono.wav", scene.mixture[0, : 3 * FS], FS, subtype="PCM_16")
    sf.write(src / "odd_1.wav", scene.mixture[0, : 3 * FS], FS, subtype="PCM_16")
    sf.write(src / "odd_2.wav", scene.mixture[1, : 3 * FS - 160], FS, subtype="PCM_16")
    (src / "gone.wav").symlink_to(tmp_path / "nowhere.wav")
    originals = {p: digest(p) for p in src.rglob("*.wav") if p.exists()}
    out = tmp_path / "clean"

    rc, stdout, stderr = run_cli(
        "batch", str(src), str(tmp_path / "missing.wav"), "--out", str(out),
        "--group-by-suffix", r"_(\d+)$", "--jobs", "2",
    )

    assert rc == 1
    for name in ("good1.wav", "sub/good2.wav", "pair.wav"):
        data, rate = sf.read(out / name)
        assert rate == FS and data.shape == (3 * FS,)
    end = last_end(out)
    assert (end["done"], end["failed"], end["skipped"]) == (3, 5, 0)
    reasons = {f["take"]: f["reason"] for f in end["failures"]}
    assert "cannot read this as audio" in reasons["corrupt.wav"]
    assert "only one channel" in reasons["mono.wav"]
    assert "different lengths" in reasons["odd.wav (2 stems)"]
    assert "broken link" in reasons["gone.wav"]
    assert "no such file" in next(v for k, v in reasons.items() if k.endswith("missing.wav"))
    for take, reason in reasons.items():
        assert f"failed {take}: {reason}" in stdout
        assert "\n" not in reason
    assert "Originals are untouched" in stdout
    assert "FAILED   mono.wav" in stderr
    assert partials(tmp_path) == []
    assert {p: digest(p) for p in originals} == originals
    assert not (out / "mono.wav").exists() and not (out / "odd.wav").exists()


# ---------------------------------------------------------------------------- resume


def test_rerun_skips_up_to_date_takes_and_redoes_what_changed(tmp_path, scene, run_cli):
    src = tmp_path / "in"
    for i in range(3):
        write_take(src / f"t{i}.wav", scene, float(i))
    out = tmp_path / "out"
    args = ["batch", str(src), "--out", str(out), "--jobs", "1", "--json"]

    def counts(*extra: str) -> tuple[int, int, int]:
        rc, stdout, _ = run_cli(*args, *extra)
        summary = json.loads(stdout)
        assert rc == (1 if summary["failed"] else 0)
        return summary["done"], summary["skipped"], summary["failed"]

    assert counts() == (3, 0, 0)
    first = {i: digest(out / f"t{i}.wav") for i in range(3)}
    stale = out / ".t0.wav.partial-deadbeef"  # as a SIGKILLed worker leaves it
    stale.write_bytes(b"half a file")
    assert counts() == (0, 3, 0)
    assert not stale.exists()
    write_take(src / "t1.wav", scene, 5.0)  # new content, same name
    assert counts() == (1, 2, 0)
    assert digest(out / "t1.wav") != first[1] and digest(out / "t0.wav") == first[0]
    assert counts("--reduction-limit-db", "10") == (3, 0, 0)  # settings changed
    assert counts("--reduction-limit-db", "10") == (0, 3, 0)
    assert counts("--reduction-limit-db", "10", "--redo") == (3, 0, 0)
    # An output the batch did not make is never replaced silently.
    batch.record_path(out / "t2.wav", out).unlink()
    assert counts("--reduction-limit-db", "10") == (0, 2, 1)
    assert "not written by liftmag batch" in last_end(out)["failures"][0]["reason"]


def test_a_second_batch_into_the_same_folder_is_refused(tmp_path, scene, run_cli):
    write_take(tmp_path / "in" / "a.wav", scene)
    out = tmp_path / "out"
    with batch.batch_lock(out):
        rc, _, stderr = run_cli("batch", str(tmp_path / "in"), "--out", str(out))
    assert rc == 2 and "another liftmag batch" in stderr


# ------------------------------------------------------ bit-identical across executors


def test_outputs_are_bit_identical_to_process_for_1_2_workers_and_dask(
    tmp_path, monkeypatch, scene, run_cli, partials
):
    from distributed import LocalCluster

    src = tmp_path / "in"
    takes = [write_take(src / f"s{i}" / "take.wav", scene, 2.5 * i) for i in range(3)]
    settings = ["--estimator", "lifted-mv", "--reduction-limit-db", "14"]
    reference = {}
    for take in takes:
        target = tmp_path / "ref" / take.parent.name / "take.wav"
        target.parent.mkdir(parents=True)
        rc, _, _ = run_cli("process", str(take), "-o", str(target), *settings)
        assert rc == 0
        reference[take.parent.name] = target.read_bytes()

    def batch_outputs(out: Path) -> dict[str, bytes]:
        return {name: (out / name / "take.wav").read_bytes() for name in reference}

    for jobs in ("1", "2"):
        out = tmp_path / f"jobs{jobs}"
        rc, _, _ = run_cli("batch", str(src), "--out", str(out), "--jobs", jobs, *settings)
        assert rc == 0
        assert batch_outputs(out) == reference
    # Dask's own LocalCluster on loopback is the reference executor for --cluster.
    with LocalCluster(
        n_workers=1, threads_per_worker=1, processes=False, host="127.0.0.1",
        protocol="tcp", dashboard_address=None,
    ) as cluster:
        out = tmp_path / "dask"
        rc, _, stderr = run_cli(
            "batch", str(src), "--out", str(out), "--cluster", cluster.scheduler_address,
            *settings,
        )
        assert rc == 0 and "MALLOC_TRIM_THRESHOLD_" not in stderr
        assert batch_outputs(out) == reference
        # These workers are threads of this process: they see its environment, as workers
        # started by Dask's nanny see the variable it sets.
        monkeypatch.setenv("MALLOC_TRIM_THRESHOLD_", "65536")
        rc, stdout, stderr = run_cli(
            "batch", str(src), "--out", str(out), "--cluster", cluster.scheduler_address,
            "--json", *settings,
        )
    assert rc == 0 and json.loads(stdout)["skipped"] == 3
    assert "MALLOC_TRIM_THRESHOLD_=65536" in stderr
    assert partials(tmp_path) == []


def test_grouped_mono_stems_equal_the_multichannel_file(tmp_path, scene, run_cli):
    write_take(tmp_path / "multi" / "take.wav", scene, 1.0)
    # Channel 0 is "_9" and channel 1 is "_10": sorting by name would swap them.
    write_stems([tmp_path / "stems" / "take_9.wav", tmp_path / "stems" / "take_10.wav"], scene, 1.0)
    swapped = tmp_path / "swapped" / "take.wav"
    swapped.parent.mkdir()
    sf.write(swapped, scene.mixture[::-1, FS : FS + round(TAKE_S * FS)].T, FS, subtype="PCM_16")
    for name in ("multi", "stems", "swapped"):
        rc, _, _ = run_cli(
            "batch", str(tmp_path / name), "--out", str(tmp_path / f"out-{name}"),
            "--group-by-suffix", r"_(\d+)$", "--jobs", "1",
        )
        assert rc == 0
    multi = (tmp_path / "out-multi" / "take.wav").read_bytes()
    assert (tmp_path / "out-stems" / "take.wav").read_bytes() == multi
    assert (tmp_path / "out-swapped" / "take.wav").read_bytes() != multi


# ------------------------------------------------------------------------- manifest


def test_manifest_rows_with_stems_room_tone_and_overrides(tmp_path, scene, run_cli):
    media = tmp_path / "media"
    write_take(media / "a.wav", scene, 0.0)
    write_stems([media / "b1.wav", media / "b2.wav"], scene, 3.0)
    sf.write(media / "tone.wav", scene.room_tone.T, FS, subtype="PCM_16")
    manifest = media / "takes.csv"
    manifest.write_text(
        "input,output,room_tone,estimator,reduction-limit-db\n"
        "a.wav,plain/a.wav,,,\n"
        "b1.wav;b2.wav,toned/b.wav,tone.wav,lifted-mv,12\n"
        "a.wav,bad/a.wav,,,loud\n"
        "a.wav,bad/a2.wav,,mvdr,12,160\n"
    )
    out = tmp_path / "out"
    rc, _, _ = run_cli("batch", "--manifest", str(manifest), "--out", str(out),
                            "--jobs", "2")
    assert rc == 1
    end = last_end(out)
    assert (end["done"], end["failed"]) == (2, 2)
    reasons = {f["take"]: f["reason"] for f in end["failures"]}
    assert "'loud' is not a number" in reasons["row 4: a.wav"]
    assert "put quotes around cells that contain commas" in reasons["row 5: a.wav"]

    # The same takes through `liftmag learn` and `liftmag process`, as a user would.
    model = tmp_path / "tone.npz"
    assert run_cli("learn", str(media / "tone.wav"), "-o", str(model))[0] == 0
    ref_b = tmp_path / "ref_b.wav"
    rc, _, _ = run_cli(
        "process", str(media / "b1.wav"), str(media / "b2.wav"), "-o", str(ref_b),
        "--noise-model", str(model), "--estimator", "lifted-mv", "--reduction-limit-db", "12",
    )
    assert rc == 0
    assert (out / "toned" / "b.wav").read_bytes() == ref_b.read_bytes()
    ref_a = tmp_path / "ref_a.wav"
    assert run_cli("process", str(media / "a.wav"), "-o", str(ref_a))[0] == 0
    assert (out / "plain" / "a.wav").read_bytes() == ref_a.read_bytes()


@pytest.mark.parametrize(
    ("text", "message"),
    [
        (None, "no such file"),
        ("input,outptu\na.wav,b.wav\n", "unknown column(s) 'outptu'"),
        ("input,estimator\na.wav,mvdr\n", "needs the column(s) output"),
        ("input,output\n", "no takes listed"),
    ],
)
def test_bad_manifests_are_refused_in_one_line(tmp_path, text, message, run_cli):
    manifest = tmp_path / "m.csv"
    if text is not None:
        manifest.write_text(text)
    rc, _, stderr = run_cli("batch", "--manifest", str(manifest), "--out",
                            str(tmp_path / "o"))
    assert rc == 2
    assert message in stderr and stderr.count("\n") == 1


def test_empty_selection_is_refused(tmp_path, run_cli):
    (tmp_path / "empty").mkdir()
    (tmp_path / "empty" / "readme.txt").write_text("no audio here")
    rc, _, stderr = run_cli("batch", str(tmp_path / "empty"), "--out",
                            str(tmp_path / "o"))
    assert rc == 2 and "nothing to process" in stderr


# ----------------------------------------------------------- interruption (POSIX)


def _as_a_foreground_job() -> None:
    # A shell starts a foreground job with SIGINT at its default action; a background job
    # of a non-interactive shell (`make test &`, some CI runners) inherits it ignored
    # (POSIX.1-2017 Shell Command Language 2.11), and so would this batch without this.
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def _start_batch(src: Path, out: Path, jobs: int) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "liftmag.cli", "batch", str(src), "--out", str(out),
         "--jobs", str(jobs)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        preexec_fn=_as_a_foreground_job,
    )


def _taken(out: Path) -> int:
    try:
        return sum(e["event"] == "take" for e in events(out))
    except (FileNotFoundError, json.JSONDecodeError):
        return 0


def _wait_for(condition, proc: subprocess.Popen, timeout_s: float = 60.0) -> None:
    deadline = time.monotonic() + timeout_s
    while not condition():
        assert proc.poll() is None, "the batch ended before the test could interrupt it"
        assert time.monotonic() < deadline, "timed out waiting for the batch"
        time.sleep(0.01)


def _rerun_counts(src: Path, out: Path) -> dict:
    done = subprocess.run(
        [sys.executable, "-m", "liftmag.cli", "batch", str(src), "--out", str(out),
         "--jobs", "2", "--json"],
        capture_output=True, text=True, check=False,
    )
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


def _stopped(pid: int) -> bool:
    # Linux proc(5): the state (field 3 of /proc/PID/stat) is "T" for a stopped process.
    with open(f"/proc/{pid}/stat") as fh:
        return fh.read().rsplit(")", 1)[1].split()[0] == "T"


def _signal_part_way(
    proc: subprocess.Popen, out: Path, n: int, signum: int, partials: Callable
) -> None:
    """Deliver ``signum`` while at least one take is still to be handed out.

    The batch is stopped first (SIGSTOP cannot be caught, POSIX); while stopped it cannot
    hand out a take, so with fewer than n - 1 takes logged it cannot finish before the
    signal is seen, however busy the machine. The signal is then sent and the batch
    continued (SIGCONT): a pending signal is delivered on continuing.
    """
    _wait_for(lambda: _taken(out) >= 2 and bool(partials(out)), proc)
    os.kill(proc.pid, signal.SIGSTOP)
    while not _stopped(proc.pid):
        time.sleep(0.001)
    assert _taken(out) < n - 1, "the batch was nearly done before it could be stopped"
    os.kill(proc.pid, signum)
    os.kill(proc.pid, signal.SIGCONT)


@pytest.mark.skipif(not Path("/proc/self/stat").is_file(), reason="needs Linux /proc")
@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM, signal.SIGHUP])
def test_sigint_part_way_leaves_no_partials_and_a_rerun_finishes(tmp_path, scene, signum, partials):
    # SIGINT is what Ctrl-C delivers, SIGTERM what `kill PID` sends, SIGHUP a closed
    # terminal (POSIX); the batch stops the same way for each.
    src, out, n = tmp_path / "in", tmp_path / "out", 8
    for i in range(n):
        write_take(src / f"t{i:02d}.wav", scene, 0.5 * i, seconds=2.0)
    proc = _start_batch(src, out, jobs=1)
    _signal_part_way(proc, out, n, signum, partials)
    stdout, _ = proc.communicate(timeout=60)

    assert proc.returncode == 130
    assert "interrupted" in stdout
    assert partials(tmp_path) == []
    end = last_end(out)
    assert end["interrupted"] and end["not_run"] > 0
    finished = sorted(p.name for p in out.glob("*.wav"))
    assert 2 <= len(finished) < n
    summary = _rerun_counts(src, out)
    assert (summary["skipped"], summary["done"]) == (len(finished), n - len(finished))
    assert partials(tmp_path) == []


def _writers_of_partials(out: Path) -> dict[int, Path]:
    """Processes holding one of ``out``'s temporary files open (Linux proc(5))."""
    found = {}
    for pid in filter(str.isdigit, os.listdir("/proc")):
        try:
            for fd in os.listdir(f"/proc/{pid}/fd"):
                target = os.readlink(f"/proc/{pid}/fd/{fd}")
                if target.startswith(str(out)) and ".partial-" in target:
                    found[int(pid)] = Path(target)
        except OSError:  # the process ended or is not ours to look at
            continue
    return found


@pytest.mark.skipif(not Path("/proc/self/fd").is_dir(), reason="needs Linux /proc")
def test_sigkilled_worker_fails_its_take_only_and_leaves_no_partial(tmp_path, scene, partials):
    src, out, n = tmp_path / "in", tmp_path / "out", 12
    for i in range(n):
        write_take(src / f"t{i:02d}.wav", scene, 0.5 * i)
    proc = _start_batch(src, out, jobs=2)
    kills, orphaned = 0, None
    while orphaned is None:
        _wait_for(lambda: bool(_writers_of_partials(out)), proc)
        for pid, temp in _writers_of_partials(out).items():
            try:
                os.kill(pid, signal.SIGKILL)  # cannot be caught (POSIX)
            except ProcessLookupError:
                continue
            kills += 1
            time.sleep(0.2)
            if temp.exists():  # killed before its rename: the temp file is orphaned
                orphaned = temp
            break
    proc.communicate(timeout=60)

    assert proc.returncode == 1
    assert not orphaned.exists() and partials(tmp_path) == []
    end = last_end(out)
    # Normally one kill; if a worker was hit just after its rename, another was tried.
    assert 1 <= end["failed"] <= kills and end["done"] + end["failed"] == n
    assert all("killed by SIGKILL" in f["reason"] for f in end["failures"])
    summary = _rerun_counts(src, out)
    assert summary["failed"] == 0 and summary["done"] + summary["skipped"] == n
    assert 1 <= summary["done"] <= end["failed"]
    if kills == 1:
        assert (end["failed"], summary["done"]) == (1, 1)


# ------------------------------------------------------------- nothing lost, delivery folders


def test_delivery_folder_holds_the_outputs_only_and_resume_still_works(tmp_path, scene, run_cli):
    src, out = tmp_path / "in", tmp_path / "out"
    write_take(src / "a.wav", scene, 0.0)
    write_take(src / "sub" / "b.wav", scene, 1.0)
    args = ["batch", str(src), "--out", str(out), "--jobs", "1", "--json"]
    assert run_cli(*args)[0] == 0
    delivered = sorted(
        str(p.relative_to(out)) for p in out.rglob("*")
        if p.is_file() and batch.STATE_DIR_NAME not in p.parts and p.name != batch.LOG_NAME
    )
    assert delivered == ["a.wav", "sub/b.wav"]  # no hidden record beside any output
    rc, stdout, _ = run_cli(*args)
    assert rc == 0 and json.loads(stdout)["skipped"] == 2
    # A folder made by an earlier version (records beside the outputs) still resumes,
    # and its hidden records are moved into the batch's own folder.
    for name in ("a.wav", "sub/b.wav"):
        new = batch.record_path(out / name, out)
        os.replace(new, batch.record_path(out / name))
    rc, stdout, _ = run_cli(*args)
    assert rc == 0 and json.loads(stdout)["skipped"] == 2
    write_take(src / "a.wav", scene, 2.0)
    rc, stdout, _ = run_cli(*args)
    assert rc == 0 and json.loads(stdout)["done"] == 1
    assert not batch.record_path(out / "a.wav").exists()
    assert batch.record_path(out / "a.wav", out).is_file()


def test_manifest_shifted_cells_and_escaping_outputs_are_refused(tmp_path, scene, run_cli):
    media = tmp_path / "media"
    write_take(media / "a.wav", scene, 0.0)
    (media / "takes.csv").write_text(
        "input,output,null_deg,reduction_limit_db\n"
        "a.wav,ok.wav,,\n"
        "a.wav,shifted.wav,20,160,\n"  # 20,160 unquoted: 160 lands in reduction_limit_db
        "a.wav,../escaped.wav,,\n"
        f"a.wav,{tmp_path / 'absolute.wav'},,\n"
    )
    out = tmp_path / "out"
    rc, _, _ = run_cli("batch", "--manifest", str(media / "takes.csv"), "--out",
                       str(out), "--jobs", "1")
    assert rc == 1
    end = last_end(out)
    assert (end["done"], end["failed"]) == (1, 3)
    reasons = " | ".join(f["reason"] for f in end["failures"])
    assert "put quotes around cells that contain commas" in reasons
    assert reasons.count("leaves --out") == 2
    assert sorted(p.name for p in tmp_path.iterdir()) == ["media", "out"]
    assert not (out / "shifted.wav").exists()


def test_redo_never_writes_over_a_room_tone_or_noise_model(tmp_path, scene, run_cli):
    media = tmp_path / "media"
    write_take(media / "a.wav", scene, 0.0)
    sf.write(media / "tone.wav", scene.room_tone.T, FS, subtype="PCM_16")
    assert run_cli("learn", str(media / "tone.wav"), "-o", str(media / "m.npz"))[0] == 0
    (media / "takes.csv").write_text(
        "input,output,room_tone,noise_model\n"
        "a.wav,tone.wav,tone.wav,\n"
        "a.wav,m.npz,,m.npz\n"
    )
    before = {p.name: p.read_bytes() for p in media.iterdir()}
    rc, _, _ = run_cli("batch", "--manifest", str(media / "takes.csv"), "--out",
                       str(media), "--redo", "--jobs", "1")
    assert rc == 1 and last_end(media)["failed"] == 2
    assert all((media / name).read_bytes() == data for name, data in before.items())
    # The batch-wide room tone sits where the take's output would go.
    tone_as_output = tmp_path / "o2" / "a.wav"
    tone_as_output.parent.mkdir()
    tone_as_output.write_bytes((media / "tone.wav").read_bytes())
    rc, _, _ = run_cli("batch", str(media / "a.wav"), "--out", str(tmp_path / "o2"),
                       "--room-tone", str(tone_as_output), "--redo", "--jobs", "1")
    assert rc == 1 and "read by this batch" in last_end(tmp_path / "o2")["failures"][0]["reason"]
    assert tone_as_output.read_bytes() == before["tone.wav"]


def test_start_up_sweep_leaves_another_writers_temporary_file(tmp_path, scene, run_cli, partials):
    src, out = tmp_path / "in", tmp_path / "out"
    write_take(src / "t0.wav", scene)
    out.mkdir()
    # `liftmag process` writing the same name into the same folder, mid-write.
    writer = audio_io.AtomicAudioWriter(out / "t0.wav", sample_rate_hz=FS, channels=2,
                                        force=True)
    with writer:
        writer.write(np.zeros((2, 100)))
        temp = partials(out)
        assert len(temp) == 1
        assert run_cli("batch", str(src), "--out", str(out), "--jobs", "1",
                       "--redo")[0] == 0
        assert temp[0].exists()  # the batch's sweeps left it alone
        writer.write(np.zeros((2, 100)))
    assert sf.info(str(out / "t0.wav")).frames == 200  # the other writer finished
