"""Small writers of synthetic NIfTI files for tests (invented data only)."""
from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np


def oblique_affine(zooms=(0.9, 0.9, 3.0), degrees=30.0, origin=(-60.0, 40.0, -20.0)) -> np.ndarray:
    """A rotation about two axes times the zooms, plus an origin (voxel -> RAS+ mm)."""
    a, b = np.deg2rad(degrees), np.deg2rad(degrees / 2)
    rz = np.array([[np.cos(a), -np.sin(a), 0], [np.sin(a), np.cos(a), 0], [0, 0, 1]])
    rx = np.array([[1, 0, 0], [0, np.cos(b), -np.sin(b)], [0, np.sin(b), np.cos(b)]])
    affine = np.eye(4)
    affine[:3, :3] = rz @ rx @ np.diag(zooms)
    affine[:3, 3] = origin
    return affine


def save_mask(path: Path, data: np.ndarray, affine: np.ndarray, *, units: str = "mm",
              qform: bool = True, sform: bool = True, dtype=None) -> Path:
    """Write ``data`` with both sform and qform (code 1) unless told otherwise."""
    data = np.asarray(data)
    image = nib.Nifti1Image(data.astype(dtype or data.dtype), affine)
    image.set_sform(affine, code=1 if sform else 0)
    image.set_qform(affine, code=1 if qform else 0)
    image.header.set_xyzt_units(xyz=units)
    nib.save(image, str(path))
    return path


def random_blobs(shape=(40, 36, 24), count=6, seed=0) -> np.ndarray:
    """Several irregular blobs (unions of small balls) with labels 1 and 2."""
    rng = np.random.default_rng(seed)
    grid = np.indices(shape).transpose(1, 2, 3, 0).astype(float)
    data = np.zeros(shape, np.uint8)
    for n in range(count):
        centre = rng.uniform(4, np.asarray(shape) - 4)
        for _ in range(3):
            c = centre + rng.normal(0, 1.5, 3)
            r = rng.uniform(1.0, 3.5)
            data[((grid - c) ** 2).sum(-1) <= r * r] = 1 + n % 2
    return data
