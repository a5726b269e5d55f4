"""SimpleITK-read masks (NRRD, MetaImage) and the one LPS <-> RAS conversion of the code base.

ITK works in LPS+ world coordinates with (z, y, x) arrays; nibabel and every table here use RAS+
with (x, y, z) arrays. ``itk_affine_ras`` is the only conversion:
``A_ras = diag(-1, -1, 1, 1) @ A_lps`` with ``A_lps[:3, :3] = direction * spacing`` and
``A_lps[:3, 3] = origin`` (SimpleITK documentation, "Fundamental concepts").
"""
from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np

from pipeline.errors import InputError
from pipeline.settings import VolumeSettings

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


def load_itk_mask(path: Path, *, settings: VolumeSettings):
    """Read an NRRD or MetaImage label mask through SimpleITK, in RAS+ and (x, y, z) order."""
    import SimpleITK as sitk

    from pipeline.io import MaskImage, check_memory, integer_labels

    name = str(path)
    reader = sitk.ImageFileReader()
    reader.SetFileName(name)
    try:
        reader.ReadImageInformation()
    except RuntimeError as exc:
        raise InputError(f"{name}: cannot read image header ({_first_line(exc)})",
                         path=name) from None
    size = [int(s) for s in reader.GetSize()]
    while len(size) > 3 and size[-1] == 1:
        size.pop()
    if len(size) > 3 or reader.GetNumberOfComponents() != 1:
        raise InputError(f"{name}: mask has more than one volume or component (size "
                         f"{tuple(reader.GetSize())}); expected one 3-D mask", path=name)
    pixel_bytes = sitk.GetPixelIDValueAsString(reader.GetPixelID())
    itemsize = 8 if "64" in pixel_bytes or "double" in pixel_bytes else 4
    check_memory(size, itemsize, name, settings)
    try:
        image = reader.Execute()
    except RuntimeError as exc:
        raise InputError(f"{name}: cannot read image data ({_first_line(exc)})",
                         path=name) from None
    if image.GetDimension() == 2:
        image = sitk.JoinSeries(image)
    affine = itk_affine_ras(image)
    data = sitk.GetArrayFromImage(image).transpose(2, 1, 0)
    data = integer_labels(data, None, None, name=name)
    sha = hashlib.sha256(path.read_bytes()).hexdigest()
    return MaskImage(data=data, affine=affine, sha256=sha, file_affine=affine, units_code=2)


def _first_line(exc: Exception) -> str:
    lines = [line.strip() for line in str(exc).splitlines() if line.strip()]
    useful = [line for line in lines if "ERROR" in line.upper() or "exception" in line.lower()]
    return (useful or lines or ["unknown error"])[-1][:200]
