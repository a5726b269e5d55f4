"""Bad-input matrix through ``lesion-growth run`` (issue 7, item 1).

Each case asserts, as docs/outputs.md (§1 "Installation and exit status", §5 "Rules behind the
columns") asks:
one line on stderr naming the subject/session, the file and the reason; one ``errors.tsv`` row; exit
status 1; and every good row still present and correct. Usage and configuration errors exit 2 before
any work starts. Cases already covered for ``volumes`` by tests/commands/test_bad_inputs.py are not
repeated.

Header layouts follow the NIfTI-1 standard (nifti1.h); nibabel is the independent writer of every
file. Cases that once showed a defect (named D1-D20 below) stay as regression tests.
"""
from __future__ import annotations

import gzip
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from cli_helpers import HEADER, call, errors_of, write_manifest
from nifti_helpers import save_mask

from pipeline.cli import main
from pipeline.io.tsv import read_table

GOOD = np.zeros((12, 12, 8), np.uint8)
GOOD[3:6, 3:6, 2:4] = 1          # 3 x 3 x 2 = 18 voxels, centre of the box at voxel (4, 4, 2.5)
GOOD_ROWS = [("G", "1", "good.nii.gz", "2024-01-01"), ("G", "2", "good.nii.gz", "2024-02-01")]


# ----------------------------------------------------------------------------------- helpers
def nifti_bytes(data: np.ndarray, *, affine=None, edit=None, dtype=None) -> bytes:
    """A single-file NIfTI-1 (.nii) written field by field, so a header can say what nibabel's
    own writer would refuse to write. ``edit(header)`` changes fields after the geometry is set."""
    affine = np.eye(4) if affine is None else affine
    header = nib.Nifti1Header()
    header.set_data_dtype(dtype or data.dtype)
    header.set_data_shape(data.shape)
    header.set_sform(affine, code=1)
    header.set_qform(affine, code=1)
    header.set_xyzt_units("mm")
    header["vox_offset"] = 352          # NIfTI-1: data of a .nii start at byte 352 or later
    if edit is not None:
        edit(header)
    body = np.asarray(data, dtype=header.get_data_dtype()).tobytes(order="F")
    return header.binaryblock + bytes(4) + body


def assert_good_subject_intact(out: Path) -> None:
    """The good subject's rows: 18 voxels of 1 mm^3 at world (4, 4, 2.5) mm on days 0 and 31.

    Reference: analytic box (3 x 3 x 2 voxels, identity affine: volume = voxels x |det A|,
    centroid = mean voxel centre); days from the calendar (31 days in January)."""
    lesions = read_table(out / "lesions.tsv")
    good = lesions[lesions.subject == "G"]
    assert good.session.tolist() == ["1", "2"]
    assert good.voxels.tolist() == [18, 18] and good.volume_mm3.tolist() == [18.0, 18.0]
    assert good.day.tolist() == [0.0, 31.0]
    np.testing.assert_allclose(good[["centroid_x_mm", "centroid_y_mm", "centroid_z_mm"]],
                               [[4.0, 4.0, 2.5]] * 2)
    longitudinal = read_table(out / "longitudinal.tsv")
    track = longitudinal[longitudinal.subject == "G"]
    assert track.lesion.tolist() == [1, 1] and track.status.tolist() == ["present", "present"]
    assert (out / "tracks" / "sub-G_ses-2_tracks.nii.gz").exists()


def assert_reported(out: Path, err: str, subject: str, file: str, words: str, *,
                    sessions=("1",)) -> None:
    """One errors.tsv row per refused session naming the file and the reason, and one stderr
    line per row naming the subject, the session and the reason (docs/outputs.md §1: exit status,
    messages)."""
    errors = errors_of(out)
    mine = errors[errors.subject == subject]
    assert sorted(mine.session) == sorted(sessions), mine
    for reason in mine.reason:
        assert words in reason and "\n" not in reason, reason
        assert file in reason, reason
    for session in sessions:
        lines = [x for x in err.splitlines() if f"sub {subject} ses {session}:" in x]
        assert len(lines) == 1 and words in lines[0], (subject, session, err)


# --------------------------------------------------- one run over many bad masks (module-wide)
def _image(folder: Path, name: str, shape) -> str:
    save_mask(folder / name, np.zeros(shape, np.int16), np.eye(4))
    return name


def _scaled(slope: float):
    def edit(header):
        header.set_slope_inter(slope, 0.0)
    return edit


def _pixdim(index: int, value: float, *, qform_only: bool):
    def edit(header):
        header["pixdim"][index] = value
        if qform_only:              # geometry from the qform alone, i.e. from pixdim
            header["sform_code"] = 0
    return edit


def _srow(row: str, values, *, qform_off: bool = True):
    def edit(header):
        header[row] = values
        if qform_off:
            header["qform_code"] = 0
    return edit


RGB = np.dtype([("R", "u1"), ("G", "u1"), ("B", "u1")])
ESCAPES = ("nibabel's own exception escapes pipeline.io.load_mask: `run` records 'internal error "
           "...' instead of a reason, and `check` (which catches only InputError) ends with a "
           "traceback")


def _gz(raw: bytes) -> bytes:
    return gzip.compress(raw, mtime=0)


def _field(name: str, value):
    def edit(header):
        header[name] = value
        if name.startswith("quatern"):
            header["sform_code"] = 0        # the qform decides the geometry
    return edit


#: subject -> (mask file, bytes maker, words expected in the reason, the defect it once showed,
#: whether `check` survives the file today)
MASK_CASES = {
    "vox_zero": ("vox_zero.nii", lambda: nifti_bytes(GOOD, edit=_pixdim(1, 0.0, qform_only=True)),
                 "impossible voxel sizes",
                 "defect D1: nibabel's header check silently sets a zero pixdim to 1 before "
                 "pipeline.io.nifti_affine looks at it, so the mask is measured with 1 mm voxels",
                 True),
    "vox_negative": ("vox_negative.nii",
                     lambda: nifti_bytes(GOOD, edit=_pixdim(2, -1.0, qform_only=True)),
                     "impossible voxel sizes",
                     "defect D1: nibabel's header check silently replaces a negative pixdim by "
                     "its absolute value; the tool never sees it", True),
    "vox_nan": ("vox_nan.nii", lambda: nifti_bytes(GOOD, edit=_pixdim(3, np.nan, qform_only=False)),
                "impossible voxel sizes", "", True),
    "slope_fraction": ("slope_fraction.nii",
                       lambda: nifti_bytes(GOOD * 2, dtype=np.int16, edit=_scaled(0.3)),
                       "labels must be integers after scl_slope/scl_inter scaling", "", True),
    "singular": ("singular.nii", lambda: nifti_bytes(GOOD, edit=_srow("srow_y", [0, 0, 0, 0])),
                 "affine is singular", "", True),
    "nonfinite": ("nonfinite.nii",
                  lambda: nifti_bytes(GOOD, edit=_srow("srow_z", [0, 0, np.inf, 0])),
                  "affine has non-finite values", "", True),
    "rgb": ("rgb.nii", lambda: nifti_bytes(np.zeros(GOOD.shape, RGB), dtype=RGB), "data type",
            "defect D9: an RGB24 mask raises TypeError inside pipeline.io.integer_labels; "
            + ESCAPES, False),
    "quaternion": ("quaternion.nii", lambda: nifti_bytes(GOOD, edit=_field("quatern_b", 2.0)),
                   "", "defect D16: a qform quaternion with b^2+c^2+d^2 > 1 makes nibabel raise "
                   "ValueError('w2 should be positive'); " + ESCAPES, False),
    "inter_nan": ("inter_nan.nii", lambda: nifti_bytes(GOOD, edit=_field("scl_inter", np.nan)),
                  "", "defect D17: scl_slope 1 with scl_inter NaN makes nibabel's get_slope_inter "
                  "raise HeaderDataError; " + ESCAPES, False),
    "offset_inf": ("offset_inf.nii", lambda: nifti_bytes(GOOD, edit=_field("vox_offset", np.inf)),
                   "", "defect D19: int(vox_offset) on an infinite vox_offset raises "
                   "OverflowError; " + ESCAPES, False),
    "offset_huge": ("offset_huge.nii.gz",
                    lambda: _gz(nifti_bytes(GOOD, edit=_field("vox_offset", 1e12))), "",
                    "defect D20: the gzip reader allocates vox_offset + data bytes before any "
                    "check (the memory cap covers the data only): 1 TB asked for, MemoryError; "
                    "`run` blames memory, `check` crashes", False),
}


@pytest.fixture(scope="module")
def many_bad(tmp_path_factory):
    """One ``run`` over a manifest holding the good subject and one subject per bad mask."""
    folder = tmp_path_factory.mktemp("many_bad")
    save_mask(folder / "good.nii.gz", GOOD, np.eye(4))
    rows = list(GOOD_ROWS)
    for subject, (file, make, *_) in MASK_CASES.items():
        (folder / file).write_bytes(make())
        rows.append((subject, "1", file, "2024-01-01"))
    # scl_slope 0.5 on stored values 2 and 4 gives the labels 1 and 2 (accepted)
    scaled = GOOD * 2
    scaled[8:10, 8:10, 5:7] = 4
    (folder / "slope_whole.nii").write_bytes(nifti_bytes(scaled, dtype=np.int16, edit=_scaled(0.5)))
    rows.append(("slope_whole", "1", "slope_whole.nii", "2024-01-01"))
    # sform and qform 5 mm apart along x: a warning, the sform is used
    (folder / "disagree.nii").write_bytes(nifti_bytes(GOOD, edit=_srow("srow_x", [1, 0, 0, 5.0],
                                                                       qform_off=False)))
    rows.append(("disagree", "1", "disagree.nii", "2024-01-01"))
    rows.append(("date_bad", "1", "good.nii.gz", "2024-02-30"))
    rows = [r + ("",) for r in rows]
    rows.append(("grid", "1", "good.nii.gz", "2024-01-01", _image(folder, "small.nii.gz",
                                                                   (10, 12, 8))))
    manifest = write_manifest(folder, rows, header=HEADER + ("image",))
    # `check` crashes on some masks (their own test below): check the rest alone
    crashers = {s for s, case in MASK_CASES.items() if not case[4]}
    checkable = write_manifest(folder, [r for r in rows if r[0] not in crashers],
                               header=HEADER + ("image",), name="checkable.tsv")
    out = folder / "out"
    code, err = call(["run", manifest, "-o", out, "-q"])
    return {"folder": folder, "manifest": manifest, "checkable": checkable, "out": out,
            "code": code, "err": err}


def test_many_bad_masks_exit_1_and_good_rows_intact(many_bad):
    # Reference: docs/outputs.md §1, exit status 1 = some inputs failed, the rest processed and
    # written.
    assert many_bad["code"] == 1
    assert_good_subject_intact(many_bad["out"])


@pytest.mark.parametrize("subject", [
    s for s in MASK_CASES])
def test_bad_mask_is_one_error_row_and_one_line(many_bad, subject):
    # Reference: NIfTI-1 standard (nifti1.h): pixdim[i] "voxel width ... (positive)"; the sform/
    # qform must give an invertible finite voxel -> world map; scaled value = scl_slope * stored
    # + scl_inter, and docs/outputs.md §5.1 requires integral labels; datatypes a program does not
    # handle
    # must "fail gracefully". docs/outputs.md §1 and §4.10: one line and one errors.tsv row per
    # refused input.
    file, _, words, *_ = MASK_CASES[subject]
    out = many_bad["out"]
    assert_reported(out, many_bad["err"], subject, file, words)
    row = errors_of(out).query("subject == @subject").iloc[0]
    assert row.path == file and row.reason.startswith(file + ":")
    assert "internal error" not in row.reason and "out of memory" not in row.reason
    assert subject not in set(read_table(out / "lesions.tsv").subject)


def test_integral_scl_slope_is_accepted(many_bad):
    # Reference: NIfTI-1 standard, scaled value = scl_slope * stored + scl_inter; nibabel's
    # get_fdata applies the same scaling and is used here as the independent reader.
    out = many_bad["out"]
    assert "slope_whole" not in set(errors_of(out).subject)
    rows = read_table(out / "lesions.tsv").query("subject == 'slope_whole'")
    scaled = np.rint(nib.load(many_bad["folder"] / "slope_whole.nii").get_fdata()).astype(int)
    assert sorted(rows.label) == sorted(np.unique(scaled[scaled > 0]).tolist()) == [1, 2]
    assert sorted(rows.voxels) == [8, 18]


def test_sform_qform_disagreement_warns_and_uses_sform(many_bad, capsys):
    # Reference: NIfTI-1 standard, method 3 (sform) when sform_code > 0; nibabel get_best_affine
    # prefers the sform the same way. The lesion's world x is the box centre 4 + the 5 mm shift.
    out = many_bad["out"]
    assert "disagree" not in set(errors_of(out).subject)
    row = read_table(out / "lesions.tsv").query("subject == 'disagree'").iloc[0]
    assert row.centroid_x_mm == pytest.approx(9.0)
    assert "header warnings" in many_bad["err"]
    code = main(["check", str(many_bad["checkable"])])
    lines = [x for x in capsys.readouterr().out.splitlines() if x.startswith("warning\tdisagree")]
    assert code == 1 and len(lines) == 1
    assert "disagree.nii: sform and qform disagree by 5 mm; using the sform" in lines[0]


@pytest.mark.parametrize("subject", [
    s for s, c in MASK_CASES.items() if not c[4]])
def test_check_lists_unusable_mask_without_crashing(many_bad, subject, capsys):
    # Reference: NIfTI-1 standard (nifti1.h): a program "should fail gracefully" on a header it
    # cannot use; docs/outputs.md §5.8: `check` exits 1 and lists the unusable inputs, one line
    # each.
    folder = many_bad["folder"]
    file = MASK_CASES[subject][0]
    manifest = write_manifest(folder, GOOD_ROWS + [(subject, "1", file, "2024-01-01")],
                              name=f"check_{subject}.tsv")
    code = main(["check", str(manifest)])
    lines = [x for x in capsys.readouterr().out.splitlines() if x.startswith(f"error\t{subject}\t")]
    assert code == 1 and len(lines) == 1 and file in lines[0]


def test_impossible_date_is_an_error_row(many_bad):
    # Reference: ISO 8601 / proleptic Gregorian calendar: February 2024 has 29 days.
    assert_reported(many_bad["out"], many_bad["err"], "date_bad", "2024-02-30",
                    "is not an ISO 8601 date")


def test_check_reports_image_grid_mismatch(many_bad, capsys):
    # Reference: docs/outputs.md §2, `check` validates geometry; the image (10, 12, 8) cannot sit
    # under the
    # mask (12, 12, 8).
    main(["check", str(many_bad["checkable"])])
    lines = [x for x in capsys.readouterr().out.splitlines() if "\tgrid\t" in x]
    assert len(lines) == 1 and lines[0].startswith("error\tgrid\t1\tgood.nii.gz\timage-grid")
    assert "small.nii.gz: image grid (10, 12, 8) does not match the mask grid (12, 12, 8)" \
        in lines[0]


def test_run_reports_image_grid_mismatch_and_keeps_lesions(many_bad):
    # Reference: docs/outputs.md §2 and §4.10 ("check" validates geometry; errors.tsv lists inputs
    # that failed); the
    # brief of issue 7: the mask's lesions are still measured.
    out = many_bad["out"]
    assert_reported(out, many_bad["err"], "grid", "small.nii.gz", "does not match the mask grid")
    assert read_table(out / "lesions.tsv").query("subject == 'grid'").voxels.tolist() == [18]


# ------------------------------------------------------------------ cases that need their own run
@pytest.fixture
def good_folder(tmp_path):
    save_mask(tmp_path / "good.nii.gz", GOOD, np.eye(4))
    return tmp_path


def test_out_of_range_date_is_an_error_row(good_folder):
    # Reference: Python datetime range (years 1..9999); 9999-12-31T23:59:59-12:00 is after the
    # last representable UTC moment, so it cannot be a session date.
    rows = GOOD_ROWS + [("T", "1", "good.nii.gz", "9999-12-31T23:59:59-12:00")]
    out = good_folder / "out"
    code, err = call(["run", write_manifest(good_folder, rows), "-o", out, "-q"])
    assert code == 1
    assert_reported(out, err, "T", "9999-12-31", "date")
    assert_good_subject_intact(out)


def test_bids_subject_without_sessions_tsv(tmp_path):
    # Reference: BIDS specification, sessions file sub-<label>/sub-<label>_sessions.tsv with
    # session_id and acq_time; without it a session cannot be dated (docs/outputs.md §3.2, BIDS
    # input).
    root = tmp_path / "bids"
    for subject in ("G", "N"):
        for session in ("1", "2"):
            anat = root / f"sub-{subject}" / f"ses-{session}" / "anat"
            anat.mkdir(parents=True)
            save_mask(anat / f"sub-{subject}_ses-{session}_desc-lesion_mask.nii.gz", GOOD,
                      np.eye(4))
    (root / "sub-G" / "sub-G_sessions.tsv").write_text(
        "session_id\tacq_time\nses-1\t2024-01-01T09:00:00\nses-2\t2024-02-01T09:00:00\n")
    out = tmp_path / "out"
    code, err = call(["run", root, "-o", out, "-q"])
    assert code == 1
    assert_reported(out, err, "N", "sub-N_sessions.tsv", "not found", sessions=("1", "2"))
    paths = errors_of(out).path.tolist()
    assert paths == [f"sub-N/ses-{s}/anat/sub-N_ses-{s}_desc-lesion_mask.nii.gz" for s in "12"]
    assert_good_subject_intact(out)


@pytest.fixture
def two_subjects(tmp_path):
    """G (the good subject) and H: two lesions each session, H's second lesion grows."""
    save_mask(tmp_path / "good.nii.gz", GOOD, np.eye(4))
    rows = list(GOOD_ROWS)
    for session, date, size in (("1", "2024-01-01", 2), ("2", "2024-02-01", 3),
                                ("3", "2024-03-01", 4)):
        data = GOOD.copy()
        data[8:8 + size, 8:10, 5:7] = 1
        save_mask(tmp_path / f"h{session}.nii.gz", data, np.eye(4))
        rows.append(("H", session, f"h{session}.nii.gz", date))
    return tmp_path, write_manifest(tmp_path, rows)


def _longitudinal(out: Path, subject: str):
    table = read_table(out / "longitudinal.tsv")
    return table[table.subject == subject][["lesion", "session", "volume_mm3"]].values.tolist()


def run_with_events(folder: Path, manifest, events: str):
    """`run` on the two-subject input with ``events`` as its events table: (OUT, status, stderr)."""
    (folder / "events.tsv").write_text(events)
    out = folder / "out"
    code, err = call(["run", manifest, "-o", out, "--events", folder / "events.tsv", "-q"])
    return out, code, err


def test_events_naming_unknown_subject(two_subjects):
    # Reference: docs/outputs.md §3.3 (events table; errors.tsv lists inputs that failed). Row 2 of
    # the events
    # file names subject Z, absent from the input.
    out, code, err = run_with_events(*two_subjects, "subject\tdate\tevent\n"
                                     "Z\t2024-01-10\tradiosurgery\nH\t2024-01-10\tradiosurgery\n")
    assert code == 1
    row = errors_of(out).query("subject == 'Z'")
    assert len(row) == 1 and row.stage.iloc[0] == "events"
    assert row.reason.iloc[0] == "events.tsv row 2: subject 'Z' is not in the input"
    assert len([x for x in err.splitlines() if "sub Z" in x and "events.tsv row 2" in x]) == 1
    events = read_table(out / "events.tsv")
    assert events.subject.tolist() == ["H"] and events.day.tolist() == [9.0]
    assert_good_subject_intact(out)


def test_events_naming_unknown_lesion(two_subjects):
    # Reference: issue 7 list ("an events ... file that names unknown subjects or lesions") and
    # docs/outputs.md §3.3 (events `lesion` names one lesion track).
    out, code, err = run_with_events(*two_subjects, "subject\tdate\tevent\tlesion\n"
                                     "H\t2024-01-10\tradiosurgery\t99\n")
    assert code == 1
    row = errors_of(out).query("subject == 'H'")
    assert len(row) == 1 and "99" in row.reason.iloc[0] and "row 2" in row.reason.iloc[0]
    assert len([x for x in err.splitlines() if "sub H" in x and "99" in x]) == 1
    assert_good_subject_intact(out)


def test_corrections_naming_unknown_subject(two_subjects):
    # Reference: docs/outputs.md §3.4, corrections.tsv: "Unknown subject/session/component/lesion
    # ids are input errors naming the row".
    folder, manifest = two_subjects
    (folder / "corrections.tsv").write_text("subject\tsession\tcomponent\tlesion\nZ\t1\t1\t1\n")
    out = folder / "out"
    code, err = call(["run", manifest, "-o", out, "--corrections", folder / "corrections.tsv",
                      "-q"])
    assert code == 1
    row = errors_of(out).query("subject == 'Z'")
    assert len(row) == 1 and "line 2" in row.reason.iloc[0]
    assert len([x for x in err.splitlines() if "sub Z" in x]) == 1
    assert_good_subject_intact(out)


def test_corrections_naming_unknown_lesion(two_subjects):
    # Reference: docs/outputs.md §3.4 (unknown ids are input errors naming the row) and §1
    # (exit 1: the rest processed and written; a message on stderr for every failed input).
    folder, manifest = two_subjects
    plain = folder / "plain"
    assert call(["run", manifest, "-o", plain, "-q"])[0] == 0
    (folder / "corrections.tsv").write_text("subject\tsession\tcomponent\tlesion\nH\t2\t1\t99\n")
    out = folder / "out"
    code, err = call(["run", manifest, "-o", out, "--corrections", folder / "corrections.tsv",
                      "-q"])
    assert code == 1
    row = errors_of(out).query("subject == 'H'")
    assert len(row) == 1 and "line 2" in row.reason.iloc[0] and "'99'" in row.reason.iloc[0]
    assert len([x for x in err.splitlines() if "sub H" in x and "99" in x]) == 1
    # the automatic result for H is kept (the refused correction is not applied)
    assert _longitudinal(out, "H") == _longitudinal(plain, "H")
    assert (out / "tracks" / "sub-H_ses-3_tracks.nii.gz").exists()
    assert_good_subject_intact(out)


def test_correction_errors_name_the_file_given(two_subjects):
    # Reference: HELPER rules / contract: bad input gets a one-line error naming the file and the
    # reason, and errors.tsv lists the path (common practice: the path as the user gave it).
    folder, manifest = two_subjects
    fixes = folder / "qa-fixes.tsv"
    fixes.write_text("subject\tsession\tcomponent\tlesion\nH\t2\t1\t99\nZ\t1\t1\t1\n")
    out = folder / "out"
    code, err = call(["run", manifest, "-o", out, "--corrections", fixes, "-q"])
    assert code == 1
    errors = errors_of(out).query("stage == 'match'")
    assert sorted(errors.subject) == ["H", "Z"]
    assert (errors.path == str(fixes)).all()
    assert errors.reason.str.startswith(f"{fixes} line ").all()
    assert "corrections.tsv" not in err
    assert_good_subject_intact(out)


def test_label_with_path_separator_is_refused_and_nothing_escapes_out(good_folder):
    # Reference: docs/outputs.md §3.1 (outputs are written in OUT; file names are built from the
    # labels);
    # BIDS labels are alphanumeric (BIDS specification, entities).
    rows = GOOD_ROWS + [("../../../x", "1", "good.nii.gz", "2024-01-01"),
                        ("../../../x", "2", "good.nii.gz", "2024-02-01")]
    out = good_folder / "a" / "b" / "out"
    code, err = call(["run", write_manifest(good_folder, rows), "-o", out, "-q"])
    outside = [p for p in good_folder.rglob("*_tracks.nii.gz") if out not in p.parents]
    assert outside == []
    assert code == 1
    assert_reported(out, err, "../../../x", "", "subject", sessions=("1", "2"))
    assert_good_subject_intact(out)


def test_cohort_with_one_session_per_subject_runs(good_folder):
    # Reference: docs/outputs.md §4.7 ("A law is fitted only when the phase has at least as many
    # sessions as
    # the law has free parameters; otherwise no row is written for it"): a first export with
    # one session per patient is valid input. (Regression test of defect D11: this input ended
    # the whole run with a pandas TypeError in growth_notes._choose_best.)
    rows = [("G", "1", "good.nii.gz", "2024-01-01"), ("K", "1", "good.nii.gz", "2024-03-01")]
    out = good_folder / "out"
    code, err = call(["run", write_manifest(good_folder, rows), "-o", out, "-q"])
    assert code == 0, err
    assert read_table(out / "lesions.tsv").subject.tolist() == ["G", "K"]
    assert read_table(out / "longitudinal.tsv").status.tolist() == ["present", "present"]
    assert (out / "fits.tsv").exists() and (out / "provenance.json").exists()


D18 = ("defect D18: pipeline.io.tsv.read_table lets pandas take the first column as the row index "
       "when rows have one field more than the header (a trailing tab, as spreadsheets export): "
       "every column shifts by one")


def test_manifest_rows_ending_with_a_tab_are_read_as_written(good_folder):
    # Reference: pandas.read_csv documentation, index_col=False "can be used to force pandas to
    # not use the first column as the index, e.g. when you have a malformed file with delimiters
    # at the end of each line".
    text = "\t".join(HEADER) + "\n" + "".join("\t".join(r) + "\t\n" for r in GOOD_ROWS)
    (good_folder / "manifest.tsv").write_text(text)
    out = good_folder / "out"
    code, err = call(["run", good_folder / "manifest.tsv", "-o", out, "-q"])
    assert code == 0, err
    assert_good_subject_intact(out)


def test_table_rows_ending_with_a_tab_keep_their_columns(tmp_path):
    # Reference: pandas.read_csv documentation (index_col=False, as above); an events table as
    # a spreadsheet exports it.
    path = tmp_path / "events.tsv"
    path.write_text("subject\tday\tevent\nA\t3\tradiosurgery\t\nB\t5\tresection\t\n")
    table = read_table(path)
    assert table.subject.tolist() == ["A", "B"]
    assert table.event.tolist() == ["radiosurgery", "resection"]


def test_usage_message_is_one_line_when_the_input_holds_a_newline(good_folder):
    # Reference: docs/outputs.md §1, messages are "one line a person understands"; RFC 4180 quoting
    # lets a
    # field (here a column name) hold a line break.
    (good_folder / "manifest.tsv").write_text('"sub\nject"\tsession\tmask\tdate\n'
                                              "G\t1\tgood.nii.gz\t2024-01-01\n")
    code, err = call(["run", good_folder / "manifest.tsv", "-o", good_folder / "out", "-q"])
    assert code == 2
    lines = [x for x in err.splitlines() if x.strip()]
    assert len(lines) == 1 and "lacks column(s) subject" in lines[0]


# --------------------------------------------------- usage errors: exit 2, nothing written in OUT
def written(out: Path) -> list[str]:
    """Files in OUT other than the lock file (the lock is taken before the inputs are read)."""
    if not out.exists():
        return []
    return sorted(str(p.relative_to(out)) for p in out.rglob("*") if p.name != ".lock")


def _usage_cases():
    # defect D7 (fixed): events/corrections files used to be read after stages 1 and 2
    return [
        pytest.param("subject\tmask\tdate\nG\tgood.nii.gz\t2024-01-01\n", [], "lacks column(s) "
                     "session", id="manifest-missing-column"),
        pytest.param("subject\tsession\tmask\tdate\n", [], "no rows", id="manifest-empty"),
        pytest.param("", [], "cannot read the manifest", id="manifest-zero-bytes"),
        pytest.param(None, [], "not a BIDS derivatives folder", id="input-is-plain-folder"),
        pytest.param("MISSING", [], "input not found", id="input-missing"),
        pytest.param(GOOD_MANIFEST, ["--config", "bad.toml"], "unknown setting", id="config-key"),
        pytest.param(GOOD_MANIFEST, ["--workers", "-1"], "--workers", id="workers-negative"),
        pytest.param(GOOD_MANIFEST, ["--events", "nope.tsv"], "events file not found",
                     id="events-missing"),
        pytest.param(GOOD_MANIFEST, ["--events", "badevents.tsv"], "events table needs columns",
                     id="events-columns"),
        pytest.param(GOOD_MANIFEST, ["--corrections", "nope.tsv"], "corrections file not found",
                     id="corrections-missing"),
        pytest.param(GOOD_MANIFEST, ["--corrections", "badcorr.tsv"], "lacks column(s)",
                     id="corrections-columns"),
    ]


GOOD_MANIFEST = "subject\tsession\tmask\tdate\nG\t1\tgood.nii.gz\t2024-01-01\n" \
                "G\t2\tgood.nii.gz\t2024-02-01\n"


@pytest.mark.parametrize("manifest_text,extra,words", _usage_cases())
def test_usage_errors_exit_2_before_any_work(good_folder, manifest_text, extra, words):
    # Reference: docs/outputs.md §1, exit status 2 = usage or configuration error, nothing computed.
    folder = good_folder
    (folder / "bad.toml").write_text("[volumes]\nconectivity = 6\n")
    (folder / "badevents.tsv").write_text("subject\twhen\nG\t3\n")
    (folder / "badcorr.tsv").write_text("subject\tsession\nG\t1\n")
    if manifest_text is None:
        source = folder / "plain"
        source.mkdir()
    elif manifest_text == "MISSING":
        source = folder / "missing.tsv"
    else:
        source = folder / "manifest.tsv"
        source.write_text(manifest_text)
    extra = [str(folder / x) if x.endswith((".toml", ".tsv")) else x for x in extra]
    out = folder / "out"
    code, err = call(["run", source, "-o", out, "-q", *extra])
    assert code == 2
    assert words in err
    assert written(out) == []
