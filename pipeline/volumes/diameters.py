"""Longest axial diameters of every component at once (centre to centre and edge to edge) and
the number of axial slices each spans.

Axial slices are those along the voxel axis closest to world superior-inferior. Within a slice
only the first and last voxel of each row can be vertices of the convex hull, so only they are
compared; an octagon bound from four index extents skips slices that cannot hold a component's
maximum (docs/methods.md, "Axial diameters").
"""
from __future__ import annotations

import numpy as np


def axial_axis(affine: np.ndarray) -> int:
    """Voxel axis whose direction is closest to the world superior-inferior (z) axis.

    >>> axial_axis(np.diag([1.0, 1.0, 3.0, 1.0]))
    2
    >>> axial_axis(np.array([[0, 0, 1, 0], [1, 0, 0, 0], [0, 1, 0, 0], [0, 0, 0, 1.0]]))
    1
    """
    columns = np.asarray(affine, dtype=float)[:3, :3]
    cosine = np.abs(columns[2]) / np.linalg.norm(columns, axis=0)
    return int(np.argmax(cosine))


def max_axial_diameter(voxels: np.ndarray, affine: np.ndarray, axis: int) -> tuple[float, int]:
    """Longest in-slice distance (mm) over the axial slices, and the number of slices spanned,
    for one lesion's (n, 3) voxel indices; ``axis`` is the axial voxel axis.

    >>> max_axial_diameter(np.array([[0, 0, 0], [3, 4, 0], [9, 9, 1]]), np.eye(4), 2)
    (5.0, 2)
    """
    ids = np.ones(len(voxels), dtype=np.int64)
    diameters, _edges, slices = _axial_diameters(np.asarray(voxels), ids, 1, affine, axis)
    return float(diameters[0]), int(slices[0])


def max_axial_diameter_edge(voxels: np.ndarray, affine: np.ndarray, axis: int) -> float:
    """Edge-to-edge longest axial diameter (mm) of one lesion's (n, 3) voxel indices: the
    centre-to-centre diameter plus the extent of one voxel along the measured direction.

    A reader measuring on screen spans the lesion from edge to edge; adding one voxel's width
    along the measured line to the centre distance is common practice (docs/methods.md).

    >>> max_axial_diameter_edge(np.array([[0, 0, 0], [9, 0, 0]]), np.eye(4), 2)
    10.0
    >>> round(max_axial_diameter_edge(np.array([[0, 0, 0], [3, 3, 0]]), np.eye(4), 2), 4)
    5.6569
    """
    ids = np.ones(len(voxels), dtype=np.int64)
    _diameters, edges, _slices = _axial_diameters(np.asarray(voxels), ids, 1, affine, axis)
    return float(edges[0])


def _row_axes(axis: int, fortran: bool) -> tuple[int, int]:
    """The two in-slice axes in the order the raster order of the memory layout sorts them
    (rows along the faster one), so voxels in raster order need no sorting when the axial axis
    is the slowest.

    >>> _row_axes(2, True), _row_axes(2, False)
    ((1, 0), (0, 1))
    """
    significance = (2, 1, 0) if fortran else (0, 1, 2)
    p, q = (a for a in significance if a != axis)
    return p, q


def _axial_diameters(vox: np.ndarray, ids: np.ndarray, count: int, affine: np.ndarray,
                     axis: int, rows: tuple[int, int] | None = None
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Longest in-slice distance (mm) between voxel centres, the same edge to edge (plus one
    voxel's extent along the measured direction) and number of axial slices, per component
    1..count.

    Same rule as :func:`max_axial_diameter` (row-end voxels are the only hull candidates: a
    voxel between two others of its row cannot be a vertex of the hull, whichever in-slice
    axis the rows follow), for all components at once: the (component, slice) groups are
    compared in batches of similar size through one Gram product each. ``rows`` = (p, q) are
    the in-slice axes, rows along q; voxels already sorted that way are not sorted again.
    """
    if count == 0:
        return np.zeros(0), np.zeros(0), np.zeros(0, dtype=np.int64)
    p, q = rows or [a for a in range(3) if a != axis]
    span = vox.max(axis=0).astype(np.int64) + 1
    slice_key = ids * span[axis] + vox[:, axis]                  # (component, slice)
    row_key = slice_key * span[p] + vox[:, p]                     # (component, slice, row)
    key = row_key * span[q] + vox[:, q]
    if np.all(key[1:] >= key[:-1]):
        v, g, rows_sorted, ck_all = vox, ids, row_key, slice_key
    else:
        order = np.argsort(key, kind="stable")
        v, g, rows_sorted, ck_all = vox[order], ids[order], row_key[order], slice_key[order]
    rows = rows_sorted
    flag = np.zeros(len(v), dtype=bool)
    flag[0] = flag[-1] = True
    edge = rows[1:] != rows[:-1]
    flag[1:] |= edge                                              # first voxel of each row
    flag[:-1] |= edge                                             # last voxel of each row
    pick = np.flatnonzero(flag)
    cand, cg, ck = v[pick], g[pick], ck_all[pick]
    group_start = np.flatnonzero(np.r_[True, ck[1:] != ck[:-1]])
    group_size = np.diff(np.r_[group_start, len(cand)])
    group_comp = cg[group_start]
    columns = np.asarray(affine, dtype=float)[:3, [p, q]]
    world = cand[:, [p, q]] @ columns.T
    # Exact diameters first for each component's slice with the largest upper bound, then only
    # for slices whose bound can beat that: the others cannot hold the component's maximum.
    bound = _octagon_bounds(cand[:, p], cand[:, q], group_start, columns)
    best, along = np.zeros(len(group_start)), np.zeros((len(group_start), 3))
    order = np.lexsort((-bound, group_comp))                 # per component, largest first
    first = order[np.unique(group_comp[order], return_index=True)[1]]
    best[first], along[first] = _bucketed_diameters(world, group_start[first], group_size[first])
    reach = np.zeros(count + 1)
    reach[group_comp[first]] = best[first]
    rest = np.flatnonzero(bound >= reach[group_comp] * (1 - 1e-12))
    rest = rest[~np.isin(rest, first)]
    best[rest], along[rest] = _bucketed_diameters(world, group_start[rest], group_size[rest])
    # each component's longest slice (the first such slice on ties)
    pick_order = np.lexsort((-best, group_comp))
    top = pick_order[np.unique(group_comp[pick_order], return_index=True)[1]]
    diameters = np.zeros(count)
    diameters[group_comp[top] - 1] = best[top]
    edges = diameters + _voxel_extent(along[top], columns)
    slices = np.bincount(group_comp - 1, minlength=count)
    return diameters, edges, slices


def _voxel_extent(along: np.ndarray, columns: np.ndarray) -> np.ndarray:
    """Width (mm) of one voxel's in-slice face along each direction ``along`` (k, 3): the sum
    of the face's edge vectors projected on the unit direction. A zero direction (one voxel
    in its slice) takes the face's longer edge."""
    length = np.linalg.norm(along, axis=1)
    unit = along / np.where(length > 0, length, 1.0)[:, None]
    extent = np.abs(unit @ columns).sum(axis=1)
    return np.where(length > 0, extent, np.linalg.norm(columns, axis=0).max())


def _bucketed_diameters(world: np.ndarray, starts: np.ndarray, sizes: np.ndarray
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Largest pairwise distance within each group of points, and the difference vector of
    that pair (mm), groups batched by size."""
    best, along = np.zeros(len(starts)), np.zeros((len(starts), world.shape[1]))
    bucket = np.maximum(1, 2 ** np.ceil(np.log2(np.maximum(sizes, 1)))).astype(int)
    for width in np.unique(bucket):
        chosen = np.flatnonzero(bucket == width)
        best[chosen], along[chosen] = _group_diameters(world, starts[chosen], sizes[chosen],
                                                       width)
    return best, along


def _octagon_bounds(u: np.ndarray, v: np.ndarray, starts: np.ndarray, columns: np.ndarray
                    ) -> np.ndarray:
    """An upper bound of each group's largest in-slice distance (mm), from the extents of its
    voxel indices along u, v, u + v and u - v: every difference of two points lies in the
    octagon those extents allow, and the distance is largest at one of its corners (a convex
    function on a convex polygon). ``columns`` (3, 2) maps (u, v) steps to millimetres.

    >>> d = np.array([[0, 0], [3, 4]])                       # one pair, 5 apart
    >>> bool(_octagon_bounds(d[:, 0], d[:, 1], np.array([0]), np.eye(3)[:, :2])[0] >= 5.0)
    True
    """
    extents = np.stack([(np.maximum.reduceat(values, starts) -
                         np.minimum.reduceat(values, starts)).astype(float)
                        for values in (u, v, u + v, u - v)])                 # (4, groups)
    to_du, to_dv = _OCTAGON_CORNERS
    du, dv = to_du @ extents, to_dv @ extents                              # (24, groups)
    along = _OCTAGON_NORMALS[:, 0, None, None] * du + _OCTAGON_NORMALS[:, 1, None, None] * dv
    inside = (np.abs(along) <= extents[:, None, :] * (1 + 1e-9) + 1e-9).all(axis=0)
    gram = columns.T @ columns
    length = gram[0, 0] * du * du + 2 * gram[0, 1] * du * dv + gram[1, 1] * dv * dv
    return np.sqrt(np.where(inside, length, 0.0).max(axis=0, initial=0.0))


def _octagon_corners() -> tuple[np.ndarray, np.ndarray]:
    """(24, 4) matrices giving the candidate corners (du, dv) of the octagon from its four
    extents: each corner lies on two of the lines n . d = +-extent."""
    to_du, to_dv = [], []
    for i in range(4):
        for j in range(i + 1, 4):
            inverse = np.linalg.inv(_OCTAGON_NORMALS[[i, j]])
            for si in (1.0, -1.0):
                for sj in (1.0, -1.0):
                    rows = np.zeros((2, 4))
                    rows[:, i] += inverse[:, 0] * si
                    rows[:, j] += inverse[:, 1] * sj
                    to_du.append(rows[0])
                    to_dv.append(rows[1])
    return np.asarray(to_du), np.asarray(to_dv)


_OCTAGON_NORMALS = np.array([[1, 0], [0, 1], [1, 1], [1, -1]], dtype=float)


_OCTAGON_CORNERS = _octagon_corners()


def _group_diameters(world: np.ndarray, starts: np.ndarray, sizes: np.ndarray,
                     width: int) -> tuple[np.ndarray, np.ndarray]:
    """Largest pairwise distance within each group of points (rows starts[i]..+sizes[i]) and
    the difference vector of the farthest pair."""
    padded = np.zeros((len(starts), width, world.shape[1]))
    valid = np.zeros((len(starts), width), dtype=bool)
    rows = np.repeat(np.arange(len(starts)), sizes)
    slot = np.arange(int(sizes.sum())) - np.repeat(np.cumsum(sizes) - sizes, sizes)
    points = world[np.repeat(starts, sizes) + slot]
    padded[rows, slot] = points - np.repeat(
        np.add.reduceat(points, np.r_[0, np.cumsum(sizes)[:-1]]) / sizes[:, None], sizes, axis=0)
    valid[rows, slot] = True
    norms = (padded * padded).sum(axis=-1)
    squared = norms[:, :, None] + norms[:, None, :] - 2.0 * (padded @ padded.transpose(0, 2, 1))
    squared[~(valid[:, :, None] & valid[:, None, :])] = 0.0
    flat = squared.reshape(len(starts), -1)
    where = flat.argmax(axis=1)
    groups = np.arange(len(starts))
    along = padded[groups, where // width] - padded[groups, where % width]
    return np.sqrt(np.maximum(flat[groups, where], 0.0)), along
