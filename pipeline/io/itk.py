"""SimpleITK-read masks (NRRD, MetaImage).

ITK works in LPS+ world coordinates with (z, y, x) arrays; nibabel and every table here use RAS+
with (x, y, z) arrays. The one conversion is :func:`pipeline.geometry.itk_affine_ras`.
"""
from __future__ import annotations

import hashlib
from pathlib import Path

from pipeline.errors import InputError
from pipeline.settings import VolumeSettings
from pipeline.geometry import itk_affine_ras


def load_itk_mask(path: Path, *, settings: VolumeSettings):
    """Read an NRRD or MetaImage label mask through SimpleITK, in RAS+ and (x, y, z) order."""
    import SimpleITK as sitk

    from pipeline.io.image import MaskImage, check_memory
    from pipeline.voxels import integer_labels

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
