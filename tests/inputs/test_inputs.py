"""Inputs: BIDS derivatives discovery (BIDS specification), NRRD/MetaImage through SimpleITK, and
header text fields never reaching an output."""
from __future__ import annotations

import gzip
import os

import nibabel as nib
import numpy as np
import pytest
import SimpleITK as sitk

from nifti_helpers import oblique_affine, random_blobs, save_mask
from pipeline.cli import main
from pipeline.inputs.manifest import discover_bids, read_inputs
from pipeline.io.nifti import load_mask
from pipeline.geometry import ras_to_itk_geometry
from pipeline.io.tsv import read_table
from pipeline.volumes.components import component_table

BLOB = np.zeros((10, 10, 6), np.uint8)
BLOB[3:6, 3:6, 2:4] = 1


def bids_tree(root, sessions_rows, *, prefix_in_tsv=True, extra_masks=()):
    """sub-01 with ses-1 and ses-2 masks and a sessions.tsv (BIDS: session_id, acq_time)."""
    anat = {}
    for ses in ("1", "2"):
        folder = root / "sub-01" / f"ses-{ses}" / "anat"
        folder.mkdir(parents=True)
        anat[ses] = folder
        save_mask(folder / f"sub-01_ses-{ses}_desc-lesion_mask.nii.gz", BLOB, np.eye(4))
    for ses, desc in extra_masks:
        save_mask(anat[ses] / f"sub-01_ses-{ses}_desc-{desc}_mask.nii.gz", BLOB, np.eye(4))
    if sessions_rows is not None:
        lines = ["session_id\tacq_time"] + [
            f"{'ses-' if prefix_in_tsv else ''}{s}\t{t}" for s, t in sessions_rows]
        (root / "sub-01" / "sub-01_sessions.tsv").write_text("\n".join(lines) + "\n")
    return root


@pytest.mark.parametrize("prefix", [True, False])
def test_bids_sessions_with_or_without_prefix_and_pre_1925_dates(tmp_path, prefix):
    # Reference: BIDS specification - sessions.tsv session_id (with the ses- prefix in the spec's
    # example) and acq_time; de-identified datasets shift dates to 1925 or earlier.
    root = bids_tree(tmp_path, [("1", "1867-06-15T13:45:30"), ("2", "1867-08-14T13:45:30")],
                     prefix_in_tsv=prefix)
    scans = discover_bids(root)
    assert [(s.subject, s.session, s.day, s.error) for s in scans] == [
        ("01", "1", 0.0, ""), ("01", "2", 60.0, "")]
    assert scans[0].mask == "sub-01/ses-1/anat/sub-01_ses-1_desc-lesion_mask.nii.gz"


def test_bids_without_sessions_tsv_is_an_error_per_session(tmp_path, capsys):
    root = bids_tree(tmp_path / "bids", None)
    code = main(["volumes", str(root), "-o", str(tmp_path / "out")])
    assert code == 1
    errors = read_table(tmp_path / "out" / "errors.tsv")
    assert len(errors) == 2 and errors.reason.str.contains("sessions.tsv").all()


def test_bids_several_masks_use_desc_or_fail(tmp_path):
    root = bids_tree(tmp_path / "bids", [("1", "2020-01-01"), ("2", "2020-02-01")],
                     extra_masks=[("1", "manual")])
    scans = discover_bids(root)
    assert all(not s.error for s in scans)            # desc-lesion chosen by default
    scans = discover_bids(root, desc="manual")
    assert not scans[0].error and "desc-manual" in scans[0].mask
    scans = discover_bids(root, desc="auto")            # neither file is desc-auto
    assert "several masks" in scans[0].error and "sub-01_ses-1_desc-manual" in scans[0].error
    assert not scans[1].error                            # ses-2 has a single mask


def test_manifest_bids_same_result(tmp_path):
    root = bids_tree(tmp_path / "bids", [("1", "2020-01-01"), ("2", "2020-02-01")])
    manifest = tmp_path / "m.tsv"
    manifest.write_text("subject\tsession\tmask\tdate\n" + "".join(
        f"01\t{s}\tbids/sub-01/ses-{s}/anat/sub-01_ses-{s}_desc-lesion_mask.nii.gz\t2020-0{s}-01\n"
        for s in ("1", "2")))
    a, kind_a = read_inputs(manifest)
    b, kind_b = read_inputs(root)
    assert (kind_a, kind_b) == ("manifest", "bids")
    assert [(s.subject, s.session, s.day) for s in a] == [(s.subject, s.session, s.day) for s in b]


@pytest.mark.parametrize("suffix", [".nrrd", ".mha", ".mhd"])
def test_itk_formats_give_the_nifti_result(tmp_path, suffix):
    # Reference: SimpleITK writes the same array and geometry (LPS) that nibabel writes as NIfTI
    # (RAS); both files must give identical lesion tables.
    data, affine = random_blobs(seed=4), oblique_affine()
    nifti = save_mask(tmp_path / "m.nii.gz", data, affine)
    image = sitk.GetImageFromArray(data.transpose(2, 1, 0).copy())
    origin, spacing, direction = ras_to_itk_geometry(affine)
    image.SetOrigin(origin)
    image.SetSpacing(spacing)
    image.SetDirection(direction)
    sitk.WriteImage(image, str(tmp_path / f"m{suffix}"))
    a, b = load_mask(nifti), load_mask(tmp_path / f"m{suffix}")
    np.testing.assert_allclose(b.affine, a.affine, atol=1e-6)
    ta, _, _ = component_table(a.data, a.affine)
    tb, _, _ = component_table(b.data, b.affine)
    np.testing.assert_allclose(ta.to_numpy(float), tb.to_numpy(float), atol=1e-6)


def test_header_text_fields_never_reach_outputs(tmp_path):
    # Common practice (PHI hygiene): descrip/aux_file/intent_name/db_name and extensions can hold
    # identifiers; outputs are built from geometry only.
    secret = "Doe^Jane 1970-01-01"
    image = nib.Nifti1Image(BLOB, np.eye(4))
    image.set_qform(np.eye(4), 1)
    image.header["descrip"] = secret.encode()
    image.header["aux_file"] = b"MRN12345"
    image.header["intent_name"] = b"MRN12345"
    image.header.extensions.append(nib.nifti1.Nifti1Extension("comment", secret.encode()))
    for n in (1, 2):
        nib.save(image, str(tmp_path / f"m{n}.nii.gz"))
    (tmp_path / "m.tsv").write_text("subject\tsession\tmask\tdate\n"
                                    "S\t1\tm1.nii.gz\t2020-01-01\nS\t2\tm2.nii.gz\t2020-02-01\n")
    assert main(["run", str(tmp_path / "m.tsv"), "-o", str(tmp_path / "out"), "-q"]) == 0
    for folder, _, files in os.walk(tmp_path / "out"):
        for name in files:
            raw = open(os.path.join(folder, name), "rb").read()
            if name.endswith(".gz"):
                raw = gzip.decompress(raw)
            assert b"Doe^Jane" not in raw and b"MRN12345" not in raw, name


def test_absolute_manifest_paths_stay_out_of_tables(tmp_path):
    # Issue rule: outputs never hold absolute machine paths except provenance.json (as given).
    (tmp_path / "in").mkdir()
    save_mask(tmp_path / "in" / "a.nii.gz", BLOB, np.eye(4))
    (tmp_path / "in" / "m.tsv").write_text(
        "subject\tsession\tmask\tdate\n"
        f"S\t1\t{tmp_path / 'in' / 'a.nii.gz'}\t2020-01-01\n"
        f"S\t2\t{tmp_path / 'in' / 'gone.nii.gz'}\t2020-02-01\n")
    assert main(["run", str(tmp_path / "in" / "m.tsv"), "-o", str(tmp_path / "out"), "-q"]) == 1
    for path in (tmp_path / "out").glob("*"):
        if path.is_file() and path.name != "provenance.json":
            assert str(tmp_path) not in path.read_text(errors="ignore"), path.name
    assert str(tmp_path / "in" / "a.nii.gz") in (tmp_path / "out" / "provenance.json").read_text()
    assert read_table(tmp_path / "out" / "errors.tsv").reason[0].startswith("gone.nii.gz:")


def test_a_subject_with_two_groups_is_refused_in_one_line(tmp_path):
    # Reference: README (bad input): ambiguous rows are refused whole; a subject belongs to one
    # group (common practice: a treatment arm is a property of the patient).
    (tmp_path / "m.tsv").write_text("subject\tsession\tmask\tday\tgroup\n"
                                    "A\t1\ta1.nii.gz\t0\tarm-1\nA\t2\ta2.nii.gz\t30\tarm-2\n"
                                    "B\t1\tb1.nii.gz\t0\tarm-1\nB\t2\tb2.nii.gz\t30\tarm-1\n")
    scans, _ = read_inputs(tmp_path / "m.tsv")
    errors = {s.key: s.error for s in scans}
    assert errors[("B", "1")] == errors[("B", "2")] == ""
    for session in ("1", "2"):
        assert "subject A has different groups in its rows ('arm-1', 'arm-2')" in \
            errors[("A", session)] and "\n" not in errors[("A", session)]
