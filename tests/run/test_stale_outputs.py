"""Later commands build on what stage 1 recorded, and never mix tables of different runs.

Classes checked: the input looked up again from another folder, or changed after the run
(manifest, mask); a run killed at several moments while it replaces the tables of an earlier,
larger run; a stage rerun making the stages after it out of date; the report written after what
it reads; the report under OUT's lock; and the run's summary counts. The reference of every
check is docs/outputs.md itself (exit status 2 = usage error, nothing computed; one line naming the
file and the reason) and the tables of one uninterrupted run. Masks are invented spheres.
"""
from __future__ import annotations

import contextlib
import io
import json
import os
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from fault_tasks import KILL_AT_RENAME as DRIVER
from nifti_helpers import save_mask

from pipeline.cli import main
from pipeline.io.tsv import read_table
from pipeline.run.commands import locked

REPO = Path(__file__).resolve().parents[2]
DATES = ("2024-01-01", "2024-02-12", "2024-03-25")


def make_input(folder: Path, subjects=("A", "B", "C"), name="manifest.tsv") -> Path:
    """Subjects x 3 sessions of one growing sphere on a 12 x 12 x 8 grid of 1 mm voxels."""
    folder.mkdir(parents=True, exist_ok=True)
    grid = np.indices((12, 12, 8)).transpose(1, 2, 3, 0)
    rows = ["subject\tsession\tmask\tdate"]
    for n, subject in enumerate(subjects):
        for t, date in enumerate(DATES):
            radius = 1.5 + 0.5 * t + 0.2 * n
            data = (((grid - (6, 6, 4)) ** 2).sum(-1) <= radius ** 2).astype(np.uint8)
            save_mask(folder / f"{subject}{t}.nii.gz", data, np.eye(4))
            rows.append(f"{subject}\t{t + 1}\t{subject}{t}.nii.gz\t{date}")
    (folder / name).write_text("\n".join(rows) + "\n")
    return folder / name


def call(args, cwd: Path | None = None) -> tuple[int, list[str]]:
    """The command line in this process: (exit status, non-empty stderr lines)."""
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.chdir(cwd or Path.cwd()):
        code = main([str(a) for a in args])
    return code, [line for line in err.getvalue().splitlines() if line.strip()]


def subjects(out: Path, name: str) -> set[str]:
    return set(read_table(out / name).subject.astype(str))


@pytest.fixture()
def done(tmp_path):
    """A finished run of three subjects, started from the input's folder with relative paths."""
    make_input(tmp_path / "in")
    code, _ = call(["run", "manifest.tsv", "-o", "../out", "-q"], cwd=tmp_path / "in")
    assert code == 0
    return tmp_path, tmp_path / "out"


# ------------------------------------------------- the input as recorded, from any folder
def test_match_from_another_folder_uses_the_recorded_manifest(done):
    # Contract: `match OUT` works "on the lesions.tsv already in OUT (plus the masks it names)";
    # a different manifest.tsv in the working folder must not be used.
    root, out = done
    make_input(root / "elsewhere", subjects=("X", "Y"))
    before = read_table(out / "longitudinal.tsv")
    code, err = call(["match", out], cwd=root / "elsewhere")
    assert code == 0, err
    assert subjects(out, "longitudinal.tsv") == subjects(out, "lesions.tsv") == {"A", "B", "C"}
    assert read_table(out / "longitudinal.tsv").equals(before)
    code, err = call(["fit", out], cwd=root)        # the relative path does not exist here
    assert code == 0, err
    assert subjects(out, "fits.tsv") == {"A", "B", "C"}


def test_match_and_fit_refuse_an_edited_manifest(done):
    # Contract: exit status 2, nothing computed, one line naming the file and the reason.
    root, out = done
    manifest = root / "in" / "manifest.tsv"
    manifest.write_text(manifest.read_text().replace("2024-02-12", "2024-02-20"))
    events = root / "events.tsv"
    events.write_text("subject\tday\tevent\nA\t50\tradiosurgery\n")
    before = {n: (out / n).read_bytes() for n in ("longitudinal.tsv", "fits.tsv")}
    for args in (["match", out], ["fit", out, "--events", events]):
        code, err = call(args, cwd=root)
        assert code == 2 and len(err) == 1, err
        assert "manifest.tsv" in err[0] and "changed after stage 1 ran" in err[0]
    assert {n: (out / n).read_bytes() for n in before} == before


def test_match_refuses_a_changed_mask_and_uses_the_cache_for_a_moved_one(done):
    root, out = done
    os.remove(root / "in" / "B1.nii.gz")               # moved away: the cache holds its result
    code, err = call(["match", out], cwd=root)
    assert code == 0, err
    assert subjects(out, "longitudinal.tsv") == {"A", "B", "C"}
    shutil.copy(root / "in" / "C2.nii.gz", root / "in" / "A0.nii.gz")    # content changed
    code, err = call(["match", out], cwd=root)
    assert code == 2 and len(err) == 1, err
    assert "sub A ses 1: mask A0.nii.gz changed after stage 1 ran" in err[0]
    shutil.rmtree(out / ".cache")
    os.remove(root / "in" / "A0.nii.gz")
    code, err = call(["match", out], cwd=root)
    assert code == 2 and "is no longer there" in err[0]


def test_hand_edited_table_is_refused_by_the_next_stage(done):
    _, out = done
    path = out / "longitudinal.tsv"
    path.write_text(path.read_text().replace("\tnew\t", "\tpresent\t") + "\n")
    code, err = call(["fit", out])
    assert code == 2 and len(err) == 1
    assert "longitudinal.tsv was changed after match wrote it" in err[0] and "match" in err[0]


# ----------------------------------------------------------- stages that become out of date
def test_rerun_match_makes_fits_stale_until_fit_runs(done):
    root, out = done
    code, _ = call(["match", out], cwd=root)
    assert code == 0
    code, err = call(["report", out])
    assert code == 0 and any(line.startswith("warning:") and "fits.tsv" in line for line in err)
    assert "Out of date: fits.tsv" in (out / "report.html").read_text()
    outcomes = root / "outcomes.tsv"
    outcomes.write_text("subject\tlesion\toutcome\nA\t1\tyes\nB\t1\tno\nC\t1\tyes\n")
    code, err = call(["evaluate", out, "--outcomes", outcomes])
    assert code == 2 and "fits.tsv" in err[0] and "lesion-growth fit" in err[0]
    code, _ = call(["fit", out])
    assert code == 0
    code, err = call(["report", out])
    assert code == 0 and not [line for line in err if line.startswith("warning:")]
    assert "Out of date" not in (out / "report.html").read_text()


def test_report_of_run_reads_provenance_written_before_it(done):
    _, out = done
    page = (out / "report.html").read_text()
    assert "provenance.json is missing" not in page
    stages = json.loads((out / "provenance.json").read_text())["stages"]
    assert set(stages) == {"volumes", "match", "fit"}
    assert len(set(stages.values())) == 1                 # one run wrote all three


def test_report_waits_for_the_lock(done):
    # Contract: exit status 2 for a usage error; the page of a run in progress is never written.
    _, out = done
    before = (out / "report.html").read_bytes()
    with locked(out):
        code, err = call(["report", out])
    assert code == 2 and "another lesion-growth run is using this folder" in err[0]
    assert (out / "report.html").read_bytes() == before


# ----------------------------------------------- a smaller rerun killed at several moments


def killed_rerun(root: Path, out: Path, moment: str) -> None:
    """Rerun a one-subject manifest into ``out`` and SIGKILL it at the rename of ``moment``."""
    small = make_input(root / "small", subjects=("A",))
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(REPO), os.environ.get(
        "PYTHONPATH", "")]))
    done = subprocess.run([sys.executable, "-c", DRIVER, moment, "run", str(small), "-o",
                           str(out), "-q"], env=env, capture_output=True, timeout=120)
    assert done.returncode == -signal.SIGKILL, done.stderr


@pytest.mark.parametrize("moment, refused, resume", [
    ("masks.tsv", ["match", "fit"], None),
    ("longitudinal.tsv", ["fit"], "match"),
    ("fits.tsv", ["evaluate"], "fit")], ids=["lesions-rewritten", "inside-match", "inside-fit"])
def test_killed_smaller_rerun_is_never_taken_for_one_run(done, moment, refused, resume):
    # Issue: after an interrupted rerun, lesions.tsv held the new subjects, fits the old ones,
    # and the report showed the old count without a word.
    root, out = done
    killed_rerun(root, out, moment)
    outcomes = root / "outcomes.tsv"
    outcomes.write_text("subject\tlesion\toutcome\nA\t1\tyes\nB\t1\tno\nC\t1\tyes\n")
    code, err = call(["report", out])
    assert code == 0 and any(line.startswith("warning:") for line in err)
    assert "Out of date" in (out / "report.html").read_text()
    for command in refused:                 # each stage that would build on a mixed set
        extra = ["--outcomes", outcomes] if command == "evaluate" else []
        code, err = call([command, out, *extra])
        assert code == 2 and len(err) == 1, (command, err)
        assert "not from the current stage 1" in err[0] or "not usable" in err[0]
        assert "rerun" in err[0] or "run 'lesion-growth" in err[0]       # says what to run
    if resume is None:
        assert not (out / "provenance.json").exists()        # the old run's record is gone
        return
    for command in ("match", "fit")[("match", "fit").index(resume):]:
        code, err = call([command, out])
        assert code == 0, err
    assert subjects(out, "longitudinal.tsv") == subjects(out, "lesions.tsv") == {"A"}
    assert subjects(out, "fits.tsv") == {"A"}
    assert sorted(p.name for p in (out / "tracks").iterdir()) == [
        f"sub-A_ses-{t}_tracks.nii.gz" for t in (1, 2, 3)]       # no images of B or C left
    code, err = call(["report", out])
    assert code == 0 and not [line for line in err if line.startswith("warning:")]


# ------------------------------------------------------------------- summary and warnings
def test_summary_counts_rows_and_reuse_and_warns_of_a_shared_mask(tmp_path):
    make_input(tmp_path, subjects=("A",))
    shutil.copy(tmp_path / "A2.nii.gz", tmp_path / "copy.nii.gz")
    manifest = tmp_path / "m.tsv"
    manifest.write_text("subject\tsession\tmask\tday\n"
                        "A\t1\tA0.nii.gz\t0\nA\t2\tA1.nii.gz\t30\nA\t3\tA1.nii.gz\t60\n"
                        "B\t1\tA2.nii.gz\t0\nB\t2\tcopy.nii.gz\t30\n"
                        "C\t1\tA0.nii.gz\t0\nC\t1\tA1.nii.gz\t0\n")
    code, err = call(["run", manifest, "-o", tmp_path / "out", "-q"])
    assert code == 1
    summary = next(line for line in err if line.startswith("processed"))
    # 5 usable rows, 3 distinct contents: 2 hit the cache of this very run, none an earlier one
    assert "0 reused from an earlier run" in summary and "2 identical to another scan" in summary
    assert "; 2 failed" in summary                      # both rows of C's duplicated session
    assert "warning: sub A: the same mask file A1.nii.gz is given for sessions 2, 3" in err
    assert any("sub B: sessions 1, 2 have masks with identical content" in x for x in err)
    code, err = call(["run", manifest, "-o", tmp_path / "out", "-q"])
    assert "5 reused from an earlier run" in next(x for x in err if x.startswith("processed"))
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        call(["check", manifest])
    rows = [line.split("\t") for line in out.getvalue().splitlines()]
    assert [r[:5] for r in rows if r[4] == "same-mask"] == [
        ["warning", "A", "2", "A1.nii.gz", "same-mask"],
        ["warning", "A", "3", "A1.nii.gz", "same-mask"]]


def test_match_keeps_the_volume_settings_stage_1_used(done):
    # Contract: `match OUT` works on the lesions.tsv already in OUT; another connectivity in
    # --config must not relabel the components behind it.
    root, out = done
    config = root / "six.toml"
    config.write_text("[volumes]\nconnectivity = 6\n")
    before = read_table(out / "longitudinal.tsv")
    code, err = call(["match", out, "--config", config])
    assert code == 0, err
    assert read_table(out / "longitudinal.tsv").equals(before)


def test_fit_without_events_drops_the_old_phases_and_says_so(tmp_path):
    make_input(tmp_path / "in")
    events = tmp_path / "events.tsv"
    events.write_text("subject\tday\tevent\nA\t50\tradiosurgery\n")
    out = tmp_path / "out"
    assert call(["run", tmp_path / "in" / "manifest.tsv", "-o", out, "-q", "--events",
                 events])[0] == 0
    assert (out / "events.tsv").exists()
    code, err = call(["fit", out])
    assert code == 0 and any("no --events" in line for line in err)
    assert not (out / "events.tsv").exists()
    assert set(read_table(out / "fits.tsv").phase) == {"untreated"}
    assert "events" not in json.loads((out / "provenance.json").read_text())["files"]


def test_report_leaves_out_an_mri_image_changed_after_the_run(tmp_path):
    # provenance.json records each image's SHA-256 (contract); an overlay drawn from another
    # image would show QA staff a scan the tables were not made from.
    make_input(tmp_path / "in", subjects=("A",))
    rows = (tmp_path / "in" / "manifest.tsv").read_text().splitlines()
    for t in range(3):
        shutil.copy(tmp_path / "in" / f"A{t}.nii.gz", tmp_path / "in" / f"mri{t}.nii.gz")
    (tmp_path / "in" / "manifest.tsv").write_text("\n".join(
        [rows[0] + "\timage"] + [f"{r}\tmri{t}.nii.gz" for t, r in enumerate(rows[1:])]) + "\n")
    out = tmp_path / "out"
    assert call(["run", tmp_path / "in" / "manifest.tsv", "-o", out, "-q"])[0] == 0

    def pages() -> str:      # the index and every subject page
        return "".join(p.read_text() for p in [out / "report.html",
                                              *sorted((out / "report").glob("*.html"))])

    assert "image changed after the run" not in pages()
    shutil.copy(tmp_path / "in" / "A2.nii.gz", tmp_path / "in" / "mri0.nii.gz")
    assert call(["report", out])[0] == 0
    assert "image changed after the run" in pages()


def test_match_refuses_a_bids_folder_whose_session_dates_changed(tmp_path):
    # BIDS: session dates come from sub-<label>_sessions.tsv (acq_time); a changed date changes
    # the days behind every later table, so the recorded stage 1 no longer holds.
    make_input(tmp_path / "flat", subjects=("A",))
    root = tmp_path / "bids"
    for t in range(1, len(DATES) + 1):
        anat = root / "sub-A" / f"ses-{t}" / "anat"
        anat.mkdir(parents=True)
        shutil.copy(tmp_path / "flat" / f"A{t - 1}.nii.gz", anat / f"sub-A_ses-{t}_mask.nii.gz")
    sessions = root / "sub-A" / "sub-A_sessions.tsv"
    sessions.write_text("session_id\tacq_time\n" + "".join(
        f"ses-{t}\t{d}\n" for t, d in enumerate(DATES, start=1)))
    out = tmp_path / "out"
    assert call(["run", root, "-o", out, "-q"])[0] == 0
    assert call(["match", out], cwd=tmp_path / "flat")[0] == 0
    sessions.write_text(sessions.read_text().replace(DATES[1], "2024-02-20"))
    code, err = call(["match", out])
    assert code == 2 and len(err) == 1, err
    assert "lists other scans, days or files than when stage 1 ran" in err[0]
