"""Property tests of stage-1 geometry (issue 7, item 2) on hypothesis-generated masks and affines.

References: nibabel as the independent writer, reader and reorienter of NIfTI images
(``Nifti1Image.as_reoriented``); the NIfTI-1 standard for what a header stores (float32 sform);
the volume of a parallelepiped, |det A| per voxel (linear algebra handbook formula).
Shapes stay <= 12^3 and example counts modest so the file runs in a few seconds.
"""
from __future__ import annotations

import tempfile
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy import ndimage

from pipeline.voxels import label_dtype
from pipeline.io.nifti import load_mask, save_label_image
from pipeline.volumes.components import component_table

#: columns that do not depend on how the voxel grid is indexed
WORLD = ["voxels", "volume_mm3", "centroid_x_mm", "centroid_y_mm", "centroid_z_mm",
         "max_axial_diameter_mm", "equivalent_diameter_mm", "axial_slices", "touches_border",
         "measurable"]

shapes = st.tuples(*[st.integers(2, 12)] * 3)
angles = st.floats(-np.pi, np.pi, allow_nan=False)
zooms = st.floats(0.3, 4.0, allow_nan=False)


@st.composite
def affines(draw, *, rotate: bool = True) -> np.ndarray:
    """Rotation x zooms (with a possible mirror) + origin: a voxel -> RAS+ mm affine."""
    rotation = np.eye(3)
    if rotate:
        a, b, c = draw(angles), draw(angles), draw(angles)
        rz = np.array([[np.cos(a), -np.sin(a), 0], [np.sin(a), np.cos(a), 0], [0, 0, 1]])
        ry = np.array([[np.cos(b), 0, np.sin(b)], [0, 1, 0], [-np.sin(b), 0, np.cos(b)]])
        rx = np.array([[1, 0, 0], [0, np.cos(c), -np.sin(c)], [0, np.sin(c), np.cos(c)]])
        rotation = rz @ ry @ rx
    mirror = np.diag([draw(st.sampled_from([-1.0, 1.0])), 1.0, 1.0])
    affine = np.eye(4)
    affine[:3, :3] = rotation @ mirror @ np.diag([draw(zooms) for _ in range(3)])
    affine[:3, 3] = [draw(st.floats(-100, 100, allow_nan=False)) for _ in range(3)]
    return affine


@st.composite
def label_masks(draw, shape=None, max_label: int = 3) -> np.ndarray:
    """Sparse random label volumes (values 0..max_label) from a hypothesis-drawn seed."""
    shape = draw(shapes) if shape is None else shape
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    density = draw(st.floats(0.02, 0.4))
    data = np.where(rng.random(shape) < density, rng.integers(1, max_label + 1, shape), 0)
    return data.astype(np.uint8)


def rows(table, columns=WORLD) -> list[tuple]:
    """The table as a sorted multiset of rows (component numbers may differ)."""
    out = table[columns].astype(float).to_numpy()
    return sorted(map(tuple, np.round(out, 6)))


def assert_same_rows(a, b, *, rtol=1e-9, atol=1e-6, columns=WORLD):
    assert len(a) == len(b)
    key = ["voxels", "centroid_x_mm", "centroid_y_mm", "centroid_z_mm"]
    # Rows are paired by a rounded key: float noise of 1e-16 in a centroid (an affine with
    # 2e-16 off-diagonal terms, float32 header precision) must not reorder equal rows.
    a, b = _paired(a, key, columns), _paired(b, key, columns)
    np.testing.assert_allclose(a, b, rtol=rtol, atol=atol)


def _paired(table, key, columns):
    order = np.lexsort([np.round(table[k].to_numpy(float), 4) for k in reversed(key)])
    return table[columns].astype(float).to_numpy()[order]


def measure(data, affine, **options):
    return component_table(data, affine, **options)


def measure_file(path: Path):
    mask = load_mask(path)
    return measure(mask.data, mask.affine)[0]


def axial_tie(affine: np.ndarray) -> bool:
    """True when two voxel axes are equally close to world z (the axial axis is then ambiguous)."""
    columns = affine[:3, :3]
    cosine = np.sort(np.abs(columns[2]) / np.linalg.norm(columns, axis=0))
    return cosine[-1] - cosine[-2] < 1e-6


@settings(max_examples=25)
@given(data=label_masks(), affine=affines(), perm=st.permutations([0, 1, 2]),
       flips=st.tuples(*[st.sampled_from([-1, 1])] * 3))
def test_reoriented_storage_gives_same_volumes_and_world_centroids(data, affine, perm, flips):
    # Reference: nibabel Nifti1Image.as_reoriented (independent reorientation of data and affine)
    # and nibabel as the writer of both files; the lesions are the same in world space, so every
    # world-space measure must agree (to float32 header precision, NIfTI-1 standard).
    assume(data.any() and not axial_tie(affine))
    image = nib.Nifti1Image(data, affine)
    ornt = np.column_stack([perm, flips]).astype(float)
    moved = image.as_reoriented(ornt)
    assert sorted(moved.shape) == sorted(data.shape)
    assert np.count_nonzero(np.asarray(moved.dataobj)) == np.count_nonzero(data)
    with tempfile.TemporaryDirectory() as tmp:
        nib.save(image, Path(tmp) / "a.nii")
        nib.save(moved, Path(tmp) / "b.nii")
        a, b = measure_file(Path(tmp) / "a.nii"), measure_file(Path(tmp) / "b.nii")
    assert_same_rows(a, b, rtol=1e-5, atol=1e-4)


@settings(max_examples=30)
@given(data=label_masks(max_label=4), affine=affines(),
       new=st.lists(st.integers(1, 30000), min_size=4, max_size=4, unique=True),
       pick=st.sets(st.integers(1, 4), min_size=1, max_size=4))
def test_relabelling_changes_nothing(data, affine, new, pick):
    # Reference: docs/outputs.md §5.1, "Selected label values are merged before labelling": the
    # lesion is the
    # set of selected voxels, whatever numbers name them. Relabelling 1..4 -> `new` (injective)
    # and selecting the images of the same values must give identical rows but `label`.
    assume(np.isin(data, list(pick)).any())
    lut = np.zeros(5, np.int32)
    lut[1:] = new
    relabelled = lut[data].astype(label_dtype(max(new)))
    before, components, offset = measure(data, affine, labels=tuple(sorted(pick)))
    after, _, _ = measure(relabelled, affine, labels=tuple(sorted(lut[list(pick)])))
    columns = [c for c in before.columns if c != "label"]
    assert before[columns].equals(after[columns])
    whole, _, _ = measure(data, affine)
    whole_after, _, _ = measure(relabelled, affine)
    assert whole[columns].equals(whole_after[columns])
    # `label` is the component's most frequent selected value: with ties, any of the tied ones
    full = np.zeros(data.shape, np.int32)
    box = tuple(slice(o, o + n) for o, n in zip(offset, components.shape))
    full[box] = components
    for c, old, got in zip(before.component, before.label, after.label):
        values, counts = np.unique(data[full == c], return_counts=True)
        tied = values[counts == counts.max()]
        assert old in tied and got in lut[tied]


@settings(max_examples=25)
@given(data=label_masks(shape=None), affine=affines(), axis=st.integers(0, 2),
       where=st.floats(0.2, 0.8))
def test_split_into_two_files_gives_union_of_rows(data, affine, axis, where):
    # Reference: 26-connectivity (a voxel touches the 26 around it, docs/outputs.md §5.1): two parts
    # more
    # than one voxel apart along `axis` never join, so each file's rows are rows of the whole.
    # nibabel writes the three files.
    assume(data.shape[axis] >= 5)
    cut = int(round(where * (data.shape[axis] - 1)))
    cut = min(max(cut, 1), data.shape[axis] - 2)
    index = np.arange(data.shape[axis]).reshape([-1 if a == axis else 1 for a in range(3)])
    whole = np.where(index == cut, 0, data).astype(np.uint8)
    first = np.where(index < cut, whole, 0).astype(np.uint8)
    second = np.where(index > cut, whole, 0).astype(np.uint8)
    with tempfile.TemporaryDirectory() as tmp:
        tables = []
        for name, part in (("whole", whole), ("first", first), ("second", second)):
            nib.save(nib.Nifti1Image(part, affine), Path(tmp) / f"{name}.nii")
            tables.append(measure_file(Path(tmp) / f"{name}.nii"))
    columns = WORLD + ["label", "bbox_i_min", "bbox_i_max", "bbox_j_min", "bbox_j_max",
                       "bbox_k_min", "bbox_k_max"]
    assert rows(tables[0], columns) == sorted(rows(tables[1], columns) + rows(tables[2], columns))


@settings(max_examples=40)
@given(data=label_masks(max_label=3), affine=affines(),
       pick=st.one_of(st.none(), st.sets(st.integers(1, 3), min_size=1)))
def test_volumes_non_negative_and_sum_to_labelled_voxel_volume(data, affine, pick):
    # Reference: volume of the parallelepiped spanned by the affine's columns = |det A| (linear
    # algebra), so the selected voxels occupy count x |det A| mm^3, mirrored affines included.
    labels = None if pick is None else tuple(sorted(pick))
    selected = data != 0 if labels is None else np.isin(data, labels)
    assume(labels is None or selected.any() or not data.any())
    table, components, offset = measure(data, affine, labels=labels)
    voxel = abs(np.linalg.det(affine[:3, :3]))
    assert (table.volume_mm3 >= 0).all() and (table.voxels > 0).all()
    assert table.voxels.sum() == np.count_nonzero(selected)
    np.testing.assert_allclose(table.volume_mm3.sum(), np.count_nonzero(selected) * voxel,
                               rtol=1e-12)
    assert np.count_nonzero(components) == np.count_nonzero(selected)


MM_PER_UNIT = {1: 1000.0, 2: 1.0, 3: 0.001}   # NIfTI-1 xyzt_units codes: meter, mm, micron


@settings(max_examples=30)
@given(shape=shapes, affine=affines(), top=st.sampled_from([1, 200, 255, 256, 32767, 70000]),
       seed=st.integers(0, 2**32 - 1), unit=st.sampled_from([1, 2, 3]))
def test_track_image_round_trip_is_exact(shape, affine, top, seed, unit):
    # Reference: nibabel is the writer/reader under save_label_image/load_mask; the NIfTI-1
    # standard stores the sform in float32, so an affine already representable in float32 (as
    # every affine read from a header is) must come back bit for bit, in the file's own unit.
    affine = affine.copy()
    affine[:3, :] /= MM_PER_UNIT[unit]
    affine = affine.astype(np.float32).astype(np.float64)
    labels = np.random.default_rng(seed).integers(0, top + 1, shape).astype(np.int64)
    labels.flat[0] = top
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "sub-X_ses-1_tracks.nii.gz"
        save_label_image(path, labels, affine, units_code=unit)
        back = load_mask(path)
        header = nib.load(path).header
        stored = np.asanyarray(nib.load(path).dataobj)
    assert stored.dtype == label_dtype(top)
    assert np.array_equal(back.data, labels)
    assert np.array_equal(back.file_affine, affine)
    assert np.array_equal(back.affine[:3, :], affine[:3, :] * MM_PER_UNIT[unit])
    assert back.units_code == unit
    assert header.get_slope_inter() in ((1.0, 0.0), (None, None))
    assert int(header["intent_code"]) == 1002     # NIFTI_INTENT_LABEL (nifti1.h)
    assert not header["descrip"].tobytes().strip(b"\0")


@pytest.mark.parametrize("shape,where", [((12, 12, 8), [(3, 4, 5), (5, 4, 5)]),
                                         ((12, 12, 8), [(2, 2, 2), (2, 2, 4), (2, 2, 6)]),
                                         ((12, 12, 8), [(2, 2, 3), (4, 2, 3), (2, 4, 3),
                                                        (4, 4, 3)])])
def test_lesions_on_one_voxel_line_are_measured(shape, where):
    # Reference: scipy.ndimage.label with the full 3x3x3 structure (26-connectivity) as the
    # independent labeller; voxels two steps apart are separate lesions. Regression test: these
    # crops (1 x 1 x n, 3 x 3 x 1 with gaps) make cc3d 4.1 raise "maximum length exception".
    data = np.zeros(shape, np.uint8)
    for index in where:
        data[index] = 1
    expected = ndimage.label(data, structure=np.ones((3, 3, 3)))[1]
    table, _, _ = component_table(data, np.eye(4))
    assert len(table) == expected == len(where)
    assert table.voxels.tolist() == [1] * len(where)
