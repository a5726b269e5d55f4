"""Shapes, grids and MRI-like images for the invented demo cohort (see :mod:`pipeline.demo`).

Everything here is invented geometry: voxel grids placed in RAS+ world millimetres, slightly
irregular ellipsoidal lesions, and a smooth ellipsoidal "head" with skull, brain and ventricles.
Lesions live in world space and are rasterised into each grid through its affine, so a lesion
keeps its world position whatever grid a session is stored on.

Irregular lesions keep their volume exactly: the unit ball is deformed by two shears
``x += e1 f1(y, z)`` and ``y += e2 f2(x, z)``; a shear has Jacobian determinant 1, so the body
``R diag(a, b, c) shear(ball) + centre`` has the analytic ellipsoid volume ``4/3 pi a b c``.
"""
from __future__ import annotations

import gzip
from dataclasses import dataclass
from functools import lru_cache
from typing import Sequence

import nibabel as nib
import numpy as np

from pipeline.geometry import voxel_volume_mm3

#: Field of view of every grid along world x, y, z (mm).
FOV_MM = (150.0, 180.0, 150.0)
#: Centre and semi-axes (mm) of the invented head ellipsoid.
HEAD_CENTRE_MM = (0.0, -10.0, 20.0)
HEAD_SEMI_AXES_MM = (66.0, 80.0, 62.0)
#: Normalised head radius inside which lies brain (skull and scalp outside it).
BRAIN_FRACTION = 0.86
#: Spatial frequency of the shear deformation, in units of the normalised lesion radius.
SHEAR_FREQUENCY = 1.5
#: Edema (label 2) reaches this normalised lesion radius.
EDEMA_RADIUS = 1.6

_AXES = {"R": (0, 1.0), "L": (0, -1.0), "A": (1, 1.0), "P": (1, -1.0), "S": (2, 1.0),
         "I": (2, -1.0)}
#: Head intensity profile: knots in normalised radius and T1w-like values (arbitrary units).
_PROFILE_R = (0.0, 0.70, 0.74, 0.845, 0.86, 0.875, 0.885, 0.925, 0.94, 0.985, 1.0)
_PROFILE_V = (560., 560., 430., 430., 150., 150., 60., 60., 470., 470., 0.)
_VENTRICLES = (((-7.0, 2.0, 10.0), (4.5, 17.0, 8.0)), ((7.0, 2.0, 10.0), (4.5, 17.0, 8.0)))
_CSF, _RIM, _CORE = 140.0, 980.0, 250.0


@dataclass(frozen=True, eq=False)
class Grid:
    """A voxel grid: array shape and voxel -> RAS+ mm affine (float64, float32-exact)."""

    shape: tuple[int, int, int]
    affine: np.ndarray
    kind: str

    @property
    def voxel_volume_mm3(self) -> float:
        return voxel_volume_mm3(self.affine)


@dataclass(frozen=True)
class Blob:
    """One irregular ellipsoid in world mm.

    ``centre_mm`` is the centre of the deformed ball (the centroid differs slightly: see
    :func:`shape_centroid`), ``rotation`` the 3x3 rotation (row-major, 9 numbers), ``shear``
    ``(e1, e2, p1, p2, p3, p4)``, ``core`` the normalised radius of a necrotic core (0: none).
    """

    centre_mm: tuple[float, float, float]
    semi_axes_mm: tuple[float, float, float]
    rotation: tuple[float, ...]
    shear: tuple[float, ...]
    core: float = 0.0

    @property
    def volume_mm3(self) -> float:
        """Analytic volume 4/3 pi a b c (the shears preserve volume)."""
        a, b, c = self.semi_axes_mm
        return 4.0 / 3.0 * np.pi * a * b * c

    @property
    def bounding_radius_mm(self) -> float:
        """Radius around ``centre_mm`` that holds the whole body (a shear moves a point of the
        unit ball by at most its amplitude, so ``|shear(s)| <= 1 + e1 + e2``)."""
        return float(max(self.semi_axes_mm) * (1.0 + abs(self.shear[0]) + abs(self.shear[1])))

    def matrix(self) -> np.ndarray:
        return np.asarray(self.rotation, dtype=float).reshape(3, 3)


def rotation_matrix(degrees: Sequence[float]) -> np.ndarray:
    """Rotation ``Rz @ Ry @ Rx`` for angles (degrees) about world x, y, z.

    >>> np.round(rotation_matrix((0, 0, 90)) @ [1, 0, 0], 6).tolist()
    [0.0, 1.0, 0.0]
    """
    ax, ay, az = np.deg2rad(np.asarray(degrees, dtype=float))
    rx = np.array([[1, 0, 0], [0, np.cos(ax), -np.sin(ax)], [0, np.sin(ax), np.cos(ax)]])
    ry = np.array([[np.cos(ay), 0, np.sin(ay)], [0, 1, 0], [-np.sin(ay), 0, np.cos(ay)]])
    rz = np.array([[np.cos(az), -np.sin(az), 0], [np.sin(az), np.cos(az), 0], [0, 0, 1]])
    return rz @ ry @ rx


def make_grid(zooms: Sequence[float], *, axcodes: str = "RAS", degrees: Sequence[float] = (0, 0, 0),
              shift_mm: Sequence[float] = (0, 0, 0), kind: str = "") -> Grid:
    """A grid covering :data:`FOV_MM` around the head centre (+ ``shift_mm``).

    ``axcodes`` says where each array axis points (``"LAS"``: i runs right to left), ``degrees``
    tilts the whole grid (oblique acquisition). The affine is rounded to float32 so that the
    sform stored in the file reads back exactly.

    Examples
    --------
    >>> g = make_grid((0.9, 0.9, 3.0))
    >>> g.shape, round(g.voxel_volume_mm3, 3)
    ((167, 200, 50), 2.43)
    >>> float(make_grid((1, 1, 1), axcodes="LAS").affine[0, 0])
    -1.0
    """
    columns = np.zeros((3, 3))
    shape = []
    for d, code in enumerate(axcodes.upper()):
        world, sign = _AXES[code]
        columns[world, d] = sign * float(zooms[d])
        shape.append(int(np.ceil(FOV_MM[world] / float(zooms[d]))))
    linear = rotation_matrix(degrees) @ columns
    centre = np.asarray(HEAD_CENTRE_MM) + np.asarray(shift_mm, dtype=float)
    affine = np.eye(4)
    affine[:3, :3] = linear
    affine[:3, 3] = centre - linear @ ((np.asarray(shape) - 1) / 2.0)
    affine = affine.astype(np.float32).astype(np.float64)
    return Grid(shape=(shape[0], shape[1], shape[2]), affine=affine, kind=kind or axcodes)


def shear_forward(s: np.ndarray, shear: Sequence[float]) -> np.ndarray:
    """Map (n, 3) points of the normalised ball onto the irregular body (volume preserving)."""
    e1, e2, p1, p2, p3, p4 = shear
    f = SHEAR_FREQUENCY
    x = s[:, 0] + e1 * np.sin(f * s[:, 1] + p1) * np.cos(f * s[:, 2] + p2)
    y = s[:, 1] + e2 * np.sin(f * x + p3) * np.cos(f * s[:, 2] + p4)
    return np.stack([x, y, s[:, 2]], axis=1)


def shear_inverse(t: np.ndarray, shear: Sequence[float]) -> np.ndarray:
    """Inverse of :func:`shear_forward` (undo the shears in reverse order).

    >>> s = np.array([[0.3, -0.2, 0.5]]); sh = (0.08, 0.06, 0.1, 0.2, 0.3, 0.4)
    >>> bool(np.allclose(shear_inverse(shear_forward(s, sh), sh), s))
    True
    """
    e1, e2, p1, p2, p3, p4 = shear
    f = SHEAR_FREQUENCY
    y = t[:, 1] - e2 * np.sin(f * t[:, 0] + p3) * np.cos(f * t[:, 2] + p4)
    x = t[:, 0] - e1 * np.sin(f * y + p1) * np.cos(f * t[:, 2] + p2)
    return np.stack([x, y, t[:, 2]], axis=1)


def shape_centroid(shear: Sequence[float], *, steps: int = 48) -> np.ndarray:
    """Centroid of the deformed unit ball in normalised coordinates.

    The map has Jacobian 1, so the centroid is the mean of the mapped points of the ball
    (midpoint rule on a ``steps``^3 lattice).

    >>> bool(np.allclose(shape_centroid((0.0, 0.0, 0, 0, 0, 0)), 0.0))
    True
    """
    return np.array(_centroid(tuple(float(v) for v in shear), steps))


@lru_cache(maxsize=1024)
def _centroid(shear: tuple[float, ...], steps: int) -> tuple[float, float, float]:
    axis = (np.arange(steps) + 0.5) / steps * 2.0 - 1.0
    pts = np.stack(np.meshgrid(axis, axis, axis, indexing="ij"), axis=-1).reshape(-1, 3)
    pts = pts[(pts ** 2).sum(axis=1) <= 1.0]
    c = shear_forward(pts, shear).mean(axis=0)
    return float(c[0]), float(c[1]), float(c[2])


def blob_centroid(blob: Blob) -> np.ndarray:
    """World centroid (mm) of a blob."""
    offset = np.asarray(blob.semi_axes_mm) * shape_centroid(blob.shear)
    return np.asarray(blob.centre_mm) + blob.matrix() @ offset


def random_rotation(rng: np.random.Generator) -> np.ndarray:
    """A random proper rotation (QR of a Gaussian matrix, signs fixed)."""
    q, r = np.linalg.qr(rng.standard_normal((3, 3)))
    q = q * np.sign(np.diag(r))
    return q if np.linalg.det(q) > 0 else -q


def random_shear(rng: np.random.Generator) -> tuple[float, ...]:
    """Shear amplitudes 0.04-0.08 and random phases: gently irregular, still convex-looking."""
    return tuple(float(v) for v in (*rng.uniform(0.04, 0.08, 2), *rng.uniform(0, 2 * np.pi, 4)))


def semi_axes(volume_mm3: float, aspect: Sequence[float]) -> np.ndarray:
    """Semi-axes ``a * aspect`` whose ellipsoid has volume 4/3 pi a b c = ``volume_mm3``.

    >>> float(np.round(4 / 3 * np.pi * np.prod(semi_axes(1000.0, (1, 0.8, 0.7))), 6))
    1000.0
    """
    aspect = np.asarray(aspect, dtype=float)
    a = np.cbrt(3.0 * volume_mm3 / (4.0 * np.pi * np.prod(aspect)))
    return a * aspect


def reach_mm(volume_mm3: float, aspect: Sequence[float], shear: Sequence[float]) -> float:
    """Largest distance from the centroid to any point of the body (an upper bound)."""
    axes = semi_axes(volume_mm3, aspect)
    offset = np.linalg.norm(axes * shape_centroid(shear))
    return float(axes.max() * (1.0 + abs(shear[0]) + abs(shear[1])) + offset)


def place_blob(volume_mm3: float, centroid_mm: Sequence[float], *, aspect: Sequence[float],
               rotation: np.ndarray, shear: Sequence[float], core: float = 0.0) -> Blob:
    """The blob of given volume whose centroid is ``centroid_mm`` (growth keeps the centroid).

    >>> b = place_blob(500.0, (1.0, 2.0, 3.0), aspect=(1, 0.9, 0.8), rotation=np.eye(3),
    ...                shear=(0.06, 0.05, 0.1, 0.2, 0.3, 0.4))
    >>> np.round(blob_centroid(b), 9).tolist(), round(b.volume_mm3, 9)
    ([1.0, 2.0, 3.0], 500.0)
    """
    axes = semi_axes(volume_mm3, aspect)
    rotation = np.asarray(rotation, dtype=float)
    centre = np.asarray(centroid_mm, dtype=float) - rotation @ (axes * shape_centroid(shear))
    return Blob(tuple(float(v) for v in centre), tuple(float(v) for v in axes),
                tuple(float(v) for v in rotation.ravel()), tuple(float(v) for v in shear),
                float(core))


def frame(direction: Sequence[float]) -> np.ndarray:
    """A rotation whose first column is the unit vector along ``direction``."""
    e = np.asarray(direction, dtype=float) / np.linalg.norm(direction)
    helper = np.eye(3)[int(np.argmin(np.abs(e)))]
    f2 = np.cross(e, helper)
    f2 /= np.linalg.norm(f2)
    return np.stack([e, f2, np.cross(e, f2)], axis=1)


def _box(grid: Grid, centre: np.ndarray, radius: float) -> tuple[slice, ...] | None:
    """Voxel index box holding the world sphere (centre, radius), clipped to the grid."""
    corners = centre + radius * np.array([[sx, sy, sz] for sx in (-1, 1) for sy in (-1, 1)
                                          for sz in (-1, 1)], dtype=float)
    inverse = np.linalg.inv(grid.affine)
    ijk = corners @ inverse[:3, :3].T + inverse[:3, 3]
    lo = np.maximum(np.floor(ijk.min(axis=0)).astype(int), 0)
    hi = np.minimum(np.ceil(ijk.max(axis=0)).astype(int) + 1, grid.shape)
    if np.any(hi <= lo):
        return None
    return tuple(slice(int(a), int(b)) for a, b in zip(lo, hi))


def _box_points(grid: Grid, box: tuple[slice, ...]) -> np.ndarray:
    """(n, 3) float64 world coordinates of the voxel centres of ``box`` (C order)."""
    i, j, k = (np.arange(b.start, b.stop, dtype=float) for b in box)
    a = grid.affine
    return np.stack([(a[d, 0] * i[:, None, None] + a[d, 1] * j[None, :, None]
                      + (a[d, 2] * k + a[d, 3])[None, None]).ravel() for d in range(3)], axis=1)


def blob_radius2(points_mm: np.ndarray, blob: Blob) -> np.ndarray:
    """Squared normalised radius of world points: <= 1 inside the blob's body."""
    local = (points_mm - np.asarray(blob.centre_mm)) @ blob.matrix()
    s = shear_inverse(local / np.asarray(blob.semi_axes_mm), blob.shear)
    return (s ** 2).sum(axis=1)


def _head_frame(grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """(M, t) with normalised head coordinates n = M @ (i, j, k) + t."""
    semi = np.asarray(HEAD_SEMI_AXES_MM)
    return (grid.affine[:3, :3] / semi[:, None],
            (grid.affine[:3, 3] - np.asarray(HEAD_CENTRE_MM)) / semi)


def _polynomial(grid: Grid, quad: np.ndarray, lin: np.ndarray, const: float) -> np.ndarray:
    """float32 ``x' quad x + lin' x + const`` over all voxel indices x = (i, j, k).

    Built from 1-D and 2-D broadcast terms in (k, j, i) memory order and returned transposed,
    so the (i, j, k) array is Fortran-ordered, the order NIfTI stores.
    """
    nx, ny, nz = grid.shape
    axes = (np.arange(nx, dtype=float)[None, None, :], np.arange(ny, dtype=float)[None, :, None],
            np.arange(nz, dtype=float)[:, None, None])
    terms = [(quad[d, d] * x * x + lin[d] * x).astype(np.float32) for d, x in enumerate(axes)]
    out = terms[2] + terms[1] + terms[0]
    out += np.float32(const)
    for d, e in ((0, 1), (0, 2), (1, 2)):
        if abs(quad[d, e]) > 1e-12:
            out += (2.0 * quad[d, e] * axes[d] * axes[e]).astype(np.float32)
    return out.T


def head_signal(grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """Noise-free float32 T1w-like head (scalp, skull, CSF rim, grey and white matter,
    ventricles) and a boolean map of the air around the head (no noise there).

    The radial profile is looked up in a table of 4096 steps of the squared head radius q.
    """
    m, t = _head_frame(grid)
    q = _polynomial(grid, m.T @ m, 2.0 * (m.T @ t), float(t @ t))
    air = q >= np.float32(1.06 ** 2)
    steps, q_max = 4096, 1.21
    table = np.interp((np.arange(steps) + 0.5) * (q_max / steps), np.square(_PROFILE_R),
                      _PROFILE_V).astype(np.float32)
    q *= np.float32(steps / q_max)
    np.minimum(q, np.float32(steps - 1), out=q)
    signal = np.take(table, q.T.astype(np.intp)).T               # keep Fortran order
    for offset, semi in _VENTRICLES:
        centre = np.asarray(HEAD_CENTRE_MM) + offset
        box = _box(grid, centre, max(semi) + 2.0)
        if box is None:
            continue
        r = np.sqrt((((_box_points(grid, box) - centre) / semi) ** 2).sum(axis=1))
        w = np.clip((1.0 - r) * 5.0 + 0.5, 0.0, 1.0).reshape(signal[box].shape)
        signal[box] = signal[box] * (1 - w) + _CSF * w
    return signal, air


def _lesion_weight(rho: np.ndarray, edge: float, radius_mm: float, ramp_mm: float) -> np.ndarray:
    return np.clip((edge - rho) * radius_mm / ramp_mm + 0.5, 0.0, 1.0)


def _paint_lesion(signal: np.ndarray, box: tuple[slice, ...], r2: np.ndarray, blob: Blob) -> None:
    rho = np.sqrt(r2).reshape(signal[box].shape)
    radius = float(np.cbrt(np.prod(blob.semi_axes_mm)))
    edema = _lesion_weight(rho, EDEMA_RADIUS, radius, 3.0)
    values = signal[box] * (1.0 - 0.18 * edema)
    lesion = _lesion_weight(rho, 1.0, radius, 0.8)
    inside = np.full(rho.shape, _RIM)
    if blob.core > 0:
        inside += (_CORE - _RIM) * _lesion_weight(rho, blob.core, radius, 1.0)
    signal[box] = values * (1.0 - lesion) + inside * lesion


def render(grid: Grid, blobs: Sequence[Blob], *, rng: np.random.Generator,
           multilabel: bool = False, noise_sd: float = 9.0,
           bias: Sequence[float] = (0.0, 0.0, 0.0), head: bool = True
           ) -> tuple[np.ndarray, np.ndarray]:
    """Rasterise ``blobs`` into a uint8 mask and an int16 MRI-like image on ``grid``.

    Mask values: 1 inside a lesion (voxel centre inside the body). With ``multilabel``, 3 in
    the necrotic core, 2 in the surrounding edema (outside every lesion), 1 in the enhancing rim.
    ``bias`` is the gradient of a linear multiplicative bias field per normalised head radius;
    ``head=False`` leaves out the head (lesions on an empty background).

    Examples
    --------
    >>> g = Grid((20, 20, 20), np.diag([1.0, 1.0, 1.0, 1.0]), "tiny")
    >>> b = Blob((10.0, 10.0, 10.0), (4.0, 4.0, 4.0), tuple(np.eye(3).ravel()), (0,) * 6)
    >>> mask, image = render(g, [b], rng=np.random.default_rng(0), head=False)
    >>> int(mask.sum()), mask.dtype.name, image.dtype.name
    (257, 'uint8', 'int16')
    """
    if head:
        signal, air = head_signal(grid)
    else:
        signal = np.zeros(grid.shape[::-1], np.float32).T
        air = np.zeros(grid.shape, bool)
    mask = np.zeros(grid.shape[::-1], dtype=np.uint8).T          # Fortran order, as stored
    painted = []
    for blob in blobs:
        box = _box(grid, np.asarray(blob.centre_mm), blob.bounding_radius_mm * EDEMA_RADIUS)
        if box is not None:
            painted.append((blob, box, blob_radius2(_box_points(grid, box), blob)))
    if multilabel:
        for _, box, r2 in painted:
            edema = (r2 <= EDEMA_RADIUS ** 2).reshape(mask[box].shape)
            mask[box][edema & (mask[box] == 0)] = 2
    for blob, box, r2 in painted:
        shape = mask[box].shape
        mask[box][(r2 <= 1.0).reshape(shape)] = 1
        if multilabel and blob.core > 0:
            mask[box][(r2 <= blob.core ** 2).reshape(shape)] = 3
        _paint_lesion(signal, box, r2, blob)
    m, t = _head_frame(grid)
    signal *= _polynomial(grid, np.zeros((3, 3)), m.T @ np.asarray(bias, dtype=float),
                          1.0 + float(np.dot(bias, t)))         # linear bias field
    noise = rng.standard_normal(grid.shape[::-1], dtype=np.float32).T
    noise *= np.float32(noise_sd)
    np.copyto(noise, np.float32(0.0), where=air)
    signal += noise
    np.abs(signal, out=signal)
    signal += np.float32(0.5)                                    # round half up on the cast
    return mask, signal.astype(np.int16)


def nifti_gz_bytes(data: np.ndarray, affine: np.ndarray, *, compresslevel: int = 6) -> bytes:
    """Gzipped single-file NIfTI-1 built from geometry alone, byte-reproducible.

    sform and qform both hold ``affine`` with code 1 (scanner), ``xyzt_units`` is mm,
    ``scl_slope`` 1 and ``scl_inter`` 0, every text field is empty, there are no extensions, and
    the gzip header carries no time stamp and no file name (``mtime=0``).

    Examples
    --------
    >>> raw = nifti_gz_bytes(np.ones((2, 2, 2), np.uint8), np.eye(4))
    >>> img = nib.Nifti1Image.from_bytes(gzip.decompress(raw))
    >>> img.header.get_xyzt_units(), int(img.header["sform_code"]), int(img.header["qform_code"])
    (('mm', 'unknown'), 1, 1)
    >>> raw == nifti_gz_bytes(np.ones((2, 2, 2), np.uint8), np.eye(4))
    True
    """
    if data.dtype == np.int64 or data.dtype.kind not in "iu":
        raise TypeError(f"demo images need an explicit small integer dtype, got {data.dtype}")
    data = np.asarray(data, dtype=data.dtype.newbyteorder("<"))
    header = nib.Nifti1Header(endianness="<")
    header.set_data_dtype(data.dtype)
    header.set_data_shape(data.shape)
    header.set_qform(affine, code=1)
    header.set_sform(affine, code=1)
    header.set_xyzt_units("mm")
    header["scl_slope"] = 1.0
    header["scl_inter"] = 0.0
    header["vox_offset"] = 352
    raw = header.binaryblock + b"\x00" * 4 + data.tobytes(order="F")
    return gzip.compress(raw, compresslevel=compresslevel, mtime=0)


def layout_ok(sessions: Sequence[Sequence[Blob]], *, gap_mm: float) -> bool:
    """True when, at every session, each blob's bounding sphere lies inside the brain, clear
    of the ventricles, and ``gap_mm`` away from every other blob of that session.

    >>> b = place_blob(100.0, (20.0, -10.0, 30.0), aspect=(1, 1, 1), rotation=np.eye(3),
    ...                shear=(0.05, 0.05, 0, 0, 0, 0))
    >>> layout_ok([[b]], gap_mm=5.0), layout_ok([[b, b]], gap_mm=5.0)
    (True, False)
    """
    head = np.asarray(HEAD_CENTRE_MM)
    brain = BRAIN_FRACTION * np.asarray(HEAD_SEMI_AXES_MM)
    for blobs in sessions:
        if not blobs:
            continue
        c = np.array([b.centre_mm for b in blobs])
        r = np.array([b.bounding_radius_mm for b in blobs])
        if np.any(np.linalg.norm((c - head) / brain, axis=1) + r / brain.min() > 0.95):
            return False
        outside = np.abs(c - head - (0.0, 2.0, 10.0)) - (14.0, 19.0, 10.0)   # ventricle box
        if np.any(np.linalg.norm(np.maximum(outside, 0.0), axis=1) < r + 2.0):
            return False
        need = r[:, None] + r[None, :] + gap_mm
        np.fill_diagonal(need, 0.0)
        if np.any(np.linalg.norm(c[:, None] - c[None, :], axis=-1) < need):
            return False
    return True
