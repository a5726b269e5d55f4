"""What the report's figures draw: fitted power-law curves and axial crops around a lesion.

Everything here takes arrays and tables already in memory; nothing reads files. The pixels are
made in :mod:`pipeline.report.png`, the plots in :mod:`pipeline.report.svg`.

Colours: the Okabe-Ito palette (Okabe & Ito 2008, "Color Universal Design"), chosen because its
eight colours stay distinguishable for the common forms of colour-vision deficiency. Lesions are
also told apart by marker shape, and outlines by line style, so colour never carries meaning alone.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd

# Okabe-Ito palette (hex), named as in Okabe & Ito (2008).
BLACK, ORANGE, SKY_BLUE, BLUISH_GREEN = "#000000", "#E69F00", "#56B4E9", "#009E73"
YELLOW, BLUE, VERMILLION, REDDISH_PURPLE = "#F0E442", "#0072B2", "#D55E00", "#CC79A7"
#: Lesion colours in order of use (yellow left out: too pale on white).
SERIES_COLOURS = (BLUE, VERMILLION, BLUISH_GREEN, REDDISH_PURPLE, ORANGE, SKY_BLUE, BLACK)


def power_curve(days: np.ndarray, *, v0_mm3: float, k_per_day: float, beta: float,
                day_start: float) -> np.ndarray:
    """Volume (mm³) of the power law dV/dt = alpha * V**beta at ``days``.

    Uses V(t) = V0 * (1 + (1 - beta) * k * (t - t0)) ** (1 / (1 - beta)) with
    k = alpha * V0 ** (beta - 1), and V0 * exp(k * (t - t0)) when beta = 1. Where the law has no
    positive solution (extinction for beta < 1, blow-up for beta > 1) the value is NaN.

    Examples
    --------
    >>> power_curve(np.array([0.0, 1.0, 2.0]), v0_mm3=1.0, k_per_day=2.0, beta=0.5,
    ...             day_start=0.0).tolist()
    [1.0, 4.0, 9.0]
    """
    t = np.asarray(days, dtype=float) - day_start
    if abs(1.0 - beta) < 1e-9:
        return v0_mm3 * np.exp(k_per_day * t)
    base = 1.0 + (1.0 - beta) * k_per_day * t
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        volume = v0_mm3 * np.where(base > 0, base, np.nan) ** (1.0 / (1.0 - beta))
    return np.where(np.isfinite(volume), volume, np.nan)


def growth_rate(row: pd.Series) -> float:
    """k (1/day) from a fits row: ``k_per_day`` if present, else alpha * V0**(beta - 1)."""
    k = row.get("k_per_day", np.nan)
    if _finite(k):
        return float(k)
    alpha = row.get("alpha", np.nan)
    if _finite(alpha) and _finite(row.get("v0_mm3")) and row["v0_mm3"] > 0:
        return float(alpha) * float(row["v0_mm3"]) ** (float(row["beta"]) - 1.0)
    return np.nan


def _finite(value: object) -> bool:
    try:
        return math.isfinite(float(value))  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return False


def drawable_power_fits(fits: pd.DataFrame) -> pd.DataFrame:
    """The power-law rows of ``fits`` whose curve can be drawn (V0, k or alpha, beta, days)."""
    if fits.empty or "model" not in fits or "lesion" not in fits:
        return pd.DataFrame(columns=["lesion"])
    power = fits[fits["model"].astype(str) == "power"]
    needed = ["v0_mm3", "beta", "day_start", "day_end"]
    if any(c not in power for c in needed):
        return power.iloc[0:0]
    ok = power[needed].apply(pd.to_numeric, errors="coerce").notna().all(axis=1)
    rates = power.apply(growth_rate, axis=1) if len(power) else pd.Series(dtype=float)
    return power[ok & rates.notna()]


def axial_crop(volume: np.ndarray, affine: np.ndarray, world_mm: np.ndarray, half_mm: float,
               *, fill: float = 0) -> tuple[np.ndarray, tuple[float, float, float, float]] | None:
    """Axial slice of an RAS-canonical ``volume`` through ``world_mm``, cropped to ±half_mm.

    Returns (2-D array, extent) or None when the point lies outside the volume's slices.

    Examples
    --------
    >>> vol = np.arange(27).reshape(3, 3, 3)
    >>> crop, extent = axial_crop(vol, np.eye(4), np.array([1.0, 1.0, 2.0]), 1.0)
    >>> crop.tolist(), extent
    ([[2, 5, 8], [11, 14, 17], [20, 23, 26]], (-1.5, 1.5, -1.5, 1.5))
    >>> axial_crop(np.ones((2, 2, 1), np.uint8), np.eye(4), np.zeros(3), 1.0, fill=-1)[0]
    array([[-1, -1, -1],
           [-1,  1,  1],
           [-1,  1,  1]], dtype=int16)
    """
    ijk = np.linalg.solve(affine, np.append(world_mm, 1.0))[:3]
    k = int(round(ijk[2]))
    if not 0 <= k < volume.shape[2]:
        return None
    zooms = np.sqrt((affine[:3, :2] ** 2).sum(axis=0))
    half = [min(512, max(1, int(math.ceil(half_mm / z)))) for z in zooms]   # bounded memory
    centre = [int(round(c)) for c in ijk[:2]]
    dtype = np.result_type(volume.dtype, np.min_scalar_type(fill))  # uint8 with fill -1: int16
    out = np.full((2 * half[0] + 1, 2 * half[1] + 1), fill, dtype=dtype)
    lo = [c - h for c, h in zip(centre, half)]
    src = [slice(max(0, lo[a]), min(volume.shape[a], lo[a] + out.shape[a])) for a in (0, 1)]
    dst = [slice(s.start - lo[a], s.stop - lo[a]) for a, s in enumerate(src)]
    if all(s.stop > s.start for s in src):
        out[dst[0], dst[1]] = volume[src[0], src[1], k]
    extent = (-(half[0] + 0.5) * zooms[0], (half[0] + 0.5) * zooms[0],
              -(half[1] + 0.5) * zooms[1], (half[1] + 0.5) * zooms[1])
    return out, tuple(float(e) for e in extent)  # type: ignore[return-value]
