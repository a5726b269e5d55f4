"""Stage 1 against outside references: SimpleITK, analytic volumes, the NIfTI-1 standard,
nibabel's shipped test data and the RANO-BM measurability rule."""
from __future__ import annotations

import importlib.resources

import nibabel as nib
import numpy as np
import pytest
import SimpleITK as sitk
from nifti_helpers import oblique_affine, random_blobs, save_mask
from scipy import ndimage
from skimage.draw import ellipsoid

from pipeline.io.nifti import load_mask
from pipeline.geometry import LPS_TO_RAS, itk_affine_ras
from pipeline.settings import VolumeSettings
from pipeline.volumes.components import component_table
from pipeline.volumes.diameters import max_axial_diameter, max_axial_diameter_edge


def sitk_reference(path, connectivity_full=True):
    """Reference: SimpleITK ConnectedComponent + LabelShapeStatisticsImageFilter, LPS -> RAS."""
    image = sitk.ReadImage(str(path))
    labels = sitk.ConnectedComponent(image != 0, connectivity_full)
    stats = sitk.LabelShapeStatisticsImageFilter()
    stats.Execute(labels)
    rows = []
    for label in stats.GetLabels():
        lps = np.array(stats.GetCentroid(label) + (1.0,))
        rows.append((stats.GetNumberOfPixels(label), stats.GetPhysicalSize(label),
                     (LPS_TO_RAS @ lps)[:3]))
    return sorted(rows, key=lambda r: (-r[0], tuple(np.round(r[2], 3))))


def ours(path, **kw):
    mask = load_mask(path)
    table, _, _ = component_table(mask.data, mask.affine, **kw)
    return table


def assert_matches_sitk(path):
    table = ours(path)
    ref = sitk_reference(path)
    assert len(table) == len(ref)
    got = sorted(zip(table.voxels, table.volume_mm3,
                     table[["centroid_x_mm", "centroid_y_mm", "centroid_z_mm"]].to_numpy()),
                 key=lambda r: (-r[0], tuple(np.round(r[2], 3))))
    for (n, vol, c), (rn, rvol, rc) in zip(got, ref):
        assert n == rn
        assert vol == pytest.approx(rvol, rel=1e-6)      # issue target: within 0.5 %
        np.testing.assert_allclose(c, rc, atol=1e-4)      # issue target: within 0.5 mm


@pytest.mark.parametrize("affine", [np.diag([1.0, 1.0, 1.0, 1.0]), np.diag([0.9, 0.9, 3.0, 1.0]),
                                    oblique_affine()], ids=["iso", "aniso", "oblique"])
def test_counts_volumes_centroids_match_simpleitk(tmp_path, affine):
    # Reference: SimpleITK ConnectedComponent(fullyConnected=True) + LabelShapeStatistics.
    path = save_mask(tmp_path / "m.nii.gz", random_blobs(), affine)
    assert_matches_sitk(path)


@pytest.mark.parametrize("codes", [(("L", "A", "S")), ("P", "S", "R"), ("I", "L", "A")])
def test_flipped_and_permuted_storage_gives_same_lesions(tmp_path, codes):
    # Reference: nibabel as_reoriented (same image, other storage order) and SimpleITK.
    base = nib.Nifti1Image(random_blobs(seed=3), oblique_affine())
    ornt = nib.orientations.ornt_transform(nib.io_orientation(base.affine),
                                           nib.orientations.axcodes2ornt(codes))
    moved = base.as_reoriented(ornt)
    p1 = save_mask(tmp_path / "a.nii.gz", np.asanyarray(base.dataobj), base.affine)
    p2 = save_mask(tmp_path / "b.nii.gz", np.asanyarray(moved.dataobj), moved.affine)
    a, b = ours(p1), ours(p2)
    cols = ["voxels", "volume_mm3", "centroid_x_mm", "centroid_y_mm", "centroid_z_mm"]
    key = ["voxels", "centroid_x_mm"]
    np.testing.assert_allclose(a.sort_values(key)[cols].to_numpy(),
                               b.sort_values(key)[cols].to_numpy(), atol=1e-6)
    assert_matches_sitk(p2)


@pytest.mark.parametrize("abc", [(6, 6, 6), (12, 8, 5), (20, 15, 10)])
def test_voxelised_ellipsoid_volume_is_analytic(abc):
    # Reference: skimage.draw.ellipsoid and the analytic volume 4/3*pi*a*b*c.
    # Tolerance: docs/methods.md, check value C23 gives worst-case voxelisation error 8 % for radius
    # >= 5 voxels,
    # 3 % for >= 10 voxels; we use the bound for the smallest semi-axis.
    a, b, c = abc
    zooms = (0.5, 0.7, 1.0)
    solid = ellipsoid(a, b, c, spacing=zooms)
    table, _, _ = component_table(solid.astype(np.uint8), np.diag(zooms + (1.0,)))
    expected = 4 / 3 * np.pi * a * b * c
    smallest_radius_voxels = min(a / zooms[0], b / zooms[1], c / zooms[2])
    tolerance = 0.08 if smallest_radius_voxels < 10 else 0.03
    assert len(table) == 1
    assert table.volume_mm3[0] == pytest.approx(expected, rel=tolerance)
    # equivalent diameter is the sphere of equal volume (definition)
    assert table.equivalent_diameter_mm[0] == pytest.approx(
        (6 * table.volume_mm3[0] / np.pi) ** (1 / 3))


@pytest.mark.parametrize("unit,zoom,expected", [("meter", 0.0005, 0.25e0 * 1.0),
                                                 ("micron", 500.0, 0.25), ("mm", 0.5, 0.25)])
def test_spatial_units_convert_to_mm(tmp_path, unit, zoom, expected):
    # Reference: NIfTI-1 standard xyzt_units codes (docs/methods.md, check value C20): pixdim
    # (0.0005, 0.0005, 0.001) m or (500, 500, 1000) micron -> 0.25 mm^3 per voxel.
    affine = np.diag([zoom, zoom, 2 * zoom, 1.0])
    data = np.zeros((4, 4, 4), np.uint8)
    data[1:3, 1:3, 1] = 1
    path = save_mask(tmp_path / "u.nii", data, affine, units=unit)
    mask = load_mask(path)
    assert mask.voxel_volume_mm3 == pytest.approx(expected)
    table, _, _ = component_table(mask.data, mask.affine)
    assert table.volume_mm3[0] == pytest.approx(4 * expected)
    raw = nib.load(str(path)).header["xyzt_units"] & 7
    assert int(raw) == {"meter": 1, "mm": 2, "micron": 3}[unit]


def test_sform_wins_over_qform_and_disagreement_warns(tmp_path):
    # Reference: NIfTI-1 standard (method 3, sform, when sform_code > 0) and nibabel's
    # get_best_affine; a 5 mm shift between the two is reported.
    data = np.zeros((5, 5, 5), np.uint8)
    data[2, 2, 2] = 1
    image = nib.Nifti1Image(data, np.eye(4))
    shifted = np.eye(4)
    shifted[0, 3] = 5.0
    image.set_sform(shifted, code=1)
    image.set_qform(np.eye(4), code=1)
    image.header.set_xyzt_units("mm")
    nib.save(image, str(tmp_path / "sq.nii"))
    mask = load_mask(tmp_path / "sq.nii")
    assert mask.affine[0, 3] == 5.0
    assert any("disagree by 5 mm" in w for w in mask.warnings)
    # qform only (sform_code 0): method 2, the qform is used
    image.set_sform(shifted, code=0)
    nib.save(image, str(tmp_path / "q.nii"))
    assert load_mask(tmp_path / "q.nii").affine[0, 3] == 0.0


def test_unknown_orientation_is_refused_unless_accepted(tmp_path):
    # Reference: NIfTI-1 standard method 1 (both codes 0) carries no orientation.
    path = save_mask(tmp_path / "o.nii", np.ones((2, 2, 2), np.uint8), np.eye(4),
                     qform=False, sform=False)
    with pytest.raises(ValueError, match="orientation unknown"):
        load_mask(path)
    assert load_mask(path, settings=VolumeSettings(accept_unknown_orientation=True)).warnings


def nibabel_data(name):
    folder = importlib.resources.files("nibabel") / "tests" / "data"
    path = folder / name
    if not path.is_file():
        pytest.skip(f"nibabel test data {name} is not shipped in this installation")
    return path


@pytest.mark.parametrize("connectivity,rank", [(6, 1), (26, 3)])
def test_nibabel_standard_mask(connectivity, rank):
    # Reference: nibabel's shipped test file standard.nii.gz (MIT licence), counted with
    # scipy.ndimage.label and the matching structure; volume = voxels x prod(zooms).
    path = nibabel_data("standard.nii.gz")
    image = nib.load(str(path))
    data = np.asanyarray(image.dataobj)
    _, expected = ndimage.label(data != 0, ndimage.generate_binary_structure(3, rank))
    table = ours(path, settings=VolumeSettings(connectivity=connectivity))
    assert len(table) == expected
    assert table.volume_mm3.sum() == pytest.approx((data != 0).sum() *
                                                   np.prod(image.header.get_zooms()))


def test_nibabel_anatomical_is_read_in_stored_integer_type_and_matches_simpleitk():
    # Reference: nibabel's shipped anatomical.nii (big-endian int16, LAS) read by SimpleITK.
    path = nibabel_data("anatomical.nii")
    mask = load_mask(path)
    assert mask.data.dtype.kind == "i"
    image = sitk.ReadImage(str(path))
    np.testing.assert_allclose(itk_affine_ras(image), mask.affine, atol=1e-4)
    np.testing.assert_array_equal(sitk.GetArrayFromImage(image).transpose(2, 1, 0), mask.data)


def test_nibabel_functional_scaled_4d_is_refused():
    # Reference: nibabel's shipped functional.nii is a 4-D, scaled image: not a mask.
    with pytest.raises(ValueError, match="volumes"):
        load_mask(nibabel_data("functional.nii"))


def test_nifti2_is_read(tmp_path):
    # Reference: nibabel's shipped example_nifti2.nii.gz (NIfTI-2, shape (32, 20, 12, 2)): its
    # 64-bit dims are parsed (refused as 2 volumes); a NIfTI-2 mask gives the NIfTI-1 result.
    with pytest.raises(ValueError, match="2 volumes"):
        load_mask(nibabel_data("example_nifti2.nii.gz"))
    data, affine = random_blobs(seed=2), oblique_affine()
    one = save_mask(tmp_path / "one.nii.gz", data, affine)
    two = nib.Nifti2Image(data, affine)
    two.set_qform(affine, code=1)
    two.header.set_xyzt_units("mm")
    nib.save(two, str(tmp_path / "two.nii.gz"))
    assert nib.load(str(tmp_path / "two.nii.gz")).header.sizeof_hdr == 540
    a, b = ours(one), ours(tmp_path / "two.nii.gz")
    np.testing.assert_allclose(a.drop(columns=[]).to_numpy(float), b.to_numpy(float))


@pytest.mark.parametrize("length_voxels,slices,measurable", [
    (10, 2, True),    # 10 voxels of 1 mm: 10 mm edge to edge (9 mm centre to centre), 2 slices
    (9, 2, False),    # 9 mm edge to edge: below the 10 mm threshold
    (11, 1, False),   # one slice only
])
def test_rano_bm_measurability(length_voxels, slices, measurable):
    # Reference: RANO-BM (Lin NU et al. Lancet Oncol 2015;16:e270-e278): measurable lesion =
    # longest diameter >= 10 mm and visible on >= 2 axial slices. The diameter is read edge to
    # edge, as on screen: centre distance plus one voxel along the line (common practice).
    data = np.zeros((20, 20, 6), np.uint8)
    data[2:2 + length_voxels, 5, 1:1 + slices] = 1
    table, _, _ = component_table(data, np.eye(4))
    assert table.measurable[0] == measurable
    assert table.max_axial_diameter_mm[0] == pytest.approx(length_voxels - 1)
    assert table.max_axial_diameter_edge_mm[0] == pytest.approx(length_voxels)
    assert table.axial_slices[0] == slices


@pytest.mark.parametrize("spacing", [(1.0, 1.0, 1.0), (0.5, 0.8, 3.0)])
def test_edge_to_edge_diameter_by_hand_and_between_bounds(spacing):
    # Reference, by hand (common practice): a row of n voxels of width s along x reads n * s
    # edge to edge; a diagonal of n voxels (sx, sy) reads (n - 1) |(sx, sy)| + (sx^2 + sy^2) /
    # |(sx, sy)|. Bounds: the centre-to-centre diameter below, the diameter of the union of the
    # voxels' in-slice faces (largest distance between face corners, scipy pdist) above.
    from scipy.spatial.distance import pdist

    sx, sy, _sz = spacing
    affine = np.diag([*spacing, 1.0])
    row = np.array([[i, 3, 0] for i in range(7)])
    assert max_axial_diameter_edge(row, affine, 2) == pytest.approx(7 * sx)
    diagonal = np.array([[i, i, 0] for i in range(5)])
    step = np.hypot(sx, sy)
    assert max_axial_diameter_edge(diagonal, affine, 2) == pytest.approx(
        4 * step + (sx * sx + sy * sy) / step)
    blob = np.argwhere(random_blobs(count=1, seed=3))
    blob = blob[blob[:, 2] == np.bincount(blob[:, 2]).argmax()]          # its fullest slice
    corners = np.concatenate([(blob[:, :2] + offset) * (sx, sy)
                              for offset in ((-.5, -.5), (-.5, .5), (.5, -.5), (.5, .5))])
    centre, _ = max_axial_diameter(blob, affine, 2)
    edge = max_axial_diameter_edge(blob, affine, 2)
    assert centre < edge <= pdist(corners).max() + 1e-9


def test_max_axial_diameter_matches_brute_force_on_oblique_grid():
    # Reference: brute-force largest pairwise distance (scipy.spatial.distance.pdist) per slice.
    from scipy.spatial.distance import pdist

    data = random_blobs(count=1, seed=5)
    affine = oblique_affine()
    vox = np.argwhere(data)
    got, _ = max_axial_diameter(vox, affine, axis=2)
    best = 0.0
    for k in np.unique(vox[:, 2]):
        pts = vox[vox[:, 2] == k]
        if len(pts) > 1:
            best = max(best, pdist(pts @ affine[:3, :3].T).max())
    assert got == pytest.approx(best)


@pytest.mark.parametrize("offset,expected", [((1, 1, 1), {6: 2, 18: 2, 26: 1}),
                                             ((1, 1, 0), {6: 2, 18: 1, 26: 1})])
def test_connectivity(offset, expected):
    # Reference: docs/methods.md, check value C25 (corner- and edge-touching voxel pairs),
    # scipy.ndimage.label.
    data = np.zeros((4, 4, 4), np.uint8)
    data[1, 1, 1] = 1
    data[1 + offset[0], 1 + offset[1], 1 + offset[2]] = 1
    for conn, count in expected.items():
        table, _, _ = component_table(data, np.eye(4), settings=VolumeSettings(connectivity=conn))
        assert len(table) == count


def test_labels_are_merged_before_labelling_and_label_is_the_mode():
    # Common practice: an enhancing rim (1) and a necrotic core (3) are one lesion.
    data = np.zeros((9, 9, 9), np.uint8)
    data[2:7, 2:7, 2:7] = 1
    data[3:6, 3:6, 3:6] = 3
    table, _, _ = component_table(data, np.eye(4), labels=(1, 3))
    assert len(table) == 1 and table.label[0] == 1 and table.voxels[0] == 125
    only_core, _, _ = component_table(data, np.eye(4), labels=(3,))
    assert only_core.voxels[0] == 27


def test_min_volume_drops_and_renumbers():
    data = np.zeros((10, 10, 10), np.uint8)
    data[1, 1, 1] = 1
    data[5:8, 5:8, 5:8] = 1
    table, comps, _ = component_table(data, np.diag([2.0, 2.0, 2.0, 1.0]),
                                      settings=VolumeSettings(min_volume_mm3=10))
    assert table.component.tolist() == [1] and table.voxels.tolist() == [27]
    assert set(np.unique(comps)) == {0, 1}


def test_empty_mask_has_no_rows():
    table, comps, offset = component_table(np.zeros((3, 3, 3), np.uint8), np.eye(4))
    assert len(table) == 0 and comps.shape == (0, 0, 0)


def test_components_numbered_largest_first_and_border_flag():
    data = np.zeros((10, 10, 10), np.uint8)
    data[0:2, 0:2, 0:2] = 1          # 8 voxels touching the border
    data[4:7, 4:7, 4:7] = 1          # 27 voxels inside
    table, comps, offset = component_table(data, np.eye(4))
    assert table.voxels.tolist() == [27, 8]
    assert table.touches_border.tolist() == [False, True]
    full = np.zeros_like(data, dtype=np.int32)
    full[offset[0]:offset[0] + comps.shape[0], offset[1]:offset[1] + comps.shape[1],
         offset[2]:offset[2] + comps.shape[2]] = comps
    assert (full[4:7, 4:7, 4:7] == 1).all() and (full[0:2, 0:2, 0:2] == 2).all()


def brute_force_axial_diameter(voxels, affine, axis):
    """Largest pairwise in-slice distance (mm) by scipy.spatial.distance.pdist over all pairs."""
    from scipy.spatial.distance import pdist

    best = 0.0
    for k in np.unique(voxels[:, axis]):
        pts = voxels[voxels[:, axis] == k]
        if len(pts) > 1:
            best = max(best, pdist(pts @ affine[:3, :3].T).max())
    return best


def test_table_diameters_and_labels_match_per_component_brute_force():
    # Reference: brute-force largest pairwise in-slice distance (scipy pdist) and the most
    # frequent label (numpy unique) for every component, on an oblique grid.
    data = random_blobs(seed=11, count=8)
    affine = oblique_affine()
    table, comps, offset = component_table(data, affine)
    axis = 2
    for row in table.itertuples():
        local = np.argwhere(comps == row.component) + np.asarray(offset)
        best = brute_force_axial_diameter(local, affine, axis)
        assert row.max_axial_diameter_mm == pytest.approx(best, abs=1e-9)
        values, counts = np.unique(data[tuple(local.T)], return_counts=True)
        assert row.label == values[np.argmax(counts)]
        assert row.axial_slices == len(np.unique(local[:, axis]))


@pytest.mark.parametrize("connectivity", [6, 18, 26])
@pytest.mark.parametrize("seed", range(4))
def test_scattered_voxels_labelled_as_a_graph_agree_with_scipy(connectivity, seed):
    # Reference: scipy.ndimage.label with generate_binary_structure(3, 1/2/3) on the dense
    # image (an independent implementation). Specks scattered so that no empty plane splits
    # them take the graph path (their box is mostly empty).
    from pipeline.volumes import components as volumes

    rng = np.random.default_rng(seed)
    data = (rng.random((60, 50, 40)) < 0.02).astype(np.uint8)
    data[10:14, 10:14, 10:14] = 1                                   # one solid block too
    found = volumes.lesion_voxels(data, connectivity)
    parts = volumes._parts(np.argwhere(data))
    assert any(np.prod(shape) > volumes.DENSE_BOX_RATIO * len(index) for index, _, shape in parts)
    expected, count = ndimage.label(data, volumes.structure(connectivity))
    assert found.count == count
    ours = np.zeros(data.shape, np.int64)
    ours[tuple(found.voxels.T)] = found.ids
    # Same partition: each of our components is exactly one of scipy's, and vice versa.
    pairs = np.unique(np.stack([ours[data > 0], expected[data > 0]]), axis=1)
    assert pairs.shape[1] == count


@pytest.mark.parametrize("seed", range(6))
def test_diameters_on_sheared_grids_match_brute_force(seed):
    # Reference: brute-force largest pairwise in-slice distance (scipy pdist) per component and
    # slice, on grids whose voxel axes are not perpendicular (sheared affines) and on several
    # blob sets: the slices skipped by the bound must never hold the maximum.
    rng = np.random.default_rng(seed)
    data = random_blobs(seed=100 + seed, count=6)
    affine = np.eye(4)
    affine[:3, :3] = np.diag(rng.uniform(0.5, 2.0, 3)) + rng.uniform(-0.6, 0.6, (3, 3)) * \
        (1 - np.eye(3))
    table, comps, offset = component_table(data, affine)
    axis = int(np.argmax(np.abs(affine[2, :3]) / np.linalg.norm(affine[:3, :3], axis=0)))
    assert len(table) >= 1
    for row in table.itertuples():
        local = np.argwhere(comps == row.component) + np.asarray(offset)
        best = brute_force_axial_diameter(local, affine, axis)
        assert row.max_axial_diameter_mm == pytest.approx(best, rel=1e-9, abs=1e-9)


@pytest.mark.parametrize("seed", range(5))
def test_octagon_bound_is_never_below_the_true_largest_distance(seed):
    # Reference: scipy.spatial.distance.pdist (brute force) on random in-slice point sets.
    from scipy.spatial.distance import pdist

    from pipeline.volumes.diameters import _octagon_bounds

    rng = np.random.default_rng(seed)
    columns = rng.uniform(-2, 2, (3, 2))
    sets = [rng.integers(0, rng.integers(1, 30), (rng.integers(1, 40), 2)) for _ in range(50)]
    points = np.concatenate(sets)
    starts = np.cumsum([0] + [len(s) for s in sets[:-1]])
    bounds = _octagon_bounds(points[:, 0], points[:, 1], starts, columns)
    for bound, group in zip(bounds, sets):
        true = pdist(group @ columns.T).max() if len(group) > 1 else 0.0
        assert bound >= true - 1e-9


def test_label_value_the_mask_type_cannot_hold_is_an_input_error():
    # Common practice: labels (300,) on a uint8 mask can match nothing; the message names the
    # values the mask holds, as for any absent label (not an internal error).
    from pipeline.errors import InputError

    data = np.zeros((4, 4, 4), np.uint8)
    data[1, 1, 1] = 2
    with pytest.raises(InputError, match=r"label values \(300, -1\) asked for, but the mask "
                                         r"holds only \[2\]"):
        component_table(data, np.eye(4), labels=(300, -1))
    table, _, _ = component_table(data, np.eye(4), labels=(2, 300))
    assert table.voxels.tolist() == [1]
