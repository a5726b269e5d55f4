"""The image type every reader returns (a label mask with its RAS+ mm affine and what the file
said about its geometry) and the memory cap checked before any voxel is decompressed."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.errors import InputError
from pipeline.settings import VolumeSettings
from pipeline.geometry import voxel_volume_mm3


@dataclass(frozen=True, eq=False)
class MaskImage:
    """A label mask as stages use it: integer voxels and a RAS+ mm affine."""

    data: np.ndarray          # (X, Y, Z) integer array, as stored (Fortran order for NIfTI)
    affine: np.ndarray        # (4, 4) float64 voxel -> RAS+ mm
    sha256: str
    warnings: tuple[str, ...] = ()
    file_affine: np.ndarray | None = None   # affine in the file's own units (for track images)
    units_code: int = 2                     # NIfTI-1 spatial unit code of the file
    forms: np.ndarray | None = None         # (2, 4, 4) sform, qform as stored (NaN = absent)
    form_codes: tuple[int, int] = (1, 1)    # sform_code, qform_code as stored

    @property
    def voxel_volume_mm3(self) -> float:
        return voxel_volume_mm3(self.affine)


def check_memory(shape: tuple[int, ...] | list[int], itemsize: int, name: str,
                 settings: VolumeSettings) -> None:
    """Refuse, before allocating, an image whose array would exceed ``max_memory_mb``."""
    needed = float(np.prod(shape, dtype=float)) * itemsize / 2**20
    if needed > settings.max_memory_mb:
        raise InputError(f"{name}: mask would need {_megabytes(needed)} MB in memory (limit "
                         f"{_megabytes(settings.max_memory_mb)} MB, setting "
                         "volumes.max_memory_mb)", path=name)


def _megabytes(value: float) -> str:
    """Whole megabytes from 10 MB on, three significant digits below (never a bare 0).

    >>> _megabytes(1234.4), _megabytes(0.001), _megabytes(0.00763)
    ('1,234', '0.001', '0.00763')
    """
    return f"{value:,.0f}" if value >= 10 else f"{value:.3g}"
