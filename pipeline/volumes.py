"""Stage 1: label mask + affine -> one row per connected lesion component."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd


@dataclass(frozen=True, eq=False)
class LabelledScan:
    """The connected components of one scan, as later stages need them.

    ``components`` covers only the bounding box of the lesion voxels (masks are mostly empty):
    voxel ``components[i, j, k]`` is voxel ``(i, j, k) + offset`` of the full grid. Value 0 is
    background, value ``c`` is component ``c`` of ``lesions.tsv`` for this subject and session.
    """

    subject: str
    session: str
    day: float
    components: np.ndarray          # (a, b, c) int32, the crop box
    offset: tuple[int, int, int]    # voxel index of components[0, 0, 0] in the full grid
    shape: tuple[int, int, int]     # full grid shape
    affine: np.ndarray              # (4, 4) float64, full-grid voxel -> RAS+ mm

    @property
    def crop_affine(self) -> np.ndarray:
        """Voxel index in the crop box -> RAS+ mm."""
        shift = np.eye(4)
        shift[:3, 3] = self.offset
        return self.affine @ shift

    def full_components(self) -> np.ndarray:
        """The component image on the full grid (allocates the whole grid)."""
        full = np.zeros(self.shape, dtype=np.int32)
        i, j, k = self.offset
        a, b, c = self.components.shape
        full[i:i + a, j:j + b, k:k + c] = self.components
        return full


#: Columns of lesions.tsv written by this stage, in order (contract columns first).
LESION_COLUMNS = ("subject", "session", "day", "component", "label", "voxels", "volume_mm3",
                  "centroid_x_mm", "centroid_y_mm", "centroid_z_mm", "max_axial_diameter_mm",
                  "equivalent_diameter_mm", "bbox_i_min", "bbox_i_max", "bbox_j_min",
                  "bbox_j_max", "bbox_k_min", "bbox_k_max", "axial_slices", "touches_border",
                  "measurable", "mask", "group")

MEASURE_COLUMNS = LESION_COLUMNS[3:21]


def select_labels(data: np.ndarray, labels: tuple[int, ...] | None, *, name: str = "mask"
                  ) -> np.ndarray:
    """Boolean lesion mask: the selected label values merged (all non-zero values by default).

    A label asked for that the mask does not hold, while it holds other non-zero values, is an
    error: the ``labels`` column probably names the wrong values.

    Examples
    --------
    >>> select_labels(np.array([0, 1, 3, 2]), (1, 3)).tolist()
    [False, True, True, False]
    >>> select_labels(np.array([0, 2]), (1,), name="m.nii.gz")
    Traceback (most recent call last):
    ...
    pipeline.errors.InputError: m.nii.gz: label values (1,) asked for, but the mask holds only [2]
    """
    if labels is None:
        return data != 0
    selected = np.isin(data, np.asarray(labels, dtype=data.dtype))
    if not selected.any() and data.any():
        present = np.unique(data[data != 0])
        shown = present[:10].tolist()
        from pipeline.errors import InputError

        raise InputError(f"{name}: label values {tuple(labels)} asked for, but the mask holds "
                         f"only {shown}", path=name)
    return selected


def structure(connectivity: int) -> np.ndarray:
    """3x3x3 neighbourhood for 6-, 18- or 26-connectivity.

    >>> [int(structure(c).sum()) for c in (6, 18, 26)]
    [7, 19, 27]
    """
    from scipy import ndimage

    rank = {6: 1, 18: 2, 26: 3}[connectivity]
    return ndimage.generate_binary_structure(3, rank)


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
    diameters, slices = _axial_diameters(np.asarray(voxels), ids, 1, affine, axis)
    return float(diameters[0]), int(slices[0])


def _connected(crop: np.ndarray, connectivity: int) -> tuple[np.ndarray, int]:
    """Label a C-contiguous crop (non-zero = lesion). connected-components-3d is used when
    installed: it measured about 3x faster than scipy.ndimage.label here (benchmarks/volumes.py);
    scipy is the fallback and, with SimpleITK, the reference in the tests. Numbering is normalised
    afterwards, so both give identical results. Labels are uint16 when they fit (memory)."""
    try:
        import cc3d
    except ImportError:
        from scipy import ndimage

        return ndimage.label(crop != 0, structure=structure(connectivity), output=np.int32)
    for dtype in (np.uint16, np.uint32):
        try:
            raw, count = cc3d.connected_components(crop, connectivity=connectivity,
                                                   return_N=True, out_dtype=dtype)
            return raw, int(count)
        except ValueError:   # more components than the type holds: use the wider one
            continue
        except RuntimeError:  # cc3d 4.x fails on some thin crops (1 x 1 x n, 3 x 3 x 1)
            break
    from scipy import ndimage

    return ndimage.label(crop != 0, structure=structure(connectivity), output=np.int32)


def _single_value(crop: np.ndarray) -> bool:
    """Whether an unsigned crop holds only 0 and 1 (then it can be labelled as it is, without a
    boolean copy); one pass, no temporary array."""
    return crop.dtype.kind in "ub" and int(crop.max(initial=0)) <= 1


def _label(data: np.ndarray, labels: tuple[int, ...] | None, connectivity: int, name: str
           ) -> tuple[np.ndarray, tuple[int, int, int], np.ndarray]:
    """Components (crop box), offset, and the lesion voxels' indices (n, 3) sorted by component.

    Works on the C-ordered view of a Fortran-ordered array (how nibabel lays out NIfTI data),
    on the box of non-zero voxels, split further at empty planes (no component can cross an
    empty plane), so only the occupied parts are copied and labelled. Components are numbered
    largest first, ties by first voxel in raster order; indices are returned in the caller's
    axis order.
    """
    flip = data.flags.f_contiguous and not data.flags.c_contiguous
    work = data.T if flip else data
    box = (slice(0, work.shape[0]), slice(0, work.shape[1]), slice(0, work.shape[2]))
    binary = labels is None and _single_value(work)
    lesion = work if binary else select_labels(work, labels, name=name)
    coords, ids = _label_parts(lesion, connectivity)
    if len(ids) == 0:
        return np.zeros((0, 0, 0), dtype=np.uint8), (0, 0, 0), np.zeros((0, 3), dtype=np.int64)
    linear = np.ravel_multi_index(coords.T, lesion.shape)
    by_id = np.lexsort((linear, ids))
    ids, coords, linear = ids[by_id], coords[by_id], linear[by_id]
    starts = np.flatnonzero(np.r_[True, ids[1:] != ids[:-1]])
    sizes = np.diff(np.r_[starts, len(ids)])
    order = np.lexsort((linear[starts], -sizes))    # largest first, then earliest voxel
    count = len(starts)
    rank = np.empty(count, dtype=np.int64)
    rank[order] = np.arange(1, count + 1)
    new = np.repeat(rank, sizes)
    regroup = np.argsort(new, kind="stable")
    new, coords = new[regroup], coords[regroup]
    low, high = coords.min(axis=0), coords.max(axis=0)
    from pipeline.io import label_dtype

    components = np.zeros(tuple(high - low + 1), dtype=label_dtype(count))
    components[tuple((coords - low).T)] = new
    offset = tuple(int(sl.start + lo) for sl, lo in zip(box, low))
    voxels = coords + np.asarray([sl.start for sl in box])
    if flip:
        return components.T, offset[::-1], voxels[:, ::-1]
    return components, offset, voxels


def _label_parts(lesion: np.ndarray, connectivity: int) -> tuple[np.ndarray, np.ndarray]:
    """Lesion voxel indices (raster order within each part) and a component id per voxel,
    labelling each occupied part of ``lesion`` separately."""
    coords, ids, total = [], [], 0
    for part in _occupied_parts(lesion):
        piece = np.ascontiguousarray(lesion[part])
        if not piece.flags.writeable:                 # cc3d refuses read-only buffers
            piece = piece.copy()
        raw, count = _connected(piece, connectivity)
        local = _nonzero_voxels(raw)
        ids.append(raw[local[:, 0], local[:, 1], local[:, 2]].astype(np.int64) + total)
        coords.append(local + np.asarray([sl.start for sl in part]))
        total += count
    if not ids:
        return np.zeros((0, 3), dtype=np.int64), np.zeros(0, dtype=np.int64)
    return np.concatenate(coords), np.concatenate(ids)


def _occupied_parts(volume: np.ndarray, *, depth: int = 0) -> list[tuple[slice, slice, slice]]:
    """Tight boxes covering the non-zero voxels, split at empty planes along any axis.

    >>> v = np.zeros((9, 4, 4), np.uint8); v[1, 1, 1] = v[7, 2, 2] = 1
    >>> [(b[0].start, b[0].stop) for b in _occupied_parts(v)]
    [(1, 2), (7, 8)]
    """
    z = volume.any(axis=(1, 2))
    yx = volume.any(axis=0)
    runs = [_runs(z), _runs(yx.any(axis=1)), _runs(yx.any(axis=0))]
    if not runs[0]:
        return []
    tight = tuple(slice(r[0][0], r[-1][1]) for r in runs)
    split = next((a for a in range(3) if len(runs[a]) > 1), None)
    if split is None or depth > 12:
        return [tight]
    parts = []
    for start, stop in runs[split]:
        box = list(tight)
        box[split] = slice(start, stop)
        sub = tuple(box)
        for inner in _occupied_parts(volume[sub], depth=depth + 1):
            parts.append(tuple(slice(o.start + i.start, o.start + i.stop)
                               for o, i in zip(sub, inner)))
    return parts


def _runs(flags: np.ndarray) -> list[tuple[int, int]]:
    """(start, stop) of each run of True values.

    >>> _runs(np.array([0, 1, 1, 0, 1], bool))
    [(1, 3), (4, 5)]
    """
    edges = np.flatnonzero(np.diff(np.r_[0, flags.astype(np.int8), 0]))
    return list(zip(edges[::2].tolist(), edges[1::2].tolist()))


def _nonzero_voxels(volume: np.ndarray) -> np.ndarray:
    """(n, 3) indices of the non-zero voxels of a C-ordered 3-D array, in raster order.

    One fast reduction finds the occupied rows; only those rows are searched, so a sparse
    volume costs little more than one pass (``np.argwhere`` on the whole volume is ~20x slower
    here).

    >>> v = np.zeros((2, 3, 4), np.uint8); v[1, 2, 3] = v[0, 1, 0] = 5
    >>> _nonzero_voxels(v).tolist()
    [[0, 1, 0], [1, 2, 3]]
    """
    rows = np.argwhere(volume.any(axis=2))
    r, x = np.nonzero(volume[rows[:, 0], rows[:, 1]])
    return np.column_stack([rows[r, 0], rows[r, 1], x])


def component_table(data: np.ndarray, affine: np.ndarray, *, labels: tuple[int, ...] | None = None,
                    connectivity: int = 26, min_volume_mm3: float = 0.0,
                    measurable_min_diameter_mm: float = 10.0, measurable_min_slices: int = 2,
                    name: str = "mask") -> tuple[pd.DataFrame, np.ndarray, tuple[int, int, int]]:
    """Measure every connected lesion in a label mask.

    Parameters
    ----------
    data : (X, Y, Z) integer ndarray
        Label mask; ``labels`` selects the lesion values (default: every non-zero value).
    affine : (4, 4) ndarray
        Voxel -> RAS+ world (mm).

    Returns
    -------
    table : pandas.DataFrame
        One row per component with the columns ``MEASURE_COLUMNS``: ``component``, ``label``
        (the most frequent selected value), ``voxels``, ``volume_mm3`` (voxels x |det A|),
        world centroid, ``max_axial_diameter_mm``, ``equivalent_diameter_mm`` (sphere of equal
        volume), voxel bounding box, ``axial_slices``, ``touches_border``, ``measurable``.
    components, offset
        The component image over the lesion bounding box (0 background, c = component c)
        and the voxel index of the box's first voxel.

    Notes
    -----
    ``measurable`` follows RANO-BM (Lin NU et al. Lancet Oncol 2015;16:e270-e278): longest
    diameter >= 10 mm and visible on >= 2 axial slices. The perpendicular-diameter condition of
    RANO-BM is not applied.

    Examples
    --------
    >>> table, comps, offset = component_table(np.pad(np.ones((2, 2, 2), np.uint8), 1), np.eye(4))
    >>> table.volume_mm3.tolist(), table.centroid_x_mm.tolist(), offset
    ([8.0], [1.5], (1, 1, 1))
    """
    data = np.asarray(data)
    affine = np.asarray(affine, dtype=np.float64)
    components, offset, voxels = _label(data, labels, connectivity, name)
    voxel_mm3 = float(abs(np.linalg.det(affine[:3, :3])))
    rows = _measure(voxels, components, offset, data, affine, voxel_mm3)
    table = pd.DataFrame(rows, columns=list(MEASURE_COLUMNS))
    table = _finish(table, data.shape, measurable_min_diameter_mm, measurable_min_slices)
    if min_volume_mm3 > 0 and len(table):
        keep = table.volume_mm3 >= min_volume_mm3
        if not keep.all():
            components, table = _drop_small(components, table, keep)
    return table, components, offset


def _measure(vox: np.ndarray, components: np.ndarray, offset: tuple[int, int, int],
             data: np.ndarray, affine: np.ndarray, voxel_mm3: float) -> list[dict]:
    """One row of measures per component, computed for all components at once; ``vox`` are
    lesion voxel indices grouped by component (1, 2, ...)."""
    if len(vox) == 0:
        return []
    local = vox - np.asarray(offset)
    ids = components[local[:, 0], local[:, 1], local[:, 2]].astype(np.int64)
    values = data[vox[:, 0], vox[:, 1], vox[:, 2]]
    count = int(ids[-1])
    starts = np.searchsorted(ids, np.arange(1, count + 1))
    sizes = np.diff(np.r_[starts, len(ids)])
    centres = np.add.reduceat(vox.astype(np.float64), starts) / sizes[:, None]
    centres = centres @ affine[:3, :3].T + affine[:3, 3]
    low, high = np.minimum.reduceat(vox, starts), np.maximum.reduceat(vox, starts)
    labels = _mode_per_group(ids, values, count)
    diameters, slices = _axial_diameters(vox, ids, count, affine, axial_axis(affine))
    return [{"component": c + 1, "label": int(labels[c]), "voxels": int(sizes[c]),
             "volume_mm3": int(sizes[c]) * voxel_mm3, "centroid_x_mm": centres[c, 0],
             "centroid_y_mm": centres[c, 1], "centroid_z_mm": centres[c, 2],
             "max_axial_diameter_mm": float(diameters[c]), "bbox_i_min": low[c, 0],
             "bbox_i_max": high[c, 0], "bbox_j_min": low[c, 1], "bbox_j_max": high[c, 1],
             "bbox_k_min": low[c, 2], "bbox_k_max": high[c, 2], "axial_slices": int(slices[c])}
            for c in range(count)]


def _mode_per_group(ids: np.ndarray, values: np.ndarray, count: int) -> np.ndarray:
    """Most frequent value per group id 1..count (ties: the smallest value).

    >>> _mode_per_group(np.array([1, 1, 1, 2]), np.array([3, 1, 3, 7]), 2).tolist()
    [3, 7]
    """
    order = np.lexsort((values, ids))
    g, v = ids[order], values[order]
    edge = np.flatnonzero(np.r_[True, (g[1:] != g[:-1]) | (v[1:] != v[:-1])])
    runs = np.diff(np.r_[edge, len(g)])
    run_group, run_value = g[edge], v[edge]
    best = np.lexsort((run_value, -runs, run_group))       # per group: longest run first
    first = np.flatnonzero(np.r_[True, run_group[best][1:] != run_group[best][:-1]])
    out = np.zeros(count, dtype=values.dtype)
    out[run_group[best][first] - 1] = run_value[best][first]
    return out


def _axial_diameters(vox: np.ndarray, ids: np.ndarray, count: int, affine: np.ndarray,
                     axis: int) -> tuple[np.ndarray, np.ndarray]:
    """Longest in-slice distance (mm) and number of axial slices, per component 1..count.

    Same rule as :func:`max_axial_diameter` (row-end voxels are the only hull candidates), for
    all components at once: the (component, slice) groups are compared in batches of similar
    size through one Gram product each.
    """
    p, q = [a for a in range(3) if a != axis]
    span = vox.max(axis=0).astype(np.int64) + 1
    slice_key = ids * span[axis] + vox[:, axis]                  # (component, slice)
    row_key = slice_key * span[p] + vox[:, p]                     # (component, slice, row)
    order = np.argsort(row_key * span[q] + vox[:, q], kind="stable")
    v, g, rows = vox[order], ids[order], row_key[order]
    flag = np.zeros(len(v), dtype=bool)
    flag[0] = flag[-1] = True
    edge = rows[1:] != rows[:-1]
    flag[1:] |= edge                                              # first voxel of each row
    flag[:-1] |= edge                                             # last voxel of each row
    pick = np.flatnonzero(flag)
    cand, cg, ck = v[pick], g[pick], slice_key[order][pick]
    group_start = np.flatnonzero(np.r_[True, ck[1:] != ck[:-1]])
    group_size = np.diff(np.r_[group_start, len(cand)])
    group_comp = cg[group_start]
    world = cand[:, [p, q]] @ np.asarray(affine, dtype=float)[:3, [p, q]].T
    best = np.zeros(len(group_start))
    bucket = np.maximum(1, 2 ** np.ceil(np.log2(group_size))).astype(int)
    for width in np.unique(bucket):
        chosen = np.flatnonzero(bucket == width)
        best[chosen] = _group_diameters(world, group_start[chosen], group_size[chosen], width)
    diameters = np.zeros(count)
    np.maximum.at(diameters, group_comp - 1, best)
    slices = np.bincount(group_comp - 1, minlength=count)
    return diameters, slices


def _group_diameters(world: np.ndarray, starts: np.ndarray, sizes: np.ndarray,
                     width: int) -> np.ndarray:
    """Largest pairwise distance within each group of points (rows starts[i]..+sizes[i])."""
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
    return np.sqrt(np.maximum(squared.reshape(len(starts), -1).max(axis=1), 0.0))


def _finish(table: pd.DataFrame, shape: tuple[int, ...], min_diameter: float,
            min_slices: int) -> pd.DataFrame:
    table = table.copy()
    table["equivalent_diameter_mm"] = np.cbrt(6.0 * table.volume_mm3.astype(float) / np.pi)
    lows = table[["bbox_i_min", "bbox_j_min", "bbox_k_min"]].to_numpy()
    highs = table[["bbox_i_max", "bbox_j_max", "bbox_k_max"]].to_numpy()
    edge = np.asarray(shape[:3]) - 1
    table["touches_border"] = (lows == 0).any(axis=1) | (highs == edge).any(axis=1)
    table["measurable"] = (table.max_axial_diameter_mm >= min_diameter) & \
        (table.axial_slices >= min_slices)
    for name in ("component", "label", "voxels", "axial_slices") + tuple(
            c for c in MEASURE_COLUMNS if c.startswith("bbox")):
        table[name] = table[name].astype("int64")
    table["touches_border"] = table.touches_border.astype(bool)
    table["measurable"] = table.measurable.astype(bool)
    return table


def _drop_small(components: np.ndarray, table: pd.DataFrame, keep: pd.Series
                ) -> tuple[np.ndarray, pd.DataFrame]:
    """Remove components below the minimum volume and renumber the rest 1..m in order."""
    mapping = np.zeros(len(table) + 1, dtype=np.int32)
    kept = table.component[keep].to_numpy()
    mapping[kept] = np.arange(1, len(kept) + 1, dtype=np.int32)
    table = table[keep].copy()
    table["component"] = np.arange(1, len(kept) + 1)
    return mapping[components], table.reset_index(drop=True)


def scan_table(table: pd.DataFrame, *, subject: str, session: str, day: float, mask: str,
               group: str = "") -> pd.DataFrame:
    """Prefix a component table with the scan's identity columns (lesions.tsv rows)."""
    out = table.copy()
    out.insert(0, "day", float(day))
    out.insert(0, "session", session)
    out.insert(0, "subject", subject)
    out["mask"] = mask
    out["group"] = group
    return out[list(LESION_COLUMNS)]
