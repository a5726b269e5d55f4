"""World-space evidence that two lesion components of different scans are one lesion.

Scans of one subject may sit on different voxel grids (1 mm isotropic at baseline, 0.9 x 0.9 x 3 mm
later), with oblique, flipped or permuted storage. Nothing is resampled as a whole: the voxel
centres of one component are mapped through the affines into the other scan's grid (nearest
voxel), so only the voxels of the component and of its bounding box on the other grid are touched.

Evidence for one pair of components ``a`` (earlier) and ``b`` (later):

``overlap``
    Dice coefficient ``2 |A ∩ B| / (|A| + |B|)`` on the finer of the two grids (smaller voxel
    volume; the earlier scan's grid on a tie). The component on the finer grid is taken as is;
    the other one is represented by the fine voxels whose centres fall, by nearest voxel, into
    one of its voxels (nearest-neighbour resampling restricted to its bounding box).
``centroid_inside``
    True when the centroid of either component falls inside (nearest voxel) the other one.
``centroid_distance_mm`` and ``distance_ratio``
    The distance between the centroids and that distance divided by the larger equivalent
    radius ``(3 V / 4 pi)^(1/3)`` of the two (at least ``min_radius_mm``).

The link score combines them (weights and gates from ``MatchSettings``)::

    score = (weight_overlap * overlap
             + weight_inside * centroid_inside
             + weight_distance * max(0, 1 - distance_ratio / max_distance_ratio))
            / (weight_overlap + weight_inside + weight_distance)

so that it lies in [0, 1] (1 for a component compared with itself).

A pair is a candidate link only if it passes the gate: ``overlap > 0`` or ``centroid_inside``,
or (``distance_ratio <= max_distance_ratio`` and ``centroid_distance_mm <= max_distance_mm``).
Centroids, volumes and the optional session transforms (world -> first session's world) are
all in RAS+ millimetres.
"""
from __future__ import annotations

import functools
import itertools
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import ndimage

from pipeline.settings import MatchSettings
from pipeline.volumes.components import LabelledScan
from pipeline.geometry import voxel_volume_mm3

_CORNERS = np.array(list(itertools.product((0, 1), repeat=3)), dtype=float)


@dataclass(frozen=True, eq=False)
class ScanGeometry:
    """One scan's components with what matching needs, in the subject's reference world.

    ``vox2ref`` maps full-grid voxel indices to the reference world (the first session's world
    after the optional transform); ``boxes`` hold each component's crop-box index range
    (inclusive); ``ref_boxes`` its world bounding box (voxel corners); ``centroids`` are in the
    reference world (mm), ``radii`` are equivalent radii (mm), ``volumes`` in mm3.
    """

    scan: LabelledScan
    vox2ref: np.ndarray
    voxels: dict[int, int]
    boxes: dict[int, tuple[np.ndarray, np.ndarray]]
    ref_boxes: dict[int, tuple[np.ndarray, np.ndarray]]
    centroids: dict[int, np.ndarray]
    radii: dict[int, float]
    volumes: dict[int, float]

    @functools.cached_property
    def voxel_volume_mm3(self) -> float:
        """Volume of one voxel (mm3)."""
        return voxel_volume_mm3(self.scan.affine)

    @functools.cached_property
    def ref2vox(self) -> np.ndarray:
        """Inverse of ``vox2ref`` (computed once per scan, not once per pair)."""
        return np.linalg.inv(self.vox2ref)


@dataclass(frozen=True)
class Evidence:
    """The evidence for one candidate link (see the module docstring)."""

    overlap: float
    centroid_distance_mm: float
    centroid_inside: bool
    distance_ratio: float
    score: float
    candidate: bool

    @property
    def touching(self) -> bool:
        """The components share voxels or one centroid lies inside the other."""
        return self.overlap > 0 or self.centroid_inside


def equivalent_radius(volume_mm3: float) -> float:
    """Radius (mm) of the sphere with the given volume.

    Examples
    --------
    >>> round(equivalent_radius(4 / 3 * np.pi * 8.0), 6)
    2.0
    """
    return float((3.0 * volume_mm3 / (4.0 * np.pi)) ** (1.0 / 3.0))


def scan_geometry(scan: LabelledScan, rows: pd.DataFrame, *,
                  to_reference: np.ndarray | None = None) -> ScanGeometry:
    """Collect the per-component geometry of ``scan`` (its ``lesions.tsv`` rows in ``rows``).

    Parameters
    ----------
    scan : LabelledScan
    rows : pandas.DataFrame
        The scan's lesion rows: ``component``, ``volume_mm3``, ``centroid_x_mm``,
        ``centroid_y_mm``, ``centroid_z_mm`` (RAS+ mm of the scan's own world).
    to_reference : (4, 4) ndarray, optional
        Maps the scan's world to the reference world; identity when omitted.

    Examples
    --------
    >>> comp = np.ones((2, 2, 2), np.int32)
    >>> scan = LabelledScan("01", "1", 0.0, comp, (1, 1, 1), (4, 4, 4), np.eye(4))
    >>> rows = pd.DataFrame({"component": [1], "volume_mm3": [8.0], "centroid_x_mm": [1.5],
    ...                      "centroid_y_mm": [1.5], "centroid_z_mm": [1.5]})
    >>> g = scan_geometry(scan, rows)
    >>> g.voxels, g.ref_boxes[1][0].tolist()
    ({1: 8}, [0.5, 0.5, 0.5])
    """
    to_ref = np.eye(4) if to_reference is None else np.asarray(to_reference, dtype=float)
    vox2ref = to_ref @ np.asarray(scan.affine, dtype=float)
    comps = scan.components
    counts = np.bincount(comps.ravel(), minlength=1) if comps.size else np.zeros(1, int)
    slices = ndimage.find_objects(comps) if comps.size else []
    offset = np.asarray(scan.offset)
    voxels, boxes, ref_boxes, centroids, radii, volumes = {}, {}, {}, {}, {}, {}
    columns = [rows[name].to_numpy() for name in ("component", "volume_mm3", "centroid_x_mm",
                                                   "centroid_y_mm", "centroid_z_mm")] \
        if len(rows) else [np.zeros(0)] * 5
    for component, volume, *point in zip(*(column.tolist() for column in columns)):
        c = int(component)
        box = slices[c - 1] if c - 1 < len(slices) else None
        if box is None:
            raise ValueError(f"component {c} is listed but absent from the scan's image")
        lo = np.array([s.start for s in box])
        hi = np.array([s.stop - 1 for s in box])
        corners = (offset + lo - 0.5) + _CORNERS * (hi - lo + 1)
        world = _apply(vox2ref, corners)
        voxels[c] = int(counts[c])
        boxes[c] = (lo, hi)
        ref_boxes[c] = (world.min(axis=0), world.max(axis=0))
        centroids[c] = _apply(to_ref, np.array(point, float)[None])[0]
        volumes[c] = float(volume)
        radii[c] = equivalent_radius(volumes[c])
    return ScanGeometry(scan, vox2ref, voxels, boxes, ref_boxes, centroids, radii, volumes)


def _apply(matrix: np.ndarray, points: np.ndarray) -> np.ndarray:
    return points @ matrix[:3, :3].T + matrix[:3, 3]


def labels_at(geometry: ScanGeometry, ijk: np.ndarray) -> np.ndarray:
    """Component numbers at full-grid voxel indices ``ijk`` (n, 3); 0 outside the crop box."""
    comps = geometry.scan.components
    local = np.asarray(ijk, dtype=np.int64) - np.asarray(geometry.scan.offset)
    inside = np.all((local >= 0) & (local < np.array(comps.shape)), axis=1)
    out = np.zeros(len(local), dtype=np.int64)
    if inside.any():
        idx = local[inside]
        out[inside] = comps[idx[:, 0], idx[:, 1], idx[:, 2]]
    return out


def label_at_point(geometry: ScanGeometry, point: np.ndarray) -> int:
    """Component number at a reference-world point (nearest voxel), 0 for background."""
    ijk = np.floor(_apply(geometry.ref2vox, np.asarray(point)[None]) + 0.5)
    return int(labels_at(geometry, ijk)[0])


def component_on_grid(src: ScanGeometry, component: int, dst: ScanGeometry) -> np.ndarray:
    """Full-grid voxel indices of ``dst`` whose centres fall, by nearest voxel, in the component.

    Only the bounding box of the component, as seen on the ``dst`` grid, is enumerated.
    """
    lo, hi = src.boxes[component]
    offset = np.asarray(src.scan.offset)
    src_to_dst = dst.ref2vox @ src.vox2ref
    corners = _apply(src_to_dst, (offset + lo - 0.5) + _CORNERS * (hi - lo + 1))
    first = np.ceil(corners.min(axis=0) - 1e-9).astype(np.int64)
    last = np.floor(corners.max(axis=0) + 1e-9).astype(np.int64)
    if np.any(last < first):
        return np.zeros((0, 3), dtype=np.int64)
    axes = [np.arange(f, t + 1) for f, t in zip(first, last)]
    grid = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    back = np.floor(_apply(np.linalg.inv(src_to_dst), grid.astype(float)) + 0.5)
    return grid[labels_at(src, back) == component]


def dice_world(a: ScanGeometry, comp_a: int, b: ScanGeometry, comp_b: int) -> float:
    """Dice coefficient of two components in world space, on the finer of the two grids.

    Examples
    --------
    >>> cube = np.ones((10, 10, 10), np.int32)
    >>> rows = pd.DataFrame({"component": [1], "volume_mm3": [1000.0], "centroid_x_mm": [0.0],
    ...                      "centroid_y_mm": [0.0], "centroid_z_mm": [0.0]})
    >>> a = scan_geometry(LabelledScan("s", "1", 0, cube, (0, 0, 0), (20,) * 3, np.eye(4)), rows)
    >>> b = scan_geometry(LabelledScan("s", "2", 9, cube, (5, 0, 0), (20,) * 3, np.eye(4)), rows)
    >>> dice_world(a, 1, b, 1)
    0.5
    """
    if np.array_equal(a.vox2ref, b.vox2ref):
        return _dice_same_grid(a, comp_a, b, comp_b)
    fine, comp_f, coarse, comp_c = a, comp_a, b, comp_b
    if b.voxel_volume_mm3 < a.voxel_volume_mm3 * (1 - 1e-9):
        fine, comp_f, coarse, comp_c = b, comp_b, a, comp_a
    mapped = component_on_grid(coarse, comp_c, fine)
    both = int(np.count_nonzero(labels_at(fine, mapped) == comp_f))
    total = fine.voxels[comp_f] + len(mapped)
    return 2.0 * both / total if total else 0.0


def _dice_same_grid(a: ScanGeometry, comp_a: int, b: ScanGeometry, comp_b: int) -> float:
    """``dice_world`` when both scans have one voxel grid in the reference world: the nearest
    voxel of a voxel centre is itself, so the voxels are compared where the two boxes overlap."""
    start_a = np.asarray(a.scan.offset) + a.boxes[comp_a][0]
    start_b = np.asarray(b.scan.offset) + b.boxes[comp_b][0]
    lo = np.maximum(start_a, start_b)
    hi = np.minimum(np.asarray(a.scan.offset) + a.boxes[comp_a][1],
                    np.asarray(b.scan.offset) + b.boxes[comp_b][1])
    total = a.voxels[comp_a] + b.voxels[comp_b]
    if np.any(hi < lo):
        return 0.0
    crop_a = [slice(int(x), int(y) + 1) for x, y in zip(lo - a.scan.offset, hi - a.scan.offset)]
    crop_b = [slice(int(x), int(y) + 1) for x, y in zip(lo - b.scan.offset, hi - b.scan.offset)]
    both = int(np.count_nonzero((a.scan.components[tuple(crop_a)] == comp_a)
                                & (b.scan.components[tuple(crop_b)] == comp_b)))
    return 2.0 * both / total if total else 0.0


def _boxes_meet(a: ScanGeometry, comp_a: int, b: ScanGeometry, comp_b: int) -> bool:
    lo_a, hi_a = a.ref_boxes[comp_a]
    lo_b, hi_b = b.ref_boxes[comp_b]
    return all(x <= y for x, y in zip(lo_a.tolist(), hi_b.tolist())) \
        and all(x <= y for x, y in zip(lo_b.tolist(), hi_a.tolist()))


def pair_evidence(a: ScanGeometry, comp_a: int, b: ScanGeometry, comp_b: int, *,
                  settings: MatchSettings = MatchSettings()) -> Evidence:
    """All evidence and the score for linking component ``comp_a`` of ``a`` to ``comp_b`` of ``b``.

    Examples
    --------
    >>> cube = np.ones((10, 10, 10), np.int32)
    >>> rows = pd.DataFrame({"component": [1], "volume_mm3": [1000.0], "centroid_x_mm": [4.5],
    ...                      "centroid_y_mm": [4.5], "centroid_z_mm": [4.5]})
    >>> a = scan_geometry(LabelledScan("s", "1", 0, cube, (0, 0, 0), (20,) * 3, np.eye(4)), rows)
    >>> e = pair_evidence(a, 1, a, 1)
    >>> (e.overlap, e.centroid_inside, e.score, e.candidate)
    (1.0, True, 1.0, True)
    """
    cen_a, cen_b = a.centroids[comp_a], b.centroids[comp_b]
    distance = float(np.linalg.norm(cen_a - cen_b))
    radius = max(a.radii[comp_a], b.radii[comp_b], settings.min_radius_mm)
    ratio = distance / radius
    overlap, inside = 0.0, False
    if _boxes_meet(a, comp_a, b, comp_b):
        overlap = dice_world(a, comp_a, b, comp_b)
        inside = (label_at_point(b, cen_a) == comp_b) or (label_at_point(a, cen_b) == comp_a)
    closeness = max(0.0, 1.0 - ratio / settings.max_distance_ratio)
    score = (settings.weight_overlap * overlap + settings.weight_inside * float(inside)
             + settings.weight_distance * closeness)
    score /= settings.weight_overlap + settings.weight_inside + settings.weight_distance
    near = ratio <= settings.max_distance_ratio and distance <= settings.max_distance_mm
    return Evidence(overlap=float(overlap), centroid_distance_mm=distance,
                    centroid_inside=bool(inside), distance_ratio=float(ratio),
                    score=float(score), candidate=bool(overlap > 0 or inside or near))
