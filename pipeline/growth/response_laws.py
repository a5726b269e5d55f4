"""Response laws: a treated course modelled as a whole, shrinkage included
(``pipeline.growth.laws``).

- ``regression_regrowth``: V(t) = V_s (exp(-d t) + exp(g t) - 1), d, g >= 0 (Stein WD et al.
  Clin Cancer Res 2008; Stein WD et al. The Oncologist 2011; volume and pages not checked), the sum
  of a decaying (treatment-sensitive) and a growing (resistant) fraction; d = 0 is pure growth,
  g = 0 pure decay. Derived: time to nadir ln(d/g)/(d+g) when d > g (where dV/dt = 0:
  g e^(g t) = d e^(-d t)), the nadir volume and the depth of response nadir / V_s.
- ``bertalanffy_loss``: dV/dt = a V^b - c V (von Bertalanffy's general form with a loss term;
  "general Bertalanffy" in Ghaffari Laleh N et al. PLoS Comput Biol 2022), closed
  form V^(1-b) = a/c + (V0^(1-b) - a/c) exp(-(1-b) c t) (substitution u = V^(1-b), which makes
  the ODE linear). It is fitted as (log_v0, k = a V0^(b-1), b, c), unit-free in volume; c = 0 is
  the power law, b = 1 the exponential law with rate k - c.

Both keep ``log_v0`` first; the second parameter is a rate (1/day) but not the initial specific
growth rate, which is ``initial_rate`` (g - d, k - c).
"""
from __future__ import annotations

import numpy as np

from pipeline.growth.law_base import Law, expm1_ratio, log1p_ratio
from pipeline.settings import FitSettings

Array = np.ndarray

__all__ = ["RESPONSE_LAWS", "numeric_gain_time", "nadir_figures"]


def _col(theta: Array, j: int) -> Array:
    return np.asarray(theta, dtype=float)[..., j, None]


def numeric_gain_time(log_volume, theta: Array, t: Array, log_gain: float) -> Array:
    """Days for a curve to grow by ``exp(log_gain)`` from ``t``: first crossing, bisected.

    ``nan`` when the curve does not reach it within 1e5 days.

    Examples
    --------
    >>> lv = lambda t, th: th[..., 0, None] + th[..., 1, None] * t
    >>> float(numeric_gain_time(lv, np.array([[0.0, np.log(2) / 10]]), np.zeros(1),
    ...                         np.log(2.0))[0].round(9))
    10.0
    """
    theta = np.asarray(theta, float)
    t = np.asarray(t, float)
    grid = np.concatenate([[0.0], np.geomspace(1e-3, 1e5, 121)])
    with np.errstate(all="ignore"):
        here = log_volume(t[..., None], theta)
        gain = log_volume(t[..., None] + grid, theta) - here
    reached = np.nan_to_num(gain, nan=-np.inf) >= log_gain
    found = reached.any(-1)
    j = np.where(found, np.argmax(reached, -1), 1)
    lo, hi = grid[np.maximum(j - 1, 0)], grid[j]
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        with np.errstate(all="ignore"):
            g = log_volume((t + mid)[..., None], theta)[..., 0] - here[..., 0]
        up = np.nan_to_num(g, nan=-np.inf) >= log_gain
        hi, lo = np.where(up, mid, hi), np.where(up, lo, mid)
    return np.where(found, hi, np.nan)


# --- regression-regrowth: V = V_s (exp(-d t) + exp(g t) - 1) ----------------------------------

def _rr_log_volume(t: Array, theta: Array) -> Array:
    lv0, d, g = _col(theta, 0), _col(theta, 1), _col(theta, 2)
    gt = g * t
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        near = np.log(np.exp(-d * t) + np.expm1(np.minimum(gt, 30.0)))
        far = gt + np.log1p((np.exp(-d * t) - 1.0) * np.exp(-np.maximum(gt, 30.0)))
    return lv0 + np.where(gt <= 30.0, near, far)


def _rr_rhs(t: float, v: Array, theta: Array) -> Array:
    lv0, d, g = theta
    return np.exp(lv0) * (g * np.exp(g * t) - d * np.exp(-d * t)) + 0.0 * v


def nadir_figures(theta: Array) -> dict[str, Array]:
    """Time to nadir (days after the window start), nadir volume and depth of response.

    ``t_n = ln(d/g)/(d+g)`` when ``d > g > 0``; at ``t = 0`` (depth 1) when ``d <= g``; ``nan``
    (no nadir: the volume keeps falling) when ``g = 0 < d``.

    Examples
    --------
    >>> out = nadir_figures(np.array([[np.log(1000.0), 0.02, 0.005]]))
    >>> round(float(out["nadir_day_rel"][0]), 4), round(float(out["depth_of_response"][0]), 4)
    (55.4518, 0.6494)
    """
    theta = np.asarray(theta, float)
    d, g = theta[:, 1], theta[:, 2]
    with np.errstate(divide="ignore", invalid="ignore"):
        t_n = np.where(d > g, np.log(d / g) / (d + g), 0.0)
    t_n = np.where((g <= 0) & (d > 0), np.nan, t_n)
    depth = np.exp(_rr_log_volume(np.nan_to_num(t_n)[:, None], theta)[:, 0] - theta[:, 0])
    depth = np.where(np.isfinite(t_n), depth, np.nan)
    return {"nadir_day_rel": t_n, "nadir_mm3": np.exp(theta[:, 0]) * depth,
            "depth_of_response": depth, "decay_per_day": d, "regrowth_per_day": g}


def _rr_bounds(y_low: Array, y_high: Array, settings: FitSettings) -> tuple[Array, Array]:
    rate = settings.max_rate_per_day
    zero, top = np.zeros_like(y_low), np.full_like(y_low, rate)
    return (np.stack([y_low - 5.0, zero, zero], -1), np.stack([y_high + 5.0, top, top], -1))


def _rr_starts(intercept: Array, slope: Array, span: Array, y_high: Array) -> list[Array]:
    span = np.maximum(span, 1e-9)
    out = []
    for lv0 in (intercept, y_high):
        for zd in (0.0, 0.3, 1.0, 3.0, 10.0):
            for zg in (0.0, 0.3, 1.0, 3.0):
                out.append(np.stack([lv0, np.full_like(span, zd) / span,
                                     np.full_like(span, zg) / span], -1))
    return out


# --- von Bertalanffy with a loss term: dV/dt = a V^b - c V, k = a V0^(b-1) --------------------
# (V/V0)^(1-b) = 1 + (1-b)(k - c) t E, E = (1 - exp(-(1-b) c t)) / ((1-b) c t)

def _bl_log_volume(t: Array, theta: Array) -> Array:
    lv0, k, b, c = (_col(theta, j) for j in range(4))
    u = 1.0 - b
    with np.errstate(over="ignore", invalid="ignore"):
        w = (k - c) * t * expm1_ratio(-u * c * t)
        return lv0 + w * log1p_ratio(u * w)


def _bl_rhs(t: float, v: Array, theta: Array) -> Array:
    lv0, k, b, c = theta
    return k * np.exp(lv0 * (1.0 - b)) * np.power(v, b) - c * v


def _bl_bounds(y_low: Array, y_high: Array, settings: FitSettings) -> tuple[Array, Array]:
    rate = settings.max_rate_per_day
    lo_b, hi_b = settings.beta_bounds
    zero = np.zeros_like(y_low)
    return (np.stack([y_low - 5.0, zero, np.full_like(y_low, lo_b), zero], -1),
            np.stack([y_high + 5.0, zero + rate, np.full_like(y_low, hi_b), zero + rate], -1))


def _bl_starts(intercept: Array, slope: Array, span: Array, y_high: Array) -> list[Array]:
    span = np.maximum(span, 1e-9)
    out = []
    for b in (2.0 / 3.0, 0.9):
        for zc in (0.0, 1.0, 5.0):
            c = np.full_like(span, zc) / span
            k = np.maximum(slope + c, 0.0)
            out.append(np.stack([intercept, k, np.full_like(k, b), c], -1))
    return out


def _bl_derived(theta: Array) -> dict[str, Array]:
    lv0, k, b, c = (theta[:, j] for j in range(4))
    with np.errstate(all="ignore"):
        cap = np.exp(lv0 + np.log(k / c) / (1.0 - b))
    return {"alpha": k * np.exp(lv0 * (1.0 - b)), "beta": b, "loss_per_day": c,
            "capacity_mm3": np.where((b < 1) & (c > 0) & (k > 0) & np.isfinite(cap), cap,
                                     np.nan)}


def _rr_derived(theta: Array) -> dict[str, Array]:
    return nadir_figures(theta)


RESPONSE_LAWS: dict[str, Law] = {
    "regression_regrowth": Law(
        "regression_regrowth", "V = V_s (exp(-d t) + exp(g t) - 1), d, g >= 0",
        ("log_v0", "d", "g"), _rr_log_volume, _rr_rhs,
        lambda theta, t, gain: numeric_gain_time(_rr_log_volume, theta, t, gain),
        lambda theta: theta[..., 2] - theta[..., 1], None,
        "regression-regrowth; Stein et al. Clin Cancer Res 2008, The Oncologist 2011",
        custom_bounds=_rr_bounds, custom_starts=_rr_starts, derived=_rr_derived),
    "bertalanffy_loss": Law(
        "bertalanffy_loss", "dV/dt = a V^b - c V", ("log_v0", "k", "b", "c"),
        _bl_log_volume, _bl_rhs,
        lambda theta, t, gain: numeric_gain_time(_bl_log_volume, theta, t, gain),
        lambda theta: theta[..., 1] - theta[..., 3], None,
        "von Bertalanffy with a loss term (general Bertalanffy); Ghaffari Laleh et al. 2022",
        custom_bounds=_bl_bounds, custom_starts=_bl_starts, derived=_bl_derived),
}
