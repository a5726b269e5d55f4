"""Faults and interruptions (issue 7, item 3): atomic writes, SIGKILL and rerun, the OUT lock, and a
worker that dies on one scan.

The reference for every "identical" below is an uninterrupted run of the same command on the same
inputs (a second implementation of the same computation is not needed: the property is that an
interruption changes nothing). Track images are compared with nibabel as the independent reader.
Cohorts are invented and small (a few subjects x 3 sessions, 14 x 14 x 9 grids).
"""
from __future__ import annotations

import contextlib
import errno
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from fault_tasks import KILL_AT_RENAME as DRIVER
from nifti_helpers import oblique_affine, save_mask

from pipeline.run.executors import run_tasks, volumes_task
from pipeline.cli import main
from pipeline.io.nifti import save_label_image
from pipeline.settings import VolumeSettings
from pipeline.io.tsv import write_table, write_text
from pipeline.run.commands import locked

REPO = Path(__file__).resolve().parents[2]
TESTS = Path(__file__).resolve().parents[1]


# ------------------------------------------------------------------------------ the cohort
def make_cohort(folder: Path) -> Path:
    """Three subjects x 3 sessions of two growing spheres each, plus one broken scan (so the run
    exits 1 and errors.tsv has a row). Returns the manifest."""
    grid = np.indices((14, 14, 9)).transpose(1, 2, 3, 0)
    rows = ["subject\tsession\tmask\tdate"]
    for n, subject in enumerate(("A", "B", "C")):
        for t, date in enumerate(("2024-01-01", "2024-02-12", "2024-03-25")):
            data = np.zeros((14, 14, 9), np.uint8)
            for centre, r0, rate in (((4, 4, 4), 1.5, 0.5), ((10, 9, 4), 1.0 + 0.3 * n, 0.7)):
                r = r0 + rate * t
                data[((grid - centre) ** 2).sum(-1) <= r * r] = 1
            save_mask(folder / f"{subject}{t}.nii.gz", data,
                      oblique_affine((1.0, 1.0, 1.5), degrees=10 * n))
            rows.append(f"{subject}\t{t + 1}\t{subject}{t}.nii.gz\t{date}")
    (folder / "broken.nii.gz").write_bytes(b"\x1f\x8b" + bytes(50))
    rows.append("D\t1\tbroken.nii.gz\t2024-01-01")
    (folder / "manifest.tsv").write_text("\n".join(rows) + "\n")
    return folder / "manifest.tsv"


def command(out: str) -> list[str]:
    return [sys.executable, "-m", "pipeline", "run", "manifest.tsv", "-o", out, "-q"]


def environment() -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO), env.get("PYTHONPATH", "")]))
    return env


def visible_files(root: Path) -> list[str]:
    """Output files a user or a script would pick up: hidden names (lock, cache, temporary
    files) and the report (report.html and its report/ folder: pages, compared by presence
    only) left out."""
    return sorted(str(p.relative_to(root)) for p in root.rglob("*")
                  if p.is_file() and not any(part.startswith(".") for part in
                                             p.relative_to(root).parts)
                  and p.name != "report.html" and p.relative_to(root).parts[0] != "report")


def same_file(ref: Path, got: Path) -> bool:
    if got.name.endswith(".nii.gz"):
        a, b = nib.load(ref), nib.load(got)
        return (a.get_data_dtype() == b.get_data_dtype()
                and np.array_equal(np.asanyarray(a.dataobj), np.asanyarray(b.dataobj))
                and np.array_equal(a.affine, b.affine)
                and a.header["xyzt_units"] == b.header["xyzt_units"])
    if got.name == "provenance.json":
        times = ("started", "finished", "stages")   # "stages": each run's own run ids
        a, b = json.loads(ref.read_text()), json.loads(got.read_text())
        # the input's place relative to OUT differs between OUTs; it must name the same file
        where = [(p.parent / d["input"].pop("path_from_out")).resolve() for p, d in
                 ((ref, a), (got, b))]
        return where[0] == where[1] and {k: v for k, v in a.items() if k not in times} == \
            {k: v for k, v in b.items() if k not in times}
    return ref.read_bytes() == got.read_bytes()


def assert_same_outputs(ref: Path, out: Path) -> None:
    assert visible_files(out) == visible_files(ref)
    for name in visible_files(ref):
        assert same_file(ref / name, out / name), name
    assert (out / "report.html").exists() == (ref / "report.html").exists()


def assert_partial_outputs_complete(ref: Path, out: Path) -> None:
    """Whatever a killed run left under its final names is complete: identical to the reference
    (atomic writes: a table is either absent or whole). provenance.json differs only in times
    and run ids."""
    if not out.exists():
        return
    for name in visible_files(out):
        assert name in visible_files(ref), name
        assert same_file(ref / name, out / name), f"{name} is not the complete table"


@pytest.fixture(scope="module")
def cohort(tmp_path_factory):
    folder = tmp_path_factory.mktemp("cohort")
    make_cohort(folder)
    start = time.perf_counter()
    done = subprocess.run(command("reference"), cwd=folder, env=environment(),
                          capture_output=True, text=True, timeout=120)
    elapsed = time.perf_counter() - start
    assert done.returncode == 1, done.stderr       # one broken scan: exit status 1
                                                   # (docs/outputs.md §1)
    assert (folder / "reference" / "longitudinal.tsv").exists()
    return folder, folder / "reference", elapsed, done.returncode


def kill_then(folder: Path, out: str, trigger) -> dict:
    """Start a run, SIGKILL its process group when ``trigger(out_path, started)`` says so."""
    proc = subprocess.Popen(command(out), cwd=folder, env=environment(),
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True)
    started = time.perf_counter()
    while proc.poll() is None and not trigger(folder / out, started) \
            and time.perf_counter() - started < 60:
        time.sleep(0.002)
    alive = proc.poll() is None
    if alive:
        os.killpg(proc.pid, signal.SIGKILL)     # our own child's process group, by its id
    proc.wait(timeout=30)
    left = visible_files(folder / out) if (folder / out).exists() else []
    return {"alive": alive, "left": left, "code": proc.returncode}


def rerun(folder: Path, out: str) -> int:
    """The same command again, to completion (in this process: it saves the start-up time; the
    arguments are the same relative paths, so provenance.json records the same input)."""
    with contextlib.chdir(folder):
        return main(command(out)[3:])


# ------------------------------------------------------------------ SIGKILL, then run again
@pytest.mark.parametrize("moment", [0.2, 0.65, ".cache/volumes/*.npz", "lesions.tsv"],
                         ids=["at-20pc", "at-65pc", "inside-stage-1", "after-stage-1"])
def test_killed_run_then_rerun_gives_identical_outputs(cohort, moment):
    # Reference: an uninterrupted run of the same command (issue 7: "killing a run at a random
    # moment ... and running it again gives outputs identical to an uninterrupted run").
    folder, ref, elapsed, ref_code = cohort
    out = f"killed-{moment}"
    if isinstance(moment, float):
        def trigger(path, started):      # late moments also fire once fitting is done, so a
            late = moment > 0.5 and (path / "fits.tsv").exists()   # faster run is still caught
            return late or time.perf_counter() - started >= moment * elapsed
    else:
        def trigger(path, started):
            return next(path.glob(moment), None) is not None
    killed = kill_then(folder, out, trigger)
    assert killed["alive"], f"the run ended before the kill moment {moment}; nothing was tested"
    assert killed["code"] == -signal.SIGKILL
    assert_partial_outputs_complete(ref, folder / out)
    assert rerun(folder, out) == ref_code
    assert_same_outputs(ref, folder / out)




@pytest.fixture(scope="module")
def killed_before_rename(cohort):
    """A run killed inside the rename of longitudinal.tsv (the last step of an atomic write)."""
    folder, ref, _, _ = cohort
    done = subprocess.run([sys.executable, "-c", DRIVER, "longitudinal.tsv",
                           *command("renamed")[3:]], cwd=folder, env=environment(),
                          capture_output=True, timeout=120)
    out = folder / "renamed"
    state = {"code": done.returncode, "left": visible_files(out),
             "hidden": sorted(p.name for p in out.iterdir() if p.name.startswith("."))}
    assert_partial_outputs_complete(ref, out)
    state["rerun"] = rerun(folder, "renamed")
    return state, out


def test_kill_before_rename_leaves_no_table_under_final_name(cohort, killed_before_rename):
    # Reference: POSIX rename(2) is atomic; until it happens the final name must not exist
    # (issue 7: "an interrupted run never leaves a truncated table").
    folder, ref, _, ref_code = cohort
    state, out = killed_before_rename
    assert state["code"] == -signal.SIGKILL
    assert "longitudinal.tsv" not in state["left"]
    assert {"lesions.tsv", "masks.tsv", "errors.tsv"} <= set(state["left"])
    assert any(name.startswith(".longitudinal.") for name in state["hidden"])
    assert state["rerun"] == ref_code
    assert_same_outputs(ref, out)


def test_rerun_removes_temporary_files_of_a_killed_run(killed_before_rename):
    # Reference: issue 7 ("never leave a half-written table that looks complete"); Python
    # pathlib.Path.glob matches names that start with a dot, so a hidden .tsv is still found.
    _, out = killed_before_rename
    assert [p.name for p in out.glob("*.tsv") if p.name.startswith(".")] == []


# -------------------------------------------------------------------------- atomic writes
def _fail_midway(target: Path) -> None:
    Path(target).write_bytes(b"subject\tsess")        # half a line, as a full disk leaves it
    raise OSError(errno.ENOSPC, "No space left on device")


@pytest.mark.parametrize("writer", ["table", "text", "label-image"])
def test_failed_write_keeps_the_old_file_and_leaves_no_temporary(tmp_path, monkeypatch, writer):
    # Reference: the write-to-temporary-then-os.replace pattern (Python os.replace docs: the
    # rename is atomic on POSIX); the old file must survive a failure in the middle of a write.
    names = {"table": "lesions.tsv", "text": "provenance.json",
             "label-image": "sub-A_ses-1_tracks.nii.gz"}
    path = tmp_path / names[writer]
    old = pd.DataFrame({"subject": ["A"], "voxels": [18]})
    labels = np.zeros((4, 4, 3), np.uint8)
    labels[1, 1, 1] = 1
    first = {"table": lambda: write_table(old, path), "text": lambda: write_text(path, "{}\n"),
             "label-image": lambda: save_label_image(path, labels, np.eye(4))}
    first[writer]()
    before = path.read_bytes()
    if writer == "table":
        monkeypatch.setattr(pd.DataFrame, "to_csv", lambda self, target, *a, **k:
                            _fail_midway(target))
        again = lambda: write_table(old.assign(voxels=[99]), path)          # noqa: E731
    elif writer == "text":
        monkeypatch.setattr(Path, "write_text", lambda self, *a, **k: _fail_midway(self))
        again = lambda: write_text(path, '{"new": 1}\n')                     # noqa: E731
    else:
        # the label image goes out in one write of its gzip bytes (pipeline.io.nifti_gz_bytes)
        real_write = Path.write_bytes

        def torn(self, data):
            real_write(self, data[: len(data) // 2])   # half the file, as a full disk leaves it
            raise OSError(errno.ENOSPC, "No space left on device")

        monkeypatch.setattr(Path, "write_bytes", torn)
        again = lambda: save_label_image(path, labels * 2, np.eye(4))        # noqa: E731
    with pytest.raises(OSError, match="No space left"):
        again()
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == [path.name]


# ---------------------------------------------------------------------------------- the lock
def test_second_run_on_same_out_is_refused(tmp_path, capsys):
    # Reference: docs/outputs.md §1, exit status 2 = usage error, nothing computed; issue 7: "two
    # runs on
    # the same OUT at once are refused by a lock with a clear message".
    mask = np.zeros((10, 10, 6), np.uint8)
    mask[2:5, 2:5, 2:4] = 1
    save_mask(tmp_path / "m.nii.gz", mask, np.eye(4))
    (tmp_path / "manifest.tsv").write_text("subject\tsession\tmask\tdate\n"
                                           "A\t1\tm.nii.gz\t2024-01-01\n"
                                           "A\t2\tm.nii.gz\t2024-02-01\n")
    out = tmp_path / "out"
    args = ["run", str(tmp_path / "manifest.tsv"), "-o", str(out), "-q"]
    with locked(out):
        code = main(args)
        err = capsys.readouterr().err
    assert code == 2
    lines = [x for x in err.splitlines() if x.strip()]
    assert len(lines) == 1 and "another lesion-growth run is using this folder" in lines[0]
    assert str(out) in lines[0]
    assert visible_files(out) == []
    assert main(args) == 0                    # the lock is released with its holder
    assert (out / "lesions.tsv").exists()


# ------------------------------------------------------------------ a worker dies on one scan
def test_worker_crash_costs_only_that_scan(tmp_path, monkeypatch):
    # Reference: the same tasks run serially in this process (workers=1) give the expected
    # result of every scan that did not crash.
    monkeypatch.setenv("PYTHONPATH", os.pathsep.join([str(TESTS), str(REPO)]))
    import fault_tasks

    settings = VolumeSettings()
    args = []
    for n in range(4):
        mask = np.zeros((8, 8, 6), np.uint8)
        mask[1:3 + n, 2:5, 2:4] = 1
        save_mask(tmp_path / f"m{n}.nii.gz", mask, np.eye(4))
        args.append(("S", str(n), str(tmp_path / f"m{n}.nii.gz"), None, settings))
    tasks = [(fault_tasks.crash_reading, args[0])]
    tasks += [(fault_tasks.slow_volumes_task, a) for a in args[1:]]
    results = dict(run_tasks(tasks, workers=2))
    assert sorted(results) == [0, 1, 2, 3]
    assert "worker process died" in results[0].error
    for index in (1, 2, 3):
        expected = volumes_task(*args[index])
        assert results[index].ok, results[index].error
        assert results[index].table.equals(expected.table)
