"""Stage 1: label mask + affine -> one row per connected lesion component."""
from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
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
                  "measurable", "max_axial_diameter_edge_mm", "mask", "group")

MEASURE_COLUMNS = LESION_COLUMNS[3:22]


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
    selected = np.isin(data, _label_values(labels, data.dtype))
    if not selected.any() and data.any():
        raise _absent_labels(np.asarray(data).ravel(), labels, name)
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
        from pipeline.io import label_dtype

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


def _label_values(labels: tuple[int, ...], dtype: np.dtype) -> np.ndarray:
    """The asked-for label values the mask's type can hold (a uint8 mask holds no 300 or -1),
    in that type.

    >>> _label_values((1, 300, -1), np.dtype(np.uint8)).tolist()
    [1]
    """
    if dtype.kind in "iu":
        info = np.iinfo(dtype)
        labels = tuple(v for v in labels if info.min <= v <= info.max)
    elif dtype.kind == "b":
        labels = tuple(v for v in labels if v in (0, 1))
    return np.asarray(labels, dtype=dtype)


def _absent_labels(values: np.ndarray, labels: tuple[int, ...], name: str) -> Exception:
    from pipeline.errors import InputError

    shown = np.unique(values[values != 0])[:10].tolist()
    return InputError(f"{name}: label values {tuple(labels)} asked for, but the mask holds "
                      f"only {shown}", path=name)


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
    table, found = measure_components(
        data, affine, labels=labels, connectivity=connectivity, min_volume_mm3=min_volume_mm3,
        measurable_min_diameter_mm=measurable_min_diameter_mm,
        measurable_min_slices=measurable_min_slices, name=name)
    components, offset = found.image()
    return table, components, offset


def measure_components(data: np.ndarray, affine: np.ndarray, *,
                       labels: tuple[int, ...] | None = None, connectivity: int = 26,
                       min_volume_mm3: float = 0.0, measurable_min_diameter_mm: float = 10.0,
                       measurable_min_slices: int = 2, name: str = "mask"
                       ) -> tuple[pd.DataFrame, LesionVoxels]:
    """:func:`component_table` with the components kept sparse (what a batch holds per scan)."""
    columns, found = measure_columns(
        data, affine, labels=labels, connectivity=connectivity, min_volume_mm3=min_volume_mm3,
        measurable_min_diameter_mm=measurable_min_diameter_mm,
        measurable_min_slices=measurable_min_slices, name=name)
    return as_table(columns), found


def as_table(columns: dict[str, np.ndarray]) -> pd.DataFrame:
    """The component table (``MEASURE_COLUMNS``) from its columns."""
    import pandas as pd

    return pd.DataFrame(columns, columns=list(MEASURE_COLUMNS))


def measure_columns(data: np.ndarray, affine: np.ndarray, *,
                    labels: tuple[int, ...] | None = None, connectivity: int = 26,
                    min_volume_mm3: float = 0.0, measurable_min_diameter_mm: float = 10.0,
                    measurable_min_slices: int = 2, name: str = "mask"
                    ) -> tuple[dict[str, np.ndarray], LesionVoxels]:
    """:func:`measure_components` as plain column arrays: what a stage-1 worker computes
    without importing pandas (a worker process starts faster without it)."""
    data = np.asarray(data)
    affine = np.asarray(affine, dtype=np.float64)
    found = lesion_voxels(data, connectivity, labels, name)
    voxel_mm3 = float(abs(np.linalg.det(affine[:3, :3])))
    columns = _measure(found, data.shape, affine, voxel_mm3, measurable_min_diameter_mm,
                       measurable_min_slices)
    keep = columns["volume_mm3"] >= min_volume_mm3
    if min_volume_mm3 > 0 and not keep.all():
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
