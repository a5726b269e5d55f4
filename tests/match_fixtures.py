"""Builders of synthetic labelled scans with known truth for the matching tests.

A *lesion* of the truth is a named sphere in world (RAS+ mm) coordinates; a session renders its
spheres onto a voxel grid, labels the union (26-connected, components numbered largest first,
as stage 1 does), crops to the bounding box and computes the lesions.tsv rows from the affine.
Every component remembers which truth spheres it holds.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import ndimage

from pipeline.volumes.components import LabelledScan


@dataclass(frozen=True)
class Sphere:
    name: str
    centre: tuple[float, float, float]
    radius: float


@dataclass(frozen=True)
class Grid:
    shape: tuple[int, int, int]
    affine: np.ndarray
    perm: tuple[int, int, int] = (0, 1, 2)     # storage: array axes permuted
    flip: tuple[int, ...] = field(default=())  # storage: array axes flipped (after permuting)


def centred_affine(shape, zooms, rotation=None) -> np.ndarray:
    """Voxel -> world affine whose grid is centred on the world origin."""
    rot = np.eye(3) if rotation is None else np.asarray(rotation, float)
    affine = np.eye(4)
    affine[:3, :3] = rot @ np.diag(zooms)
    affine[:3, 3] = -affine[:3, :3] @ ((np.asarray(shape) - 1) / 2.0)
    return affine


def rotation(axis: int, degrees: float) -> np.ndarray:
    a = np.deg2rad(degrees)
    c, s = np.cos(a), np.sin(a)
    i, j = [k for k in range(3) if k != axis]
    rot = np.eye(3)
    rot[i, i], rot[i, j], rot[j, i], rot[j, j] = c, -s, s, c
    return rot


ISO = Grid((64, 64, 64), centred_affine((64, 64, 64), (1.0, 1.0, 1.0)))
ANISO = Grid((72, 72, 22), centred_affine((72, 72, 22), (0.9, 0.9, 3.0)))
OBLIQUE = Grid((72, 72, 22), centred_affine((72, 72, 22), (0.9, 0.9, 3.0), rotation(0, 30.0)))
FLIPPED = Grid((64, 64, 64), centred_affine((64, 64, 64), (1.0, 1.0, 1.0)),
               perm=(2, 0, 1), flip=(0, 2))


def world_coordinates(shape, affine) -> np.ndarray:
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), -1)
    return ijk @ affine[:3, :3].T + affine[:3, 3]


def render(spheres, grid: Grid) -> dict[str, np.ndarray]:
    """One boolean mask per sphere on the grid, before storage reordering."""
    xyz = world_coordinates(grid.shape, grid.affine)
    return {s.name: np.sum((xyz - np.asarray(s.centre)) ** 2, axis=-1) <= s.radius ** 2
            for s in spheres}


def stored(array: np.ndarray, grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """Reorder an array for storage (permute, then flip) and return it with its affine."""
    out = array.transpose(grid.perm)
    move = np.zeros((4, 4))
    move[3, 3] = 1.0
    for k, p in enumerate(grid.perm):
        move[p, k] = 1.0
    shape = out.shape
    for axis in grid.flip:
        out = np.flip(out, axis)
        flip = np.eye(4)
        flip[axis, axis], flip[axis, 3] = -1.0, shape[axis] - 1
        move = move @ flip
    return np.ascontiguousarray(out), grid.affine @ move


def label_scan(mask: np.ndarray, affine: np.ndarray, *, subject: str, session: str,
               day: float) -> tuple[LabelledScan, pd.DataFrame]:
    """Label a mask the way stage 1 does and return the scan and its lesions.tsv rows."""
    raw, n = ndimage.label(mask, structure=np.ones((3, 3, 3)))
    sizes = np.bincount(raw.ravel(), minlength=n + 1)
    order = sorted(range(1, n + 1), key=lambda c: (-sizes[c], c))
    lookup = np.zeros(n + 1, np.int32)
    lookup[order] = np.arange(1, n + 1)
    labels = lookup[raw]
    voxel_volume = abs(np.linalg.det(affine[:3, :3]))
    rows = []
    for c in range(1, n + 1):
        ijk = np.argwhere(labels == c)
        centroid = affine[:3, :3] @ ijk.mean(axis=0) + affine[:3, 3]
        volume = len(ijk) * voxel_volume
        rows.append({"subject": subject, "session": session, "day": day, "component": c,
                     "voxels": len(ijk), "volume_mm3": volume, "centroid_x_mm": centroid[0],
                     "centroid_y_mm": centroid[1], "centroid_z_mm": centroid[2],
                     "equivalent_diameter_mm": 2 * (3 * volume / (4 * np.pi)) ** (1 / 3)})
    if n:
        box = ndimage.find_objects((labels > 0).astype(np.int32))[0]
        crop, offset = labels[box], tuple(s.start for s in box)
    else:
        crop, offset = np.zeros((0, 0, 0), np.int32), (0, 0, 0)
    scan = LabelledScan(subject, session, float(day), crop.astype(np.int32), offset,
                        tuple(mask.shape), np.asarray(affine, float))
    return scan, pd.DataFrame(rows)


def make_series(sessions, *, subject: str = "01"):
    """``sessions``: list of (session, day, spheres, grid). Returns scans, lesions, truth.

    ``truth[(session, component)]`` is the frozenset of sphere names the component holds.
    """
    scans, tables, truth = [], [], {}
    for session, day, spheres, grid in sessions:
        masks = render(spheres, grid)
        union = np.zeros(grid.shape, bool)
        for m in masks.values():
            union |= m
        mask, affine = stored(union, grid)
        scan, rows = label_scan(mask, affine, subject=subject, session=session, day=day)
        full = scan.full_components()
        for name, m in masks.items():
            inside = full[stored(m, grid)[0]]
            for c in np.unique(inside[inside > 0]):
                truth.setdefault((session, int(c)), set()).add(name)
        scans.append(scan)
        tables.append(rows)
    truth = {k: frozenset(v) for k, v in truth.items()}
    return scans, pd.concat(tables, ignore_index=True), truth


def link_precision_recall(matches: pd.DataFrame, expected: set[tuple]) -> tuple[float, float]:
    """Precision and recall of (session_from, component_from, session_to, component_to) links."""
    found = {(r.session_from, int(r.component_from), r.session_to, int(r.component_to))
             for r in matches.itertuples()}
    hits = len(found & expected)
    precision = hits / len(found) if found else float(not expected)
    recall = hits / len(expected) if expected else 1.0
    return precision, recall


def pair_precision_recall(assignment: pd.DataFrame, truth: dict) -> tuple[float, float]:
    """Precision and recall of 'same lesion' over all pairs of components of different sessions.

    Two components are truly the same lesion when they hold a common truth sphere name (a
    merged blob counts as the same lesion as the larger parent only: callers pass such truth).
    """
    keys = [(r.session, int(r.component)) for r in assignment.itertuples()]
    lesion = {(r.session, int(r.component)): int(r.lesion) for r in assignment.itertuples()}
    tp = fp = fn = 0
    for i, a in enumerate(keys):
        for b in keys[i + 1:]:
            if a[0] == b[0]:
                continue
            same_true = bool(truth[a] & truth[b])
            same_pred = lesion[a] == lesion[b]
            tp += same_true and same_pred
            fp += same_pred and not same_true
            fn += same_true and not same_pred
    precision = tp / (tp + fp) if tp + fp else 1.0
    recall = tp / (tp + fn) if tp + fn else 1.0
    return precision, recall
