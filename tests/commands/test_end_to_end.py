"""`lesion-growth run` end to end on a small generated cohort with known truth."""
from __future__ import annotations

import json

import numpy as np
import nibabel as nib
import pytest

from cohort import DAYS, make_cohort
from pipeline.cli import main
from pipeline.io.tsv import read_table


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    folder = tmp_path_factory.mktemp("cohort")
    truth = make_cohort(folder / "in")
    code = main(["run", str(folder / "in" / "manifest.tsv"), "-o", str(folder / "out"), "-q"])
    return folder, truth, code


def test_exit_status_and_known_failure(finished):
    folder, _, code = finished
    assert code == 1   # docs/outputs.md §1: some inputs failed, the rest written
    errors = read_table(folder / "out" / "errors.tsv")
    assert errors[["subject", "session", "stage"]].values.tolist() == [["B", "4", "volumes"]]
    assert errors.reason[0] == "B_missing.nii.gz: file not found"


def test_known_lesion_volumes_and_beta(finished):
    # Reference: the closed form of dV/dt = alpha V^beta (docs/methods.md §1.1) used to draw the
    # spheres; voxelised spheres of radius >= 4.5 voxels deviate by < 8 % (docs/methods.md, check
    # value C23).
    folder, truth, _ = finished
    longitudinal = read_table(folder / "out" / "longitudinal.tsv")
    track = longitudinal[(longitudinal.subject == "A") & (longitudinal.lesion == 1)]
    assert track.day.tolist() == list(map(float, DAYS))
    np.testing.assert_allclose(track.volume_mm3, truth["volumes"], rtol=0.08)
    fits = read_table(folder / "out" / "fits.tsv")
    power = fits[(fits.subject == "A") & (fits.lesion == 1) & (fits.model == "power")].iloc[0]
    assert power.phase == "untreated" and power.n_points == 5
    assert abs(power.beta - truth["beta"]) < 0.35
    if np.isfinite(power.beta_ci_low) and np.isfinite(power.beta_ci_high):
        assert power.beta_ci_low <= truth["beta"] <= power.beta_ci_high


def test_known_split_is_in_matches_and_keeps_one_id(finished):
    folder, _, _ = finished
    matches = read_table(folder / "out" / "matches.tsv")
    splits = matches[(matches.subject == "A") & (matches.relation == "splits")]
    assert len(splits) == 2 and set(splits.session_to) == {"3"}
    longitudinal = read_table(folder / "out" / "longitudinal.tsv")
    second = longitudinal[(longitudinal.subject == "A") & (longitudinal.lesion == 2)]
    assert second.components.tolist() == [1, 1, 2, 2, 2]
    assert set(longitudinal[longitudinal.subject == "A"].lesion) == {1, 2}


def test_track_images_share_ids_and_copy_geometry(finished):
    folder, _, _ = finished
    for session in ("1", "5"):
        image = nib.load(str(folder / "out" / "tracks" / f"sub-A_ses-{session}_tracks.nii.gz"))
        mask = nib.load(str(folder / "in" / f"A_{session}.nii.gz"))
        np.testing.assert_array_equal(image.affine, mask.affine)
        data = np.asanyarray(image.dataobj)
        assert data.dtype == np.uint8 and set(np.unique(data)) == {0, 1, 2}
        assert ((data > 0) == (np.asanyarray(mask.dataobj) > 0)).all()
        assert image.header["descrip"].item() in (b"", "")


def test_outputs_are_bids_derivative_and_provenance_complete(finished):
    folder, _, _ = finished
    out = folder / "out"
    description = json.loads((out / "dataset_description.json").read_text())
    assert description["DatasetType"] == "derivative"
    provenance = json.loads((out / "provenance.json").read_text())
    assert "Research use only" in provenance["disclaimer"]
    masks = [s for s in provenance["scans"] if s["mask_sha256"]]
    assert len(masks) == 8 and all(len(s["mask_sha256"]) == 64 for s in masks)
    for name in ("lesions", "matches", "longitudinal", "fits", "group_fits", "errors"):
        assert (out / f"{name}.json").exists(), name


def test_rerun_reuses_finished_scans(finished, capsys):
    folder, _, _ = finished
    before = (folder / "out" / "lesions.tsv").read_bytes()
    code = main(["run", str(folder / "in" / "manifest.tsv"), "-o", str(folder / "out"), "-q"])
    err = capsys.readouterr().err
    assert code == 1 and "(0 computed, 8 reused" in err
    assert (folder / "out" / "lesions.tsv").read_bytes() == before


def test_torn_cache_entries_are_measured_again(finished, capsys):
    # Common practice (a cache is never trusted blindly): entries cut short or overwritten, as
    # a power loss may leave them (they are not fsynced), are misses, not failures.
    folder, _, _ = finished
    before = (folder / "out" / "lesions.tsv").read_bytes()
    entries = sorted((folder / "out" / ".cache" / "volumes").glob("*.npz"))
    entries[0].write_bytes(entries[0].read_bytes()[:100])
    entries[1].write_bytes(b"not a cache entry")
    code = main(["run", str(folder / "in" / "manifest.tsv"), "-o", str(folder / "out"), "-q"])
    err = capsys.readouterr().err
    assert code == 1 and "(2 computed, 6 reused" in err
    assert (folder / "out" / "lesions.tsv").read_bytes() == before


def test_subjects_are_never_matched_with_each_other(tmp_path):
    # Identity safety (common practice): two subjects with lesions at the same world positions
    # and on the same days are followed separately; every link stays inside one subject.
    make_cohort(tmp_path / "in")
    manifest = (tmp_path / "in" / "manifest.tsv").read_text().splitlines()
    twin = [line.replace("A\t", "Z\t", 1) for line in manifest[1:] if line.startswith("A\t")]
    (tmp_path / "in" / "manifest.tsv").write_text("\n".join(manifest + twin) + "\n")
    assert main(["run", str(tmp_path / "in" / "manifest.tsv"), "-o", str(tmp_path / "out"),
                 "-q"]) == 1
    longitudinal = read_table(tmp_path / "out" / "longitudinal.tsv")
    for subject in ("A", "Z"):
        rows = longitudinal[longitudinal.subject == subject]
        assert sorted(set(rows.lesion)) == [1, 2] and len(rows) == 10
    matches = read_table(tmp_path / "out" / "matches.tsv")
    assert set(matches.subject) == {"A", "B", "Z"}
    assert sorted(read_table(tmp_path / "out" / "lesions.tsv").query("subject == 'Z'")
                  .session.unique()) == ["1", "2", "3", "4", "5"]


@pytest.mark.parametrize("codes", [(0, 1), (1, 0), (2, 1)])
def test_track_image_copies_sform_and_qform_exactly(tmp_path, codes):
    # Reference: NIfTI-1 standard (nifti1.h) sform/qform and their codes; nibabel reads both
    # back from the written file. A sheared sform (no qform) must not gain an invented qform.
    sform = np.array([[1.0, 0.3, 0, -10], [0, 1.0, 0, 5], [0, 0, 2.0, 3], [0, 0, 0, 1]])
    qform = np.diag([1.0, 1.0, 2.0, 1.0])
    data = np.zeros((12, 12, 6), np.uint8)
    data[3:7, 3:7, 2:4] = 1
    image = nib.Nifti1Image(data, None)
    image.set_sform(sform if codes[0] else None, code=codes[0])
    image.set_qform(qform if codes[1] else None, code=codes[1])
    image.header.set_xyzt_units("mm")
    for session in ("1", "2"):
        nib.save(image, str(tmp_path / f"m{session}.nii.gz"))
    (tmp_path / "m.tsv").write_text("subject\tsession\tmask\tday\nS\t1\tm1.nii.gz\t0\n"
                                    "S\t2\tm2.nii.gz\t30\n")
    assert main(["run", str(tmp_path / "m.tsv"), "-o", str(tmp_path / "out"), "-q"]) == 0
    track = nib.load(str(tmp_path / "out" / "tracks" / "sub-S_ses-1_tracks.nii.gz")).header
    source = nib.load(str(tmp_path / "m1.nii.gz")).header
    assert (int(track["sform_code"]), int(track["qform_code"])) == codes
    for getter in ("get_sform", "get_qform"):
        got, want = getattr(track, getter)(coded=True), getattr(source, getter)(coded=True)
        assert (got[0] is None) == (want[0] is None)
        if want[0] is not None:
            np.testing.assert_allclose(got[0], want[0], atol=1e-5)
