"""Input checks for ``lesion-growth check``: each returns Problem records, computes nothing."""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np

from pipeline.errors import InputError
from pipeline.inputs.manifest import Scan
from pipeline.settings import VolumeSettings

TEXT_FIELDS = ("descrip", "aux_file", "intent_name", "db_name")


@dataclass(frozen=True)
class Problem:
    level: str          # "error" (the input cannot be used) or "warning"
    code: str           # short stable identifier, e.g. "mask-unreadable"
    message: str        # one line naming the file and the reason
    subject: str = ""
    session: str = ""
    path: str = ""


def check_scan(scan: Scan, *, settings: VolumeSettings = VolumeSettings()) -> list[Problem]:
    """Everything wrong with one scan: its row, its mask and its image's grid.

    Messages name files as given in the input (never the machine's resolved paths).
    """
    return [Problem(p.level, p.code, scan.shown(p.message), p.subject, p.session, p.path)
            for p in _check_scan(scan, settings)]


def _check_scan(scan: Scan, settings: VolumeSettings) -> list[Problem]:
    from pipeline.io.nifti import load_mask
    from pipeline.voxels import select_labels

    where = {"subject": scan.subject, "session": scan.session, "path": scan.mask}
    if scan.error:
        return [Problem("error", "input-row", scan.error, **where)]
    try:
        mask = load_mask(scan.mask_path, settings=settings)
        select_labels(mask.data, scan.labels, name=str(scan.mask_path))
    except InputError as exc:
        return [Problem("error", "mask-unusable", str(exc), **where)]
    problems = [Problem("warning", "mask-header", w, **where) for w in mask.warnings]
    problems += _text_field_warnings(scan.mask_path, where)
    if scan.image_path is not None:
        reason = image_grid_problem(mask.data.shape[:3], mask.affine, scan.image_path)
        if reason:
            problems.append(Problem("error", "image-grid", reason, **where))
    return problems


def _text_field_warnings(path: Path, where: dict) -> list[Problem]:
    if not str(path).lower().endswith((".nii", ".nii.gz")):
        return []
    header = nib.load(str(path)).header
    filled = [f for f in TEXT_FIELDS if f in header and _text(header[f])]
    if not filled:
        return []
    return [Problem("warning", "header-text", f"{path}: header text field(s) "
                    f"{', '.join(filled)} are not empty; they are never copied to outputs",
                    **where)]


def _text(value: np.ndarray) -> str:
    raw = value.tobytes() if hasattr(value, "tobytes") else bytes(value)
    return raw.split(b"\0", 1)[0].decode("latin-1").strip()


def image_grid_problem(shape: tuple[int, ...], affine: np.ndarray, image_path: Path,
                       *, tolerance_voxels: float = 0.01) -> str:
    """Why the image cannot sit under the mask (different grid), or '' when it can.

    The affines are compared through the positions of the grid's corners, with a tolerance
    relative to the voxel size.
    """
    from pipeline.io.nifti import NIFTI_SUFFIXES, suffix_of
    from pipeline.geometry import UNIT_TO_MM, corner_gap_mm

    if not image_path.exists():
        return f"{image_path}: image file not found"
    if suffix_of(image_path) not in NIFTI_SUFFIXES:
        return ""
    try:
        header = nib.load(str(image_path)).header
    except Exception as exc:  # nibabel raises several types for broken files
        return f"{image_path}: cannot read image header ({exc})"
    image_shape = tuple(int(d) for d in header.get_data_shape()[:3])
    if image_shape != tuple(shape[:3]):
        return (f"{image_path}: image grid {image_shape} does not match the mask grid "
                f"{tuple(shape[:3])}")
    image_affine = np.asarray(header.get_best_affine(), dtype=float)
    image_affine[:3, :] *= UNIT_TO_MM.get(int(header["xyzt_units"]) & 7, 1.0)
    gap = corner_gap_mm(image_affine, affine, shape)
    voxel = float(np.min(np.sqrt((affine[:3, :3] ** 2).sum(axis=0))))
    if gap > tolerance_voxels * voxel + 1e-6:
        return f"{image_path}: image and mask grids differ by {gap:.3g} mm in position"
    return ""
