"""World-space overlap between components of scans on different grids."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import SimpleITK as sitk

from pipeline.matching.overlap import (component_on_grid, dice_world, equivalent_radius,
                                       pair_evidence, scan_geometry)
from pipeline.matching.registration import to_sitk
from pipeline.settings import MatchSettings
from pipeline.volumes.components import LabelledScan
from tests.match_fixtures import (ANISO, FLIPPED, ISO, OBLIQUE, Sphere, centred_affine,
                                  label_scan, render, stored)


def _geometry(spheres, grid, session="1"):
    union = np.zeros(grid.shape, bool)
    for mask in render(spheres, grid).values():
        union |= mask
    mask, affine = stored(union, grid)
    scan, rows = label_scan(mask, affine, subject="01", session=session, day=0.0)
    return scan_geometry(scan, rows), mask, affine


def _lens(r1: float, r2: float, d: float) -> float:
    """Volume of the intersection of two balls (radii r1, r2, centre distance d)."""
    # Reference: standard sphere-sphere intersection volume (e.g. Weisstein, MathWorld,
    # "Sphere-Sphere Intersection"); for r1 = r2 = r it reduces to pi (4r + d)(2r - d)^2 / 12
    # as in docs/methods.md, check value C22.
    if d >= r1 + r2:
        return 0.0
    if d <= abs(r1 - r2):
        return 4 / 3 * np.pi * min(r1, r2) ** 3
    return (np.pi * (r1 + r2 - d) ** 2
            * (d * d + 2 * d * r2 - 3 * r2 * r2 + 2 * d * r1 + 6 * r2 * r1 - 3 * r1 * r1)
            / (12 * d))


@pytest.mark.parametrize("grid", [ISO, FLIPPED], ids=["plain", "flipped-permuted"])
def test_cubes_shifted_half_give_dice_one_half(grid):
    # Reference: docs/methods.md, check value C22, cubes 10^3 shifted by 5 voxels: Dice 0.5 exactly.
    first = np.zeros(grid.shape, bool)
    first[20:30, 20:30, 20:30] = True
    second = np.zeros(grid.shape, bool)
    second[25:35, 20:30, 20:30] = True
    scans = []
    for session, mask in (("1", first), ("2", second)):
        data, affine = stored(mask, grid)
        scan, rows = label_scan(data, affine, subject="01", session=session, day=0.0)
        scans.append(scan_geometry(scan, rows))
    assert dice_world(scans[0], 1, scans[1], 1) == 0.5
    assert dice_world(scans[1], 1, scans[0], 1) == 0.5


def test_equal_spheres_at_distance_r_same_grid():
    r = 10.0
    a, mask_a, _ = _geometry([Sphere("A", (-5.3, 0.2, 0.1), r)], ISO)
    b, mask_b, _ = _geometry([Sphere("B", (4.7, 0.2, 0.1), r)], ISO, "2")
    dice = dice_world(a, 1, b, 1)
    # Reference: direct voxel counting with numpy on the shared grid (independent of the
    # world mapping) must agree exactly.
    assert dice == 2 * np.sum(mask_a & mask_b) / (mask_a.sum() + mask_b.sum())
    # Reference: docs/methods.md, check value C22, Dice = 5/16 at d = r. Tolerance: docs/methods.md,
    # check value C23, bounds voxelised
    # sphere volumes within 3% for r >= 10 voxels; Dice is a ratio of voxelised volumes, so
    # we allow twice that relative error (0.02 absolute on 0.3125).
    assert dice == pytest.approx(5 / 16, abs=0.02)


@pytest.mark.parametrize("grid_a, grid_b", [(ISO, ANISO), (ISO, OBLIQUE), (FLIPPED, OBLIQUE),
                                            (ANISO, FLIPPED)],
                         ids=["iso-aniso", "iso-oblique", "flipped-oblique", "aniso-flipped"])
def test_equal_spheres_across_grids(grid_a, grid_b):
    r, d = 10.0, 10.0
    a, mask_a, affine_a = _geometry([Sphere("A", (-5.3, 0.2, 0.1), r)], grid_a)
    b, mask_b, affine_b = _geometry([Sphere("B", (4.7, 0.2, 0.1), r)], grid_b, "2")
    dice = dice_world(a, 1, b, 1)
    # Reference: SimpleITK nearest-neighbour resampling of the coarser mask onto the finer grid
    # (geometry through the RAS<->LPS helper), then Dice by numpy counting.
    fine, coarse = (mask_a, affine_a), (mask_b, affine_b)
    if abs(np.linalg.det(affine_b[:3, :3])) < abs(np.linalg.det(affine_a[:3, :3])):
        fine, coarse = coarse, fine
    reference = to_sitk(fine[0].astype(np.uint8), fine[1])
    moved = sitk.Resample(to_sitk(coarse[0].astype(np.uint8), coarse[1]), reference,
                          sitk.Transform(), sitk.sitkNearestNeighbor, 0)
    resampled = sitk.GetArrayFromImage(moved).transpose(2, 1, 0) > 0
    expected = 2 * np.sum(resampled & fine[0]) / (resampled.sum() + fine[0].sum())
    assert dice == pytest.approx(expected, abs=1e-3)
    # Reference: docs/methods.md, check value C22, analytic Dice with a derived tolerance.
    # Nearest-voxel resampling moves the
    # boundary by at most the half-diagonal h of the coarse voxel, so the resampled ball lies
    # between balls of radius r - h and r + h; bounds follow from the lens formula.
    zooms = np.linalg.norm(coarse[1][:3, :3], axis=0)
    h = 0.5 * float(np.linalg.norm(zooms))
    ball = lambda radius: 4 / 3 * np.pi * radius**3  # noqa: E731
    low = 2 * _lens(r, r - h, d) / (ball(r) + ball(r + h))
    high = 2 * _lens(r, r + h, d) / (ball(r) + ball(r - h))
    assert low < 5 / 16 < high
    assert low <= dice <= high


def test_component_on_grid_touches_only_the_bounding_box():
    a, _, _ = _geometry([Sphere("A", (0.0, 0.0, 0.0), 4.0)], ANISO)
    b, _, _ = _geometry([Sphere("B", (0.0, 0.0, 0.0), 4.0)], ISO, "2")
    voxels = component_on_grid(a, 1, b)
    # Every returned voxel of the 1 mm grid lies within the coarse component's world box.
    world = voxels @ b.vox2ref[:3, :3].T + b.vox2ref[:3, 3]
    lo, hi = a.ref_boxes[1]
    assert np.all(world >= lo - 1e-6) and np.all(world <= hi + 1e-6)
    # Reference: the ball's volume 4/3 pi r^3 = 268 mm^3; within the half-voxel sandwich.
    assert 4 / 3 * np.pi * 2.4**3 < len(voxels) < 4 / 3 * np.pi * 5.7**3


def test_pair_evidence_parts():
    a, _, _ = _geometry([Sphere("A", (0.0, 0.0, 0.0), 6.0)], ISO)
    b, _, _ = _geometry([Sphere("B", (3.0, 4.0, 0.0), 6.0)], ISO, "2")
    settings = MatchSettings()
    evidence = pair_evidence(a, 1, b, 1, settings=settings)
    # Reference: analytic: centroids 5 mm apart (3-4-5 triangle; voxelised spheres centred on
    # voxel centres keep their centre exactly by symmetry).
    assert evidence.centroid_distance_mm == pytest.approx(5.0, abs=1e-9)
    radius = max(equivalent_radius(a.volumes[1]), equivalent_radius(b.volumes[1]))
    assert evidence.distance_ratio == pytest.approx(5.0 / radius)
    assert evidence.centroid_inside and evidence.candidate
    expected = (0.5 * evidence.overlap + 0.25
                + 0.25 * max(0.0, 1 - evidence.distance_ratio / 1.5))
    assert evidence.score == pytest.approx(expected)


def test_far_pair_is_not_a_candidate():
    a, _, _ = _geometry([Sphere("A", (-20.0, 0.0, 0.0), 3.0)], ISO)
    b, _, _ = _geometry([Sphere("B", (20.0, 0.0, 0.0), 3.0)], ISO, "2")
    evidence = pair_evidence(a, 1, b, 1)
    assert evidence.overlap == 0.0 and not evidence.centroid_inside
    assert not evidence.candidate and evidence.score == 0.0


def test_scan_geometry_refuses_listed_component_missing_from_image():
    scan = LabelledScan("01", "1", 0.0, np.ones((1, 1, 1), np.int32), (0, 0, 0), (2, 2, 2),
                        centred_affine((2, 2, 2), (1, 1, 1)))
    rows = pd.DataFrame({"component": [2], "volume_mm3": [1.0], "centroid_x_mm": [0.0],
                         "centroid_y_mm": [0.0], "centroid_z_mm": [0.0]})
    with pytest.raises(ValueError, match="component 2 is listed but absent"):
        scan_geometry(scan, rows)
