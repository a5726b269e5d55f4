"""For a researcher: chain lesion-growth after a segmentation model, in memory, no files.

The "model" here is a stand-in that returns invented lesion masks for four scans of one patient;
replace `segment()` with your model's prediction (an integer array) and the scanner affine
(voxel -> RAS+ mm) of each scan. Research use only: not a medical device; results must be
reviewed by licensed clinicians under local rules.

Run: python examples/researcher_chain.py
"""
from __future__ import annotations

import numpy as np

from pipeline.api import fit_growth, lesion_table, track_lesions


def segment(day: float) -> tuple[np.ndarray, np.ndarray]:
    """Stand-in for a model: two invented lesions, one growing (dV/dt = a V^1.3), one stable."""
    affine = np.diag([0.9, 0.9, 1.5, 1.0])
    grid = np.indices((96, 96, 60)).transpose(1, 2, 3, 0) * np.array([0.9, 0.9, 1.5])
    beta, k, v0 = 1.3, 0.01, 300.0
    volume = v0 * (1 + (1 - beta) * k * day) ** (1 / (1 - beta))
    mask = np.zeros((96, 96, 60), np.uint8)
    for centre, vol in (((30.0, 30.0, 40.0), volume), ((60.0, 55.0, 50.0), 500.0)):
        radius = (3 * vol / (4 * np.pi)) ** (1 / 3)
        mask[((grid - centre) ** 2).sum(-1) <= radius ** 2] = 1
    return mask, affine


days = [0.0, 45.0, 90.0, 135.0, 180.0]
scans = [("demo01", f"{i + 1}", day, *segment(day)) for i, day in enumerate(days)]
lesions, labelled = lesion_table(scans)
matches, longitudinal, _ = track_lesions(lesions, labelled)
fits, group_fits, _ = fit_growth(longitudinal)

print(longitudinal[["lesion", "session", "day", "volume_mm3", "status"]].to_string(index=False))
power = fits[fits.model == "power"][["lesion", "n_points", "beta", "beta_ci_low", "beta_ci_high",
                                     "note"]]
print(power.to_string(index=False))
print("shared beta of the group:", group_fits[["beta", "beta_ci_low", "beta_ci_high"]]
      .round(3).to_dict("records"))
