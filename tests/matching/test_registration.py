"""SimpleITK rigid registration and the one RAS<->LPS helper."""
from __future__ import annotations

import importlib.resources

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import SimpleITK as sitk

from pipeline.matching.links import match_subject
from pipeline.geometry import LPS_TO_RAS as LPS
from pipeline.matching.registration import affine_from_sitk, matrix_to_ras, rigid_register, to_sitk
from tests.match_fixtures import centred_affine, label_scan, rotation, world_coordinates

DATA = importlib.resources.files("nibabel") / "tests" / "data"


@pytest.mark.parametrize("name", ["anatomical.nii", "standard.nii.gz"])
def test_lps_helper_agrees_with_nibabel(name):
    # Reference: nibabel's shipped test data (MIT) read by both libraries; docs/methods.md §4.1,
    # §5.4:
    # A_ras = diag(-1, -1, 1, 1) @ A_lps and SimpleITK arrays are (z, y, x).
    path = DATA / name
    if not path.is_file():
        pytest.skip(f"nibabel test file {name} not shipped in this installation")
    image = nib.load(str(path))
    itk = sitk.ReadImage(str(path))
    np.testing.assert_allclose(affine_from_sitk(itk), image.affine, atol=1e-5)
    data = np.asanyarray(image.dataobj)
    np.testing.assert_array_equal(sitk.GetArrayFromImage(itk).transpose(2, 1, 0), data)
    back = to_sitk(data, image.affine)
    np.testing.assert_allclose(affine_from_sitk(back), image.affine, atol=1e-5)
    np.testing.assert_array_equal(sitk.GetArrayFromImage(back), sitk.GetArrayFromImage(itk))


def test_matrix_to_ras_of_a_known_euler_transform():
    # Reference: ITK Euler3DTransform maps x -> R (x - c) + c + t in LPS; in RAS the same
    # motion is LPS @ M_lps @ LPS (common practice, docs/methods.md §4.1, §5.4).
    transform = sitk.Euler3DTransform((1.0, -2.0, 3.0), 0.1, -0.2, 0.3, (4.0, 5.0, -6.0))
    matrix_lps = np.eye(4)
    rot = np.array(transform.GetMatrix()).reshape(3, 3)
    center = np.array(transform.GetCenter())
    matrix_lps[:3, :3] = rot
    matrix_lps[:3, 3] = np.array(transform.GetTranslation()) + center - rot @ center
    np.testing.assert_allclose(matrix_to_ras(transform), LPS @ matrix_lps @ LPS, atol=1e-12)
    point_ras = np.array([7.0, -8.0, 9.0, 1.0])
    moved_lps = transform.TransformPoint(tuple((LPS @ point_ras)[:3]))
    np.testing.assert_allclose((LPS[:3, :3] @ moved_lps), (matrix_to_ras(transform)
                                                           @ point_ras)[:3], atol=1e-12)


def _head(shape, affine):
    """A synthetic head: skull shell, brain, asymmetric ventricles and two bright lesions."""
    xyz = world_coordinates(shape, affine)
    r = np.sqrt((xyz[..., 0] / 50) ** 2 + (xyz[..., 1] / 60) ** 2 + (xyz[..., 2] / 45) ** 2)
    image = np.where(r < 1.0, 300.0, 0.0)
    image[(r >= 0.85) & (r < 1.0)] = 800.0
    ventricle = ((xyz[..., 0] - 8) / 6) ** 2 + ((xyz[..., 1] + 5) / 18) ** 2 + \
        ((xyz[..., 2] - 5) / 8) ** 2 < 1
    image[ventricle] = 100.0
    lesions = np.zeros(shape, bool)
    for centre, radius in (((-20, 15, 10), 6.0), ((15, -25, -10), 4.0)):
        lesions |= np.sum((xyz - np.array(centre)) ** 2, axis=-1) <= radius ** 2
    image[lesions] = 600.0
    return image.astype(np.float32), lesions


def test_rigid_registration_recovers_a_known_transform():
    shape = (64, 64, 64)
    affine = centred_affine(shape, (2.0, 2.0, 2.0))
    fixed, _ = _head(shape, affine)
    # The known motion: moving-session world -> fixed-session world (RAS).
    truth = np.eye(4)
    truth[:3, :3] = rotation(2, 6.0) @ rotation(0, -4.0)
    truth[:3, 3] = (5.0, -3.0, 2.0)
    # Reference: SimpleITK resampling makes the moving image: moving(p) = fixed(truth @ p),
    # with the motion expressed in LPS for ITK.
    lps = LPS @ truth @ LPS
    motion = sitk.AffineTransform(3)
    motion.SetMatrix(lps[:3, :3].ravel().tolist())
    motion.SetTranslation(lps[:3, 3].tolist())
    fixed_image = to_sitk(fixed, affine)
    moved = sitk.Resample(fixed_image, fixed_image, motion, sitk.sitkLinear, 0.0)
    moving = sitk.GetArrayFromImage(moved).transpose(2, 1, 0)
    result = rigid_register(fixed, affine, moving, affine, iterations=60)
    # Tolerance (stated): rotation error < 1 degree, translation error < 1 mm at the centre
    # and displacement error < 1.5 mm anywhere within 60 mm of it.
    error = np.linalg.inv(truth) @ result.matrix_ras
    angle = np.degrees(np.arccos(np.clip((np.trace(error[:3, :3]) - 1) / 2, -1, 1)))
    assert angle < 1.0
    assert np.linalg.norm(error[:3, 3]) < 1.0
    corners = np.array([[x, y, z, 1.0] for x in (-60, 60) for y in (-60, 60) for z in (-60, 60)])
    drift = (result.matrix_ras @ corners.T - truth @ corners.T)[:3]
    assert np.max(np.linalg.norm(drift, axis=0)) < 1.5
    assert result.quality > result.quality_before and result.quality > 0.95
    assert result.metric_value < 0 and result.iterations >= 1


def test_registered_transform_lets_lesions_match():
    shape = (48, 48, 48)
    affine = centred_affine(shape, (1.0, 1.0, 1.0))
    truth = np.eye(4)
    truth[:3, :3] = rotation(2, 20.0)
    truth[:3, 3] = (6.0, 0.0, 0.0)
    xyz = world_coordinates(shape, affine)
    centres = [np.array([-10.0, 5.0, 0.0]), np.array([10.0, -8.0, 3.0])]
    scans, rows = [], []
    for session, motion in (("1", np.eye(4)), ("2", np.linalg.inv(truth))):
        mask = np.zeros(shape, bool)
        for centre in centres:   # lesions at the same anatomy, seen through the motion
            moved = motion[:3, :3] @ centre + motion[:3, 3]
            mask |= np.sum((xyz - moved) ** 2, axis=-1) <= 5.0 ** 2
        scan, table = label_scan(mask, affine, subject="01", session=session,
                                 day=float(session))
        scans.append(scan)
        rows.append(table)
    lesions = pd.concat(rows, ignore_index=True)
    plain = match_subject(scans, lesions)
    registered = match_subject(scans, lesions, transforms={"2": truth})
    assert registered.warnings == ()
    assert len(registered.matches) == 2 and (registered.matches.overlap > 0.9).all()
    assert registered.matches.centroid_distance_mm.max() < 0.5
    assert plain.matches.overlap.max() < registered.matches.overlap.min()
