"""A tiny synthetic cohort with known truth for end-to-end tests (invented data)."""
from __future__ import annotations

from pathlib import Path

import numpy as np

from nifti_helpers import save_mask

DAYS = (0, 40, 80, 120, 160)
SHAPE = (64, 64, 48)


def power_volume(t, v0, alpha, beta):
    """Closed form of dV/dt = alpha V^beta (beta != 1)."""
    return (v0 ** (1 - beta) + alpha * (1 - beta) * t) ** (1 / (1 - beta))


def ball(shape, centre, volume_mm3, zooms):
    """Voxels whose centres lie inside the sphere of that volume (world mm, axis-aligned)."""
    radius = (3 * volume_mm3 / (4 * np.pi)) ** (1 / 3)
    grid = np.ogrid[tuple(slice(0, n) for n in shape)]
    dist = sum(((g * z) - c) ** 2 for g, z, c in zip(grid, zooms, centre))
    return dist <= radius ** 2


def make_cohort(folder: Path, *, beta: float = 1.5) -> dict:
    """Subject A: one lesion growing by a power law (beta) plus a lesion that splits at the
    third session; subject B: two lesions, a missing file at its last session."""
    folder.mkdir(parents=True, exist_ok=True)
    zooms = (1.0, 1.0, 1.0)
    alpha = 0.008 * 400 ** (1 - beta)    # initial specific growth rate 0.008/day at 400 mm3;
    #                                      singularity at 1 / ((beta - 1) 0.008) = 250 days
    rows = ["subject\tsession\tmask\tday"]
    truth = {"beta": beta, "volumes": []}
    for s, day in enumerate(DAYS, start=1):
        v = power_volume(day, 400.0, alpha, beta)
        truth["volumes"].append(v)
        data = ball(SHAPE, (20, 20, 20), v, zooms).astype(np.uint8)
        if s < 3:
            data |= ball(SHAPE, (46, 44, 30), 300.0, zooms)
        else:   # two parts of the second lesion, 10 mm apart, no voxel contact
            data |= ball(SHAPE, (46, 39, 30), 150.0, zooms)
            data |= ball(SHAPE, (46, 49, 30), 150.0, zooms)
        save_mask(folder / f"A_{s}.nii.gz", data, np.diag(zooms + (1.0,)))
        rows.append(f"A\t{s}\tA_{s}.nii.gz\t{day}")
    for s, day in enumerate(DAYS[:3], start=1):
        data = ball(SHAPE, (15, 40, 20), 600.0 + 100 * s, zooms) | \
            ball(SHAPE, (45, 15, 25), 300.0, zooms)
        save_mask(folder / f"B_{s}.nii.gz", data.astype(np.uint8), np.eye(4))
        rows.append(f"B\t{s}\tB_{s}.nii.gz\t{day}")
    rows.append(f"B\t4\tB_missing.nii.gz\t{DAYS[3]}")
    (folder / "manifest.tsv").write_text("\n".join(rows) + "\n")
    return truth
