"""Stage 1: label mask + affine -> one row per connected lesion component."""
from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from pipeline.volumes.columns import LESION_COLUMNS, MEASURE_COLUMNS  # noqa: F401
from pipeline.voxels import _absent_labels, _label_values
from pipeline.volumes.diameters import _axial_diameters, _row_axes, axial_axis
from pipeline.geometry import voxel_volume_mm3
from pipeline.settings import VolumeSettings

if TYPE_CHECKING:
    import pandas as pd

_DEFAULT = VolumeSettings()   # frozen: one shared default is safe


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


def structure(connectivity: int) -> np.ndarray:
    """3x3x3 neighbourhood for 6-, 18- or 26-connectivity.

    >>> [int(structure(c).sum()) for c in (6, 18, 26)]
    [7, 19, 27]
    """
    from scipy import ndimage

    rank = {6: 1, 18: 2, 26: 3}[connectivity]
    return ndimage.generate_binary_structure(3, rank)


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


@dataclass(frozen=True, eq=False)
class LesionVoxels:
    """The lesion voxels of one mask with their component numbers: what stage 1 measures, kept
    sparse (a mask is mostly background).

    ``voxels`` are (n, 3) indices in the caller's axis order, listed in the raster order of the
    mask's memory layout (Fortran order when ``fortran``, else C order), so their flat indices in
    any box of that layout ascend. ``ids`` numbers the components 1..``count``, largest first,
    ties by first voxel in that raster order; ``values`` are the mask values at the voxels.
    ``frame`` (offset, shape) fixes the box when components were dropped (it stays the box of
    every lesion voxel found).
    """

    voxels: np.ndarray
    values: np.ndarray
    ids: np.ndarray
    count: int
    fortran: bool
    frame: tuple[tuple[int, int, int], tuple[int, int, int]] | None = None

    @property
    def order(self) -> str:
        return "F" if self.fortran else "C"

    def box(self) -> tuple[tuple[int, int, int], tuple[int, int, int]]:
        """Offset and shape of the bounding box of the lesion voxels ((0, 0, 0) twice if none).

        >>> lv = lesion_voxels(np.pad(np.ones((2, 1, 1), np.uint8), 2), 26)
        >>> lv.box()
        ((2, 2, 2), (2, 1, 1))
        """
        if self.frame is not None:
            return self.frame
        if len(self.ids) == 0:
            return (0, 0, 0), (0, 0, 0)
        low, high = self.voxels.min(axis=0), self.voxels.max(axis=0)
        return tuple(int(v) for v in low), tuple(int(v) for v in high - low + 1)

    def flat(self) -> tuple[tuple[int, int, int], tuple[int, int, int], np.ndarray, np.ndarray]:
        """Offset, shape, ascending flat indices (in ``order``) and component numbers (the
        smallest integer type that holds them) of the component image over the box."""
        from pipeline.voxels import label_dtype

        offset, shape = self.box()
        if len(self.ids) == 0:
            return offset, shape, np.zeros(0, np.int64), np.zeros(0, label_dtype(self.count))
        local = self.voxels - np.asarray(offset)
        where = np.ravel_multi_index(tuple(local.T), shape, order=self.order)
        return offset, shape, where, self.ids.astype(label_dtype(self.count))

    def image(self) -> tuple[np.ndarray, tuple[int, int, int]]:
        """The component image over the box (in the mask's memory order) and its offset."""
        offset, shape, where, ids = self.flat()
        image = np.zeros(shape, dtype=ids.dtype, order=self.order)
        image.reshape(-1, order=self.order)[where] = ids
        return image, offset

    def keep(self, kept: np.ndarray) -> LesionVoxels:
        """Only the components numbered in ``kept`` (ascending), renumbered 1..len(kept)."""
        mapping = np.zeros(self.count + 1, dtype=np.int64)
        mapping[kept] = np.arange(1, len(kept) + 1)
        new = mapping[self.ids]
        stay = new > 0
        return LesionVoxels(self.voxels[stay], self.values[stay], new[stay], len(kept),
                            self.fortran, self.box())


def nonzero_flat(flat: np.ndarray) -> np.ndarray:
    """``np.flatnonzero(flat)`` for a 1-D array, several times faster on mostly-empty images: a
    vectorised test of 8-byte words marks the 64-byte blocks that hold anything, and only those
    blocks are searched.

    >>> flat = np.zeros(5000, np.int16); flat[[3, 2100, 4999]] = 7
    >>> nonzero_flat(flat).tolist()
    [3, 2100, 4999]
    >>> nonzero_flat(np.array([0.0, -0.0, 2.0])).tolist()
    [2]
    """
    flat = np.ascontiguousarray(flat)
    itemsize = flat.dtype.itemsize
    if 64 % itemsize or flat.dtype.kind not in "biuf":
        return np.flatnonzero(flat)
    per_block = 64 // itemsize
    whole = flat.size - flat.size % per_block
    blocks = flat[:whole].reshape(-1, per_block)
    words = (blocks.view(np.uint8).reshape(-1, 64).view(np.uint64) != 0)  # (blocks, 8) bool
    busy = np.flatnonzero(words.view(np.uint64))                          # 8 bools = 1 word
    rows, cols = np.nonzero(blocks[busy])
    return np.concatenate([busy[rows] * per_block + cols, np.flatnonzero(flat[whole:]) + whole])


def lesion_voxels(data: np.ndarray, connectivity: int, labels: tuple[int, ...] | None = None,
                  name: str = "mask") -> LesionVoxels:
    """Find the lesion voxels of a label mask and number its connected components.

    The lesion voxels are found from the array's memory in one fast pass (no boolean copy of the
    volume); the set is split into parts no component can cross (connected groups of occupied
    coarse cells) and each part is labelled on its own, so the cost follows the lesions, not
    the image size. Components are numbered largest first, ties by first voxel in raster order.
    """
    fortran = data.flags.f_contiguous and not data.flags.c_contiguous
    work = data.T if fortran else data
    flat = work.reshape(-1)
    where = nonzero_flat(flat)
    values = flat[where]
    if labels is not None:
        chosen = np.isin(values, _label_values(labels, data.dtype))
        if not chosen.any() and len(values):
            raise _absent_labels(values, labels, name)
        where, values = where[chosen], values[chosen]
    coords = np.column_stack(np.unravel_index(where, work.shape)).astype(np.int64, copy=False)
    raw, count = _number_parts(coords, connectivity)
    ids = _largest_first(raw, count)
    voxels = coords[:, ::-1] if fortran else coords
    return LesionVoxels(np.ascontiguousarray(voxels), values, ids, count, fortran)


#: A part of the lesion voxels is labelled in a box of its own when the box holds at most this
#: many voxels, or at most this many per lesion voxel; otherwise as a graph (scattered specks).
SMALL_BOX_VOXELS = 1 << 16
DENSE_BOX_RATIO = 16
#: Edge (voxels) of the coarse cells that split the lesion voxels into parts.
CELL = 8


def _parts(coords: np.ndarray) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Split voxel indices into parts no component crosses: (indices into ``coords``, box low
    corner, box shape) per part.

    The parts are the connected groups (26-connectivity) of occupied ``CELL``-voxel cells: two
    neighbouring voxels lie in the same or in neighbouring cells, so a component never spans
    two parts. Labelling the small grid of cells costs little, and each part's box is tight.

    >>> c = np.array([[0, 0, 0], [0, 0, 1], [300, 300, 0]])
    >>> [p[0].tolist() for p in sorted(_parts(c), key=lambda p: p[0][0])]
    [[0, 1], [2]]
    """
    if not len(coords):
        return []
    cells = coords >> int(np.log2(CELL)) if CELL & (CELL - 1) == 0 else coords // CELL
    grid_shape = tuple(int(v) for v in cells.max(axis=0) + 1)
    cell = np.ravel_multi_index(tuple(cells.T), grid_shape)
    grid = np.zeros(grid_shape, dtype=np.uint8)
    grid.reshape(-1)[cell] = 1
    labelled, count = _connected(grid, 26)
    part = labelled.reshape(-1)[cell]
    order = np.argsort(part.astype(np.uint16) if count < 1 << 16 else part, kind="stable")
    sizes = np.bincount(part, minlength=count + 1)[1:]
    starts = np.r_[0, np.cumsum(sizes)[:-1]]
    ordered = coords[order]
    low = np.minimum.reduceat(ordered, starts)
    high = np.maximum.reduceat(ordered, starts)
    return [(order[start:start + size], low[i], high[i] - low[i] + 1)
            for i, (start, size) in enumerate(zip(starts.tolist(), sizes.tolist()))]


def _number_parts(coords: np.ndarray, connectivity: int) -> tuple[np.ndarray, int]:
    """A component number per voxel (1..count, in no particular order) and the count.

    A compact part is labelled in a box of its own; a part whose box would be mostly empty
    (specks scattered close enough to chain their cells together) is labelled as a graph of
    neighbouring voxels, so memory follows the lesion voxels, not the image."""
    ids = np.zeros(len(coords), dtype=np.int64)
    total = 0
    for index, low, shape in _parts(coords):
        local = coords[index] - low
        if int(np.prod(shape)) > max(SMALL_BOX_VOXELS, DENSE_BOX_RATIO * len(index)):
            raw, count = _graph_components(local, connectivity)
        else:
            shape = tuple(int(s) for s in shape)
            flat = (local[:, 0] * shape[1] + local[:, 1]) * shape[2] + local[:, 2]
            box = np.zeros(shape, dtype=np.uint8)
            box.reshape(-1)[flat] = 1
            labelled, count = _connected(box, connectivity)
            raw = labelled.reshape(-1)[flat]
        ids[index] = raw.astype(np.int64) + total
        total += count
    return ids, total


def _graph_components(coords: np.ndarray, connectivity: int) -> tuple[np.ndarray, int]:
    """Connected components of voxels given by their (n, 3) indices (raster order, no
    duplicates), without an image: each voxel is joined to its neighbours found by binary
    search, and scipy's connected_components labels the graph. Component numbers 1..count.

    >>> c = np.array([[0, 0, 0], [1, 1, 1], [5, 5, 5]])
    >>> _graph_components(c, 26)[0].tolist(), _graph_components(c, 6)[1]
    ([1, 1, 2], 3)
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    n = len(coords)
    span = coords.max(axis=0) + 3          # shifted by 1 with a margin each side: no wrapping
    linear = np.ravel_multi_index(tuple((coords + 1).T), span)
    heads, tails = [], []
    for step in _forward_steps(connectivity):
        target = np.ravel_multi_index(tuple((coords + 1 + step).T), span)
        at = np.minimum(np.searchsorted(linear, target), n - 1)
        hit = linear[at] == target
        heads.append(np.flatnonzero(hit))
        tails.append(at[hit])
    head, tail = np.concatenate(heads), np.concatenate(tails)
    graph = coo_matrix((np.ones(len(head), np.int8), (head, tail)), shape=(n, n))
    count, labels = connected_components(graph, directed=False)
    return labels + 1, int(count)


def _forward_steps(connectivity: int) -> np.ndarray:
    """Half of the 6/18/26 neighbour offsets (the other half are their negatives).

    >>> [len(_forward_steps(c)) for c in (6, 18, 26)]
    [3, 9, 13]
    """
    grid = np.stack(np.meshgrid(*[[-1, 0, 1]] * 3, indexing="ij"), axis=-1).reshape(-1, 3)
    reach = {6: 1, 18: 2, 26: 3}[connectivity]
    forward = [s for s in grid if tuple(s) > (0, 0, 0) and np.abs(s).sum() <= reach]
    return np.asarray(forward, dtype=np.int64)


def _largest_first(raw: np.ndarray, count: int) -> np.ndarray:
    """Renumber components 1..count by size (largest first), ties by first voxel (the voxels
    are in raster order).

    >>> _largest_first(np.array([2, 1, 2, 3, 3]), 3).tolist()
    [1, 3, 1, 2, 2]
    """
    if count == 0:
        return raw
    small = raw.astype(np.uint16) if count < 1 << 16 else raw
    order = np.argsort(small, kind="stable")      # radix sort for 16-bit keys
    sizes = np.bincount(raw, minlength=count + 1)[1:]
    first = order[np.r_[0, np.cumsum(sizes)[:-1]]]
    rank = np.empty(count + 1, dtype=np.int64)
    rank[0] = 0
    rank[1 + np.lexsort((first, -sizes))] = np.arange(1, count + 1)
    return rank[raw]


def component_table(data: np.ndarray, affine: np.ndarray, *, labels: tuple[int, ...] | None = None,
                    settings: VolumeSettings = _DEFAULT, name: str = "mask"
                    ) -> tuple[pd.DataFrame, np.ndarray, tuple[int, int, int]]:
    """Measure every connected lesion in a label mask.

    Parameters
    ----------
    data : (X, Y, Z) integer ndarray
        Label mask; ``labels`` selects the lesion values (default: every non-zero value).
    affine : (4, 4) ndarray
        Voxel -> RAS+ world (mm).
    settings : VolumeSettings
        Connectivity, minimum volume and the RANO-BM measurability thresholds.

    Returns
    -------
    table : pandas.DataFrame
        One row per component with the columns ``MEASURE_COLUMNS``: ``component``, ``label``
        (the most frequent selected value), ``voxels``, ``volume_mm3`` (voxels x |det A|),
        world centroid, ``max_axial_diameter_mm``, ``equivalent_diameter_mm`` (sphere of equal
        volume), voxel bounding box, ``axial_slices``, ``touches_border``, ``measurable``
        (judged on ``max_axial_diameter_edge_mm``, the edge-to-edge diameter).
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
    table, found = measure_components(data, affine, labels=labels, settings=settings, name=name)
    components, offset = found.image()
    return table, components, offset


def measure_components(data: np.ndarray, affine: np.ndarray, *,
                       labels: tuple[int, ...] | None = None, settings: VolumeSettings = _DEFAULT,
                       name: str = "mask") -> tuple[pd.DataFrame, LesionVoxels]:
    """:func:`component_table` with the components kept sparse (what a batch holds per scan)."""
    columns, found = measure_columns(data, affine, labels=labels, settings=settings, name=name)
    return as_table(columns), found


def as_table(columns: dict[str, np.ndarray]) -> pd.DataFrame:
    """The component table (``MEASURE_COLUMNS``) from its columns."""
    import pandas as pd

    return pd.DataFrame(columns, columns=list(MEASURE_COLUMNS))


def measure_columns(data: np.ndarray, affine: np.ndarray, *,
                    labels: tuple[int, ...] | None = None, settings: VolumeSettings = _DEFAULT,
                    name: str = "mask") -> tuple[dict[str, np.ndarray], LesionVoxels]:
    """:func:`measure_components` as plain column arrays: what a stage-1 worker computes
    without importing pandas (a worker process starts faster without it)."""
    data = np.asarray(data)
    affine = np.asarray(affine, dtype=np.float64)
    found = lesion_voxels(data, settings.connectivity, labels, name)
    voxel_mm3 = voxel_volume_mm3(affine)
    columns = _measure(found, data.shape, affine, voxel_mm3, settings.measurable_min_diameter_mm,
                       settings.measurable_min_slices)
    keep = columns["volume_mm3"] >= settings.min_volume_mm3
    if settings.min_volume_mm3 > 0 and not keep.all():
        found = found.keep(columns["component"][keep])
        columns = {key: value[keep] for key, value in columns.items()}
        columns["component"] = np.arange(1, int(keep.sum()) + 1, dtype=np.int64)
    return columns, found


def _measure(found: LesionVoxels, shape: tuple[int, ...], affine: np.ndarray, voxel_mm3: float,
             min_diameter: float, min_slices: int) -> dict[str, np.ndarray]:
    """Measures per component (``MEASURE_COLUMNS``), computed for all at once."""
    count = found.count
    group = np.argsort(found.ids.astype(np.uint16) if count < 1 << 16 else found.ids,
                       kind="stable")                      # by component, raster order within
    vox, ids = found.voxels[group], found.ids[group]
    sizes = np.bincount(ids, minlength=count + 1)[1:]
    starts = np.r_[0, np.cumsum(sizes)[:-1]].astype(np.int64)
    if count:
        centres = np.add.reduceat(vox.astype(np.float64), starts) / sizes[:, None]
        low, high = np.minimum.reduceat(vox, starts), np.maximum.reduceat(vox, starts)
        labels = _mode_per_group(ids, found.values[group], count).astype(np.int64)
    else:
        centres, low, high = np.zeros((0, 3)), np.zeros((0, 3), np.int64), np.zeros((0, 3),
                                                                                  np.int64)
        labels = np.zeros(0, np.int64)
    centres = centres @ affine[:3, :3].T + affine[:3, 3]
    axis = axial_axis(affine)
    diameters, edges, slices = _axial_diameters(vox, ids, count, affine, axis,
                                                _row_axes(axis, found.fortran))
    volume = sizes.astype(np.int64) * voxel_mm3
    edge = np.asarray(shape[:3]) - 1
    columns = {
        "component": np.arange(1, count + 1, dtype=np.int64), "label": labels,
        "voxels": sizes.astype(np.int64), "volume_mm3": volume,
        "centroid_x_mm": centres[:, 0], "centroid_y_mm": centres[:, 1],
        "centroid_z_mm": centres[:, 2], "max_axial_diameter_mm": diameters,
        "equivalent_diameter_mm": np.cbrt(6.0 * volume / np.pi),
        "bbox_i_min": low[:, 0].astype(np.int64), "bbox_i_max": high[:, 0].astype(np.int64),
        "bbox_j_min": low[:, 1].astype(np.int64), "bbox_j_max": high[:, 1].astype(np.int64),
        "bbox_k_min": low[:, 2].astype(np.int64), "bbox_k_max": high[:, 2].astype(np.int64),
        "axial_slices": slices.astype(np.int64),
        "touches_border": (low == 0).any(axis=1) | (high == edge).any(axis=1),
        "measurable": (edges >= min_diameter) & (slices >= min_slices),
        "max_axial_diameter_edge_mm": edges}
    return {name: columns[name] for name in MEASURE_COLUMNS}


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
