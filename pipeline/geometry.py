"""Every geometry rule of the package in one place: units, voxel volume, affine comparison and
the ITK (LPS+, z-y-x) <-> nibabel (RAS+, x-y-z) conversion.

All millimetres of every table come from a voxel -> RAS+ mm affine in float64 (the NIfTI sform,
else qform, scaled by ``xyzt_units``; NIfTI-1 standard, nifti1.h). SimpleITK geometry enters only
through :func:`itk_affine_ras` (docs/methods.md, "NIfTI geometry").
"""
from __future__ import annotations

import numpy as np


#: NIfTI-1 spatial unit codes (xyzt_units & 0x07) -> factor to millimetres (nifti1.h)
UNIT_TO_MM = {0: 1.0, 1: 1000.0, 2: 1.0, 3: 0.001}


UNIT_NAMES = {0: "unknown", 1: "meter", 2: "mm", 3: "micron"}


def corner_gap_mm(a: np.ndarray, b: np.ndarray, shape: tuple[int, ...] | list[int]) -> float:
    """Largest distance between where two affines put the corners of a grid of ``shape``
    (inf when an affine is not finite).

    >>> corner_gap_mm(np.eye(4), np.diag([1.0, 1.0, 2.0, 1.0]), (2, 2, 4))
    3.0
    """
    last = np.asarray([max(int(d), 1) for d in shape[:3]], dtype=float) - 1
    corners = np.array([[i, j, k, 1.0] for i in (0, last[0]) for j in (0, last[1])
                        for k in (0, last[2])]).T
    with np.errstate(invalid="ignore", over="ignore"):
        gap = np.linalg.norm((np.asarray(a) - np.asarray(b))[:3] @ corners, axis=0)
    return float(np.max(gap)) if np.all(np.isfinite(gap)) else float("inf")


#: RAS+ <-> LPS+ world flip (its own inverse): ``A_ras = LPS_TO_RAS @ A_lps`` with
#: ``A_lps[:3, :3] = direction * spacing`` and ``A_lps[:3, 3] = origin`` (SimpleITK
#: documentation, "Fundamental concepts").
LPS_TO_RAS = np.diag([-1.0, -1.0, 1.0, 1.0])


def itk_affine_ras(image) -> np.ndarray:
    """Voxel (x, y, z) index -> RAS+ mm affine of a SimpleITK image.

    Examples
    --------
    >>> import SimpleITK as sitk
    >>> im = sitk.Image(2, 2, 2, sitk.sitkUInt8); im.SetSpacing((2.0, 3.0, 4.0))
    >>> itk_affine_ras(im)[:3, :3].diagonal().tolist()
    [-2.0, -3.0, 4.0]
    """
    dim = image.GetDimension()
    direction = np.asarray(image.GetDirection(), dtype=float).reshape(dim, dim)
    spacing = np.asarray(image.GetSpacing(), dtype=float)
    lps = np.eye(4)
    lps[:dim, :dim] = direction * spacing
    lps[:dim, 3] = image.GetOrigin()
    return LPS_TO_RAS @ lps


def ras_to_itk_geometry(affine: np.ndarray) -> tuple[tuple, tuple, tuple]:
    """Inverse of :func:`itk_affine_ras`: (origin, spacing, direction) for SimpleITK."""
    lps = LPS_TO_RAS @ np.asarray(affine, dtype=float)
    spacing = np.sqrt((lps[:3, :3] ** 2).sum(axis=0))
    direction = lps[:3, :3] / spacing
    return tuple(lps[:3, 3]), tuple(spacing), tuple(direction.ravel())


def voxel_volume_mm3(affine: np.ndarray) -> float:
    """Volume of one voxel (mm3): |det| of the affine's 3x3 part (mm per voxel step).

    >>> voxel_volume_mm3(np.diag([0.5, 0.5, 2.0, 1.0]))
    0.5
    """
    return float(abs(np.linalg.det(np.asarray(affine, dtype=float)[:3, :3])))
